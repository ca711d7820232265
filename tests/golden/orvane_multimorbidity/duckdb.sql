-- plan for study orvane_multimorbidity (22 stages, dialect duckdb)

-- reads src_patients: patient_id, sex, death_date, birth_date, birth_year, practice_id

-- reads src_encounters: patient_id, encounter_date, encounter_type

-- reads src_diagnoses: patient_id, event_date, code_system, code, source

-- reads src_prescriptions: patient_id, start_date, atc, stop_date

-- reads src_measurements: patient_id, obs_date, measure, unit, value, value_text

-- stage patient_base [table]: one typed row per patient: birth date (1 July when only the year is known), sex
-- reads: src_patients
SELECT DISTINCT
  patient_id,
  COALESCE(TRY_CAST(birth_date AS DATE), MAKE_DATE(TRY_CAST(birth_year AS INT), 7, 1)) AS birth_date,
  NULLIF(UPPER(TRIM(CAST(sex AS TEXT))), '') AS sex,
  TRY_CAST(death_date AS DATE) AS death_date
FROM src_patients
WHERE
  NOT patient_id IS NULL;

-- stage patient_duplicates [check]: patients must be listed once
-- reads: patient_base
SELECT
  patient_id,
  COUNT(*) AS n_rows
FROM patient_base
GROUP BY
  patient_id
HAVING
  COUNT(*) > 1
ORDER BY
  patient_id
LIMIT 5;

-- stage encounter_rows [view]: usable encounters: a readable date, a known patient, not after death or end of data
-- reads: src_encounters, patient_base
SELECT
  e.patient_id,
  e.encounter_date,
  e.encounter_type
FROM (
  SELECT
    patient_id,
    TRY_CAST(encounter_date AS DATE) AS encounter_date,
    LOWER(TRIM(CAST(encounter_type AS TEXT))) AS encounter_type
  FROM src_encounters
) AS e
JOIN patient_base AS p
  ON p.patient_id = e.patient_id
WHERE
  e.encounter_date <= CAST('2019-12-31' AS DATE)
  AND (
    p.death_date IS NULL OR e.encounter_date <= p.death_date
  );

-- stage encounter_summary [table]: first and last usable encounter and the index date, one pass over encounters
-- reads: encounter_rows
SELECT
  patient_id,
  MIN(encounter_date) AS first_encounter,
  MAX(encounter_date) AS last_encounter,
  MIN(encounter_date) FILTER(WHERE
    encounter_date BETWEEN CAST('2015-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)) AS index_date
FROM encounter_rows
GROUP BY
  patient_id;

-- stage coded_events [view]: usable diagnosis and prescription rows with normalised codes
-- reads: src_diagnoses, src_prescriptions, patient_base
SELECT
  r.patient_id,
  r.event_date,
  r.code_system,
  r.code,
  r.source,
  r.duration_days
FROM (
  SELECT
    patient_id,
    TRY_CAST(event_date AS DATE) AS event_date,
    UPPER(TRIM(CAST(code_system AS TEXT))) AS code_system,
    REPLACE(REPLACE(UPPER(code), '.', ''), ' ', '') AS code,
    LOWER(TRIM(CAST(source AS TEXT))) AS source,
    CAST(NULL AS INT) AS duration_days
  FROM src_diagnoses
  UNION ALL
  SELECT
    patient_id,
    TRY_CAST(start_date AS DATE) AS event_date,
    'ATC' AS code_system,
    REPLACE(REPLACE(UPPER(atc), '.', ''), ' ', '') AS code,
    CAST(NULL AS TEXT) AS source,
    CAST(DATE_DIFF('DAY', TRY_CAST(start_date AS DATE), TRY_CAST(stop_date AS DATE)) + 1 AS INT) AS duration_days
  FROM src_prescriptions
) AS r
JOIN patient_base AS p
  ON p.patient_id = r.patient_id
WHERE
  r.event_date <= CAST('2019-12-31' AS DATE)
  AND (
    p.death_date IS NULL OR r.event_date <= p.death_date
  );

-- stage measurement_rows [view]: every measurement row parsed and converted, with the problem that stops its use
-- reads: src_measurements, patient_base
WITH read AS (
  SELECT
    patient_id,
    TRY_CAST(obs_date AS DATE) AS obs_date,
    LOWER(TRIM(CAST(measure AS TEXT))) AS measure,
    NULLIF(TRIM(CAST(value AS TEXT)), '') AS value_given,
    NULLIF(TRIM(CAST(value_text AS TEXT)), '') AS text_given,
    NULLIF(TRIM(CAST(unit AS TEXT)), '') AS unit_given
  FROM src_measurements
), split AS (
  SELECT
    *,
    NULLIF(
      REGEXP_EXTRACT(text_given, '^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$', 1),
      ''
    ) AS text_qualifier,
    NULLIF(
      REGEXP_EXTRACT(text_given, '^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$', 2),
      ''
    ) AS text_number,
    NULLIF(
      TRIM(REGEXP_EXTRACT(text_given, '^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$', 4)),
      ''
    ) AS text_unit
  FROM read
), parsed AS (
  SELECT
    patient_id,
    obs_date,
    measure,
    CASE
      WHEN NOT value_given IS NULL
      THEN TRY_CAST(value_given AS DOUBLE)
      WHEN text_number LIKE '%,%' AND REGEXP_MATCHES(text_number, '^[0-9]+,[0-9]{1,2}$')
      THEN TRY_CAST(REPLACE(text_number, ',', '.') AS DOUBLE)
      WHEN text_number LIKE '%,%'
      THEN NULL
      ELSE TRY_CAST(text_number AS DOUBLE)
    END AS reading,
    CASE WHEN value_given IS NULL THEN text_qualifier END AS qualifier,
    COALESCE(unit_given, CASE WHEN value_given IS NULL THEN text_unit END) AS unit,
    value_given IS NULL
    AND NOT text_unit IS NULL
    AND NOT unit_given IS NULL
    AND text_unit <> unit_given AS unit_conflict,
    value_given IS NULL AND text_given IS NULL AS empty,
    CASE WHEN value_given IS NULL THEN LOWER(text_given) END AS category
  FROM split
)
SELECT
  r.patient_id,
  r.obs_date,
  r.measure,
  r.qualifier,
  r.category,
  u.factor * r.reading / u.divisor + u.offset_value AS value,
  CASE
    WHEN p.patient_id IS NULL
    THEN 'orphan patient'
    WHEN r.obs_date IS NULL
    THEN 'unparseable date'
    WHEN r.obs_date > CAST('2019-12-31' AS DATE)
    THEN 'after end of data'
    WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
    THEN 'after death'
    WHEN k.measure IS NULL
    THEN 'unknown measure'
    WHEN k.is_coded
    AND (
      r.category IS NULL
      OR NOT (
        r.measure = 'smoking' AND r.category = 'current'
      )
      OR (
        r.measure = 'smoking' AND r.category = 'former'
      )
      OR (
        r.measure = 'smoking' AND r.category = 'never'
      )
    )
    THEN 'category not recognised'
    WHEN k.is_coded
    THEN NULL
    WHEN r.empty
    THEN 'no value'
    WHEN r.reading IS NULL
    THEN 'value not numeric'
    WHEN r.unit_conflict
    THEN 'unit differs from value_text'
    WHEN u.measure IS NULL
    THEN 'unit not convertible'
    WHEN NOT u.factor * r.reading / u.divisor + u.offset_value BETWEEN u.low AND u.high
    THEN 'implausible value'
  END AS problem
FROM parsed AS r
LEFT JOIN patient_base AS p
  ON p.patient_id = r.patient_id
LEFT JOIN (VALUES
  ('bmi', FALSE),
  ('creatinine', FALSE),
  ('dbp', FALSE),
  ('egfr', FALSE),
  ('fasting_glucose', FALSE),
  ('hba1c', FALSE),
  ('height', FALSE),
  ('ldl', FALSE),
  ('sbp', FALSE),
  ('smoking', TRUE),
  ('total_cholesterol', FALSE),
  ('weight', FALSE)) AS k(measure, is_coded)
  ON k.measure = r.measure
LEFT JOIN (VALUES
  ('bmi', 'kg/m2', 1.0, 1.0, 0.0, 10.0, 80.0),
  ('bmi', 'kg/m²', 1.0, 1.0, 0.0, 10.0, 80.0),
  ('bmi', 'kg/m^2', 1.0, 1.0, 0.0, 10.0, 80.0),
  ('creatinine', 'mg/dL', 1.0, 1.0, 0.0, 0.1, 20.0),
  ('creatinine', 'mg/dl', 1.0, 1.0, 0.0, 0.1, 20.0),
  ('creatinine', 'umol/L', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'µmol/L', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'μmol/L', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'umol/l', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'µmol/l', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('dbp', 'mmHg', 1.0, 1.0, 0.0, 20.0, 200.0),
  ('dbp', 'mm[Hg]', 1.0, 1.0, 0.0, 20.0, 200.0),
  ('dbp', 'mm Hg', 1.0, 1.0, 0.0, 20.0, 200.0),
  ('egfr', 'mL/min/1.73m2', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'mL/min/1.73 m2', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'mL/min/{1.73_m2}', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'ml/min/1.73m2', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'mL/min/1.73m²', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('fasting_glucose', 'mmol/L', 1.0, 1.0, 0.0, 1.0, 50.0),
  ('fasting_glucose', 'mmol/l', 1.0, 1.0, 0.0, 1.0, 50.0),
  ('fasting_glucose', 'mg/dL', 1.0, 18.0156, 0.0, 1.0, 50.0),
  ('fasting_glucose', 'mg/dl', 1.0, 18.0156, 0.0, 1.0, 50.0),
  ('hba1c', '%', 1.0, 1.0, 0.0, 3.0, 20.0),
  ('hba1c', '% Hb', 1.0, 1.0, 0.0, 3.0, 20.0),
  ('hba1c', '%{HbA1c}', 1.0, 1.0, 0.0, 3.0, 20.0),
  ('hba1c', 'mmol/mol', 0.09148, 1.0, 2.152, 3.0, 20.0),
  ('height', 'cm', 1.0, 1.0, 0.0, 40.0, 250.0),
  ('height', 'm', 100.0, 1.0, 0.0, 40.0, 250.0),
  ('height', 'mm', 1.0, 10.0, 0.0, 40.0, 250.0),
  ('ldl', 'mmol/L', 1.0, 1.0, 0.0, 0.2, 15.0),
  ('ldl', 'mmol/l', 1.0, 1.0, 0.0, 0.2, 15.0),
  ('ldl', 'mg/dL', 1.0, 38.67, 0.0, 0.2, 15.0),
  ('ldl', 'mg/dl', 1.0, 38.67, 0.0, 0.2, 15.0),
  ('sbp', 'mmHg', 1.0, 1.0, 0.0, 50.0, 300.0),
  ('sbp', 'mm[Hg]', 1.0, 1.0, 0.0, 50.0, 300.0),
  ('sbp', 'mm Hg', 1.0, 1.0, 0.0, 50.0, 300.0),
  ('total_cholesterol', 'mmol/L', 1.0, 1.0, 0.0, 1.0, 20.0),
  ('total_cholesterol', 'mmol/l', 1.0, 1.0, 0.0, 1.0, 20.0),
  ('total_cholesterol', 'mg/dL', 1.0, 38.67, 0.0, 1.0, 20.0),
  ('total_cholesterol', 'mg/dl', 1.0, 38.67, 0.0, 1.0, 20.0),
  ('weight', 'kg', 1.0, 1.0, 0.0, 2.0, 400.0),
  ('weight', 'g', 1.0, 1000.0, 0.0, 2.0, 400.0)) AS u(measure, unit, factor, divisor, offset_value, low, high)
  ON u.measure = r.measure AND u.unit = r.unit;

-- stage measurement_values [table]: usable values of the measures the study reads, in canonical units
-- reads: measurement_rows
SELECT
  patient_id,
  obs_date,
  measure,
  value,
  qualifier,
  category,
  FALSE AS derived
FROM measurement_rows
WHERE
  problem IS NULL AND measure IN ('creatinine', 'egfr', 'hba1c');

-- stage derived_egfr [table]: eGFR derived from creatinine by CKD-EPI 2021 where none was reported that day
-- reads: measurement_values, patient_base
SELECT
  patient_id,
  obs_date,
  'egfr' AS measure,
  egfr AS value,
  CAST(NULL AS TEXT) AS qualifier,
  CAST(NULL AS TEXT) AS category,
  TRUE AS derived
FROM (
  SELECT
    c.patient_id,
    c.obs_date,
    142 * POWER(LEAST(c.value / k.kappa, 1), k.alpha) * POWER(GREATEST(c.value / k.kappa, 1), -1.2) * POWER(
      0.9938,
      YEAR(c.obs_date) - YEAR(p.birth_date) - CASE
        WHEN MONTH(c.obs_date) * 100 + DAY(c.obs_date) < MONTH(p.birth_date) * 100 + DAY(p.birth_date)
        THEN 1
        ELSE 0
      END
    ) * k.female_factor AS egfr
  FROM measurement_values AS c
  JOIN patient_base AS p
    ON p.patient_id = c.patient_id
  JOIN (VALUES
    ('F', 0.7, -0.241, 1.012),
    ('M', 0.9, -0.302, 1.0)) AS k(sex, kappa, alpha, female_factor)
    ON k.sex = p.sex
  LEFT JOIN (
    SELECT DISTINCT
      patient_id,
      obs_date
    FROM measurement_values
    WHERE
      measure = 'egfr'
  ) AS r
    ON r.patient_id = c.patient_id AND r.obs_date = c.obs_date
  WHERE
    c.measure = 'creatinine'
    AND c.qualifier IS NULL
    AND r.patient_id IS NULL
    AND NOT p.birth_date IS NULL
) AS d
WHERE
  egfr BETWEEN 1.0 AND 200.0;

-- stage coded_evidence [table]: diagnosis and prescription rows matched to evidence by code prefix
-- reads: coded_events
SELECT
  patient_id,
  evidence,
  event_date,
  CAST(COUNT(*) AS INT) AS n_rows
FROM (
  SELECT
    e.patient_id,
    e.event_date,
    c.evidence
  FROM coded_events AS e
  CROSS JOIN (VALUES
    (3),
    (4)) AS l(prefix_length)
  JOIN (VALUES
    ('ATC', 'A10B', 'type2_diabetes.dm_drug', NULL, NULL, FALSE),
    ('ATC', 'C02', 'hypertension.antihypertensive', NULL, NULL, FALSE),
    ('ATC', 'C03', 'hypertension.antihypertensive', NULL, NULL, FALSE),
    ('ATC', 'C03C', 'heart_failure.loop_diuretic', NULL, NULL, FALSE),
    ('ATC', 'C07', 'hypertension.antihypertensive', NULL, NULL, FALSE),
    ('ATC', 'C08', 'hypertension.antihypertensive', NULL, NULL, FALSE),
    ('ATC', 'C09', 'hypertension.antihypertensive', NULL, NULL, FALSE),
    ('ICD10', 'E11', 'type2_diabetes.dm_code', NULL, NULL, FALSE),
    ('ICD10', 'I10', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD10', 'I11', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD10', 'I12', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD10', 'I13', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD10', 'I14', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD10', 'I15', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD10', 'I50', 'heart_failure.hf_code', NULL, NULL, FALSE),
    ('ICD10', 'N183', 'ckd.ckd_code', NULL, NULL, FALSE),
    ('ICD10', 'N184', 'ckd.ckd_code', NULL, NULL, FALSE),
    ('ICD10', 'N185', 'ckd.ckd_code', NULL, NULL, FALSE),
    ('ICD10', 'N186', 'ckd.ckd_code', NULL, NULL, FALSE),
    ('ICD9', '250', 'type2_diabetes.dm_code', NULL, NULL, FALSE),
    ('ICD9', '401', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD9', '402', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD9', '403', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD9', '404', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD9', '405', 'hypertension.htn_code', NULL, NULL, FALSE),
    ('ICD9', '428', 'heart_failure.hf_code', NULL, NULL, FALSE),
    ('ICD9', '5853', 'ckd.ckd_code', NULL, NULL, FALSE),
    ('ICD9', '5854', 'ckd.ckd_code', NULL, NULL, FALSE),
    ('ICD9', '5855', 'ckd.ckd_code', NULL, NULL, FALSE),
    ('ICD9', '5856', 'ckd.ckd_code', NULL, NULL, FALSE)) AS c(code_system, prefix, evidence, source, min_days, is_exclusion)
    ON c.code_system = e.code_system
    AND c.prefix = LEFT(e.code, l.prefix_length)
    AND (
      c.source IS NULL OR c.source = e.source
    )
    AND (
      c.min_days IS NULL OR e.duration_days >= c.min_days
    )
  GROUP BY
    e.patient_id,
    e.event_date,
    e.code_system,
    e.code,
    e.source,
    c.evidence
  HAVING
    NOT BOOL_OR(CAST(c.is_exclusion AS BOOLEAN))
) AS matched
GROUP BY
  patient_id,
  evidence,
  event_date;

-- stage evidence_events [table]: one row per patient, evidence and day, with the day number for windows
-- reads: coded_evidence, derived_egfr, measurement_values
SELECT
  patient_id,
  evidence,
  event_date,
  CAST(DATE_DIFF('DAY', CAST('1970-01-01' AS DATE), event_date) AS INT) AS day,
  CAST(SUM(n_rows) AS INT) AS n_rows
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    n_rows
  FROM coded_evidence
  UNION ALL
  SELECT
    patient_id,
    'type2_diabetes.a1c_high' AS evidence,
    obs_date AS event_date,
    CAST(COUNT(*) AS INT) AS n_rows
  FROM measurement_values
  WHERE
    measure = 'hba1c'
    AND CASE
      WHEN qualifier IS NULL
      THEN value >= 6.5
      WHEN qualifier = '>'
      THEN value >= 6.5
      WHEN qualifier = '>='
      THEN value >= 6.5
      ELSE FALSE
    END
  GROUP BY
    patient_id,
    obs_date
  UNION ALL
  SELECT
    patient_id,
    'ckd.egfr_low' AS evidence,
    obs_date AS event_date,
    CAST(COUNT(*) AS INT) AS n_rows
  FROM measurement_values
  WHERE
    measure = 'egfr'
    AND CASE
      WHEN qualifier IS NULL
      THEN value < 60.0
      WHEN qualifier = '<'
      THEN value <= 60.0
      WHEN qualifier = '<='
      THEN value < 60.0
      ELSE FALSE
    END
  GROUP BY
    patient_id,
    obs_date
  UNION ALL
  SELECT
    patient_id,
    'ckd.egfr_low' AS evidence,
    obs_date AS event_date,
    CAST(COUNT(*) AS INT) AS n_rows
  FROM derived_egfr
  WHERE
    measure = 'egfr'
    AND CASE
      WHEN qualifier IS NULL
      THEN value < 60.0
      WHEN qualifier = '<'
      THEN value <= 60.0
      WHEN qualifier = '<='
      THEN value < 60.0
      ELSE FALSE
    END
  GROUP BY
    patient_id,
    obs_date
) AS events
GROUP BY
  patient_id,
  evidence,
  event_date;

-- stage rules_type2_diabetes [table]: the first date each rule of type2_diabetes is met, per patient
-- reads: evidence_events
SELECT
  patient_id,
  'type2_diabetes' AS condition,
  'two diabetes codes' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'type2_diabetes.dm_code' THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN ('type2_diabetes.dm_code')
) AS counted
WHERE
  in_frame_0 >= 2
GROUP BY
  patient_id
UNION ALL
SELECT
  patient_id,
  'type2_diabetes' AS condition,
  'code and glucose-lowering drug' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'type2_diabetes.dm_code' THEN n_rows ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_0,
    SUM(CASE WHEN evidence = 'type2_diabetes.dm_drug' THEN n_rows ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_1
  FROM evidence_events
  WHERE
    evidence IN ('type2_diabetes.dm_code', 'type2_diabetes.dm_drug')
) AS counted
WHERE
  in_frame_0 >= 1 AND in_frame_1 >= 1
GROUP BY
  patient_id
UNION ALL
SELECT
  patient_id,
  'type2_diabetes' AS condition,
  'two high HbA1c results' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'type2_diabetes.a1c_high' THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN ('type2_diabetes.a1c_high')
) AS counted
WHERE
  in_frame_0 >= 2
GROUP BY
  patient_id;

-- stage onset_type2_diabetes [table]: onset of type2_diabetes: the earliest date any of its rules is met
-- reads: rules_type2_diabetes
SELECT
  patient_id,
  MIN(onset_date) AS onset_date
FROM rules_type2_diabetes
GROUP BY
  patient_id;

-- stage rules_ckd [table]: the first date each rule of ckd is met, per patient
-- reads: evidence_events
SELECT
  patient_id,
  'ckd' AS condition,
  'two low eGFR at least 90 days apart' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'ckd.egfr_low' THEN n_rows ELSE 0 END) OVER (
      PARTITION BY patient_id
      ORDER BY day
      RANGE BETWEEN UNBOUNDED PRECEDING AND 90 PRECEDING
    ) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN ('ckd.egfr_low')
) AS counted
WHERE
  evidence = 'ckd.egfr_low' AND in_frame_0 >= 1
GROUP BY
  patient_id
UNION ALL
SELECT
  patient_id,
  'ckd' AS condition,
  'two CKD stage 3-6 codes' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'ckd.ckd_code' THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN ('ckd.ckd_code')
) AS counted
WHERE
  in_frame_0 >= 2
GROUP BY
  patient_id;

-- stage onset_ckd [table]: onset of ckd: the earliest date any of its rules is met
-- reads: rules_ckd
SELECT
  patient_id,
  MIN(onset_date) AS onset_date
FROM rules_ckd
GROUP BY
  patient_id;

-- stage rules_heart_failure [table]: the first date each rule of heart_failure is met, per patient
-- reads: evidence_events
SELECT
  patient_id,
  'heart_failure' AS condition,
  'two heart failure codes' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'heart_failure.hf_code' THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN ('heart_failure.hf_code')
) AS counted
WHERE
  in_frame_0 >= 2
GROUP BY
  patient_id
UNION ALL
SELECT
  patient_id,
  'heart_failure' AS condition,
  'code and loop diuretic' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'heart_failure.hf_code' THEN n_rows ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_0,
    SUM(CASE WHEN evidence = 'heart_failure.loop_diuretic' THEN n_rows ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_1
  FROM evidence_events
  WHERE
    evidence IN ('heart_failure.hf_code', 'heart_failure.loop_diuretic')
) AS counted
WHERE
  in_frame_0 >= 1 AND in_frame_1 >= 1
GROUP BY
  patient_id;

-- stage onset_heart_failure [table]: onset of heart_failure: the earliest date any of its rules is met
-- reads: rules_heart_failure
SELECT
  patient_id,
  MIN(onset_date) AS onset_date
FROM rules_heart_failure
GROUP BY
  patient_id;

-- stage rules_hypertension [table]: the first date each rule of hypertension is met, per patient
-- reads: evidence_events
SELECT
  patient_id,
  'hypertension' AS condition,
  'two hypertension codes' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'hypertension.htn_code' THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN ('hypertension.htn_code')
) AS counted
WHERE
  in_frame_0 >= 2
GROUP BY
  patient_id
UNION ALL
SELECT
  patient_id,
  'hypertension' AS condition,
  'code and antihypertensive' AS rule,
  MIN(event_date) AS onset_date
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    SUM(CASE WHEN evidence = 'hypertension.antihypertensive' THEN n_rows ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_0,
    SUM(CASE WHEN evidence = 'hypertension.htn_code' THEN n_rows ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_1
  FROM evidence_events
  WHERE
    evidence IN ('hypertension.antihypertensive', 'hypertension.htn_code')
) AS counted
WHERE
  in_frame_0 >= 1 AND in_frame_1 >= 1
GROUP BY
  patient_id;

-- stage onset_hypertension [table]: onset of hypertension: the earliest date any of its rules is met
-- reads: rules_hypertension
SELECT
  patient_id,
  MIN(onset_date) AS onset_date
FROM rules_hypertension
GROUP BY
  patient_id;

-- stage condition_onsets [table]: each condition's onset per patient, one column per condition the table needs
-- reads: onset_type2_diabetes, onset_ckd, onset_heart_failure, onset_hypertension
SELECT
  patient_id,
  MIN(CASE WHEN condition = 'type2_diabetes' THEN onset_date END) AS onset_type2_diabetes,
  MIN(CASE WHEN condition = 'ckd' THEN onset_date END) AS onset_ckd,
  MIN(CASE WHEN condition = 'heart_failure' THEN onset_date END) AS onset_heart_failure,
  MIN(CASE WHEN condition = 'hypertension' THEN onset_date END) AS onset_hypertension
FROM (
  SELECT
    patient_id,
    'type2_diabetes' AS condition,
    onset_date
  FROM onset_type2_diabetes
  UNION ALL
  SELECT
    patient_id,
    'ckd' AS condition,
    onset_date
  FROM onset_ckd
  UNION ALL
  SELECT
    patient_id,
    'heart_failure' AS condition,
    onset_date
  FROM onset_heart_failure
  UNION ALL
  SELECT
    patient_id,
    'hypertension' AS condition,
    onset_date
  FROM onset_hypertension
) AS onsets
GROUP BY
  patient_id;

-- stage eligibility [table]: the source population with one pass/fail column per eligibility step
-- reads: encounter_summary, patient_base, condition_onsets
SELECT
  patient_id,
  sex,
  birth_date,
  death_date,
  index_date,
  first_encounter,
  last_encounter,
  age_at_index,
  onset_type2_diabetes,
  onset_ckd,
  onset_heart_failure,
  onset_hypertension,
  prevalent_type2_diabetes,
  prevalent_ckd,
  prevalent_heart_failure,
  COALESCE(sex IN ('F', 'M'), FALSE) AS step_1,
  COALESCE(death_date IS NULL OR death_date > index_date, FALSE) AS step_2,
  COALESCE(age_at_index BETWEEN 40 AND 85, FALSE) AS step_3,
  COALESCE(DATE_DIFF('DAY', first_encounter, index_date) >= 730, FALSE) AS step_4,
  COALESCE(
    NOT (
      prevalent_type2_diabetes AND prevalent_ckd AND prevalent_heart_failure
    ),
    FALSE
  ) AS step_5
FROM (
  SELECT
    patient_id,
    sex,
    birth_date,
    death_date,
    index_date,
    first_encounter,
    last_encounter,
    age_at_index,
    onset_type2_diabetes,
    onset_ckd,
    onset_heart_failure,
    onset_hypertension,
    COALESCE(NOT onset_type2_diabetes IS NULL AND onset_type2_diabetes <= index_date, FALSE) AS prevalent_type2_diabetes,
    COALESCE(NOT onset_ckd IS NULL AND onset_ckd <= index_date, FALSE) AS prevalent_ckd,
    COALESCE(NOT onset_heart_failure IS NULL AND onset_heart_failure <= index_date, FALSE) AS prevalent_heart_failure
  FROM (
    SELECT
      s.patient_id,
      s.sex,
      s.birth_date,
      s.death_date,
      s.index_date,
      s.first_encounter,
      s.last_encounter,
      s.age_at_index,
      o.onset_type2_diabetes,
      o.onset_ckd,
      o.onset_heart_failure,
      o.onset_hypertension
    FROM (
      SELECT
        s.patient_id,
        p.sex,
        p.birth_date,
        p.death_date,
        s.index_date,
        s.first_encounter,
        s.last_encounter,
        YEAR(s.index_date) - YEAR(p.birth_date) - CASE
          WHEN MONTH(s.index_date) * 100 + DAY(s.index_date) < MONTH(p.birth_date) * 100 + DAY(p.birth_date)
          THEN 1
          ELSE 0
        END AS age_at_index
      FROM encounter_summary AS s
      JOIN patient_base AS p
        ON p.patient_id = s.patient_id
      WHERE
        NOT s.index_date IS NULL
    ) AS s
    LEFT JOIN condition_onsets AS o
      ON o.patient_id = s.patient_id
  ) AS e
) AS v;

-- stage attrition [table]: patients before, removed and remaining at each eligibility step
-- reads: eligibility
WITH totals AS (
  SELECT
    COUNT(*) AS n_0,
    COALESCE(SUM(CASE WHEN step_1 THEN 1 ELSE 0 END), 0) AS n_1,
    COALESCE(SUM(CASE WHEN step_1 AND step_2 THEN 1 ELSE 0 END), 0) AS n_2,
    COALESCE(SUM(CASE WHEN (
      step_1 AND step_2
    ) AND step_3 THEN 1 ELSE 0 END), 0) AS n_3,
    COALESCE(
      SUM(
        CASE WHEN (
          (
            step_1 AND step_2
          ) AND step_3
        ) AND step_4 THEN 1 ELSE 0 END
      ),
      0
    ) AS n_4,
    COALESCE(
      SUM(
        CASE
          WHEN (
            (
              (
                step_1 AND step_2
              ) AND step_3
            ) AND step_4
          ) AND step_5
          THEN 1
          ELSE 0
        END
      ),
      0
    ) AS n_5
  FROM eligibility
)
SELECT
  CAST(step_number AS INT) AS step_number,
  step,
  description,
  CAST(patients_before AS BIGINT) AS patients_before,
  CAST(removed AS BIGINT) AS removed,
  CAST(remaining AS BIGINT) AS remaining
FROM (
  SELECT
    0 AS step_number,
    'source_population' AS step,
    'first encounter between 2015-01-01 and 2016-12-31' AS description,
    n_0 AS patients_before,
    0 AS removed,
    n_0 AS remaining
  FROM totals
  UNION ALL
  SELECT
    1,
    'sex',
    'sex recorded as F or M',
    n_0,
    n_0 - n_1,
    n_1
  FROM totals
  UNION ALL
  SELECT
    2,
    'alive_at_index',
    'alive at index (no death on or before the index date)',
    n_1,
    n_1 - n_2,
    n_2
  FROM totals
  UNION ALL
  SELECT
    3,
    'age',
    'age at index between 40 and 85 years',
    n_2,
    n_2 - n_3,
    n_3
  FROM totals
  UNION ALL
  SELECT
    4,
    'history',
    'first encounter at least 730 days before index',
    n_3,
    n_3 - n_4,
    n_4
  FROM totals
  UNION ALL
  SELECT
    5,
    'at_risk_any_outcome',
    'at risk of at least one outcome (not prevalent for all of type2_diabetes, ckd, heart_failure)',
    n_4,
    n_4 - n_5,
    n_5
  FROM totals
) AS steps;

-- stage cohort [table]: the analysis table: one row per eligible patient
-- reads: eligibility
SELECT
  patient_id,
  index_date,
  CAST(age_at_index AS INT) AS age_at_index,
  sex,
  COALESCE(NOT onset_hypertension IS NULL AND onset_hypertension <= index_date, FALSE) AS hypertension,
  prevalent_type2_diabetes AS prevalent_type2_diabetes,
  NOT prevalent_type2_diabetes AS at_risk_type2_diabetes,
  CASE
    WHEN prevalent_type2_diabetes
    THEN NULL
    ELSE COALESCE(onset_type2_diabetes > index_date AND onset_type2_diabetes <= followup_end, FALSE)
  END AS incident_type2_diabetes,
  onset_type2_diabetes AS onset_type2_diabetes,
  CAST(CASE
    WHEN NOT prevalent_type2_diabetes
    AND COALESCE(onset_type2_diabetes > index_date AND onset_type2_diabetes <= followup_end, FALSE)
    THEN DATE_DIFF('DAY', index_date, onset_type2_diabetes)
  END AS INT) AS days_to_type2_diabetes,
  prevalent_ckd AS prevalent_ckd,
  NOT prevalent_ckd AS at_risk_ckd,
  CASE
    WHEN prevalent_ckd
    THEN NULL
    ELSE COALESCE(onset_ckd > index_date AND onset_ckd <= followup_end, FALSE)
  END AS incident_ckd,
  onset_ckd AS onset_ckd,
  CAST(CASE
    WHEN NOT prevalent_ckd
    AND COALESCE(onset_ckd > index_date AND onset_ckd <= followup_end, FALSE)
    THEN DATE_DIFF('DAY', index_date, onset_ckd)
  END AS INT) AS days_to_ckd,
  prevalent_heart_failure AS prevalent_heart_failure,
  NOT prevalent_heart_failure AS at_risk_heart_failure,
  CASE
    WHEN prevalent_heart_failure
    THEN NULL
    ELSE COALESCE(onset_heart_failure > index_date AND onset_heart_failure <= followup_end, FALSE)
  END AS incident_heart_failure,
  onset_heart_failure AS onset_heart_failure,
  CAST(CASE
    WHEN NOT prevalent_heart_failure
    AND COALESCE(onset_heart_failure > index_date AND onset_heart_failure <= followup_end, FALSE)
    THEN DATE_DIFF('DAY', index_date, onset_heart_failure)
  END AS INT) AS days_to_heart_failure,
  followup_end,
  CAST(DATE_DIFF('DAY', index_date, followup_end) AS INT) AS followup_days,
  CASE
    WHEN death_date = followup_end
    THEN 'death'
    WHEN CAST('2019-12-31' AS DATE) = followup_end
    THEN 'end_of_data'
    WHEN CAST(last_encounter + INTERVAL 365 DAY AS DATE) = followup_end
    THEN 'lost_contact'
    WHEN CAST(index_date + INTERVAL 1461 DAY AS DATE) = followup_end
    THEN 'horizon'
  END AS end_reason
FROM (
  SELECT
    patient_id,
    sex,
    birth_date,
    death_date,
    index_date,
    first_encounter,
    last_encounter,
    age_at_index,
    onset_type2_diabetes,
    onset_ckd,
    onset_heart_failure,
    onset_hypertension,
    prevalent_type2_diabetes,
    prevalent_ckd,
    prevalent_heart_failure,
    LEAST(
      COALESCE(death_date, CAST('9999-12-31' AS DATE)),
      COALESCE(CAST('2019-12-31' AS DATE), CAST('9999-12-31' AS DATE)),
      COALESCE(CAST(last_encounter + INTERVAL 365 DAY AS DATE), CAST('9999-12-31' AS DATE)),
      COALESCE(CAST(index_date + INTERVAL 1461 DAY AS DATE), CAST('9999-12-31' AS DATE))
    ) AS followup_end
  FROM eligibility
  WHERE
    step_1 AND step_2 AND step_3 AND step_4 AND step_5
) AS f;
