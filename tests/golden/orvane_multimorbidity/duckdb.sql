-- plan for study orvane_multimorbidity (14 stages, dialect duckdb)

-- reads src_patients: patient_id, sex, death_date, birth_date, birth_year, practice_id

-- reads src_encounters: patient_id, encounter_date

-- reads src_diagnoses: patient_id, event_date, code_system, code, source

-- reads src_prescriptions: patient_id, start_date, atc

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

-- stage encounter_summary [table]: first and last usable encounter and the index date, one pass over encounters
-- reads: src_encounters, patient_base
SELECT
  e.patient_id,
  MIN(e.encounter_date) AS first_encounter,
  MAX(e.encounter_date) AS last_encounter,
  MIN(e.encounter_date) FILTER(WHERE
    e.encounter_date BETWEEN CAST('2015-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)) AS index_date
FROM (
  SELECT
    patient_id,
    TRY_CAST(encounter_date AS DATE) AS encounter_date
  FROM src_encounters
) AS e
JOIN patient_base AS p
  ON p.patient_id = e.patient_id
WHERE
  e.encounter_date <= CAST('2019-12-31' AS DATE)
  AND (
    p.death_date IS NULL OR e.encounter_date <= p.death_date
  )
GROUP BY
  e.patient_id;

-- stage coded_events [view]: usable diagnosis and prescription rows with normalised codes
-- reads: src_diagnoses, src_prescriptions, patient_base
SELECT
  r.patient_id,
  r.event_date,
  r.code_system,
  r.code,
  r.source
FROM (
  SELECT
    patient_id,
    TRY_CAST(event_date AS DATE) AS event_date,
    UPPER(TRIM(CAST(code_system AS TEXT))) AS code_system,
    REPLACE(REPLACE(UPPER(code), '.', ''), ' ', '') AS code,
    LOWER(TRIM(CAST(source AS TEXT))) AS source
  FROM src_diagnoses
  UNION ALL
  SELECT
    patient_id,
    TRY_CAST(start_date AS DATE) AS event_date,
    'ATC' AS code_system,
    REPLACE(REPLACE(UPPER(atc), '.', ''), ' ', '') AS code,
    CAST(NULL AS TEXT) AS source
  FROM src_prescriptions
) AS r
JOIN patient_base AS p
  ON p.patient_id = r.patient_id
WHERE
  r.event_date <= CAST('2019-12-31' AS DATE)
  AND (
    p.death_date IS NULL OR r.event_date <= p.death_date
  );

-- stage measurement_rows [view]: usable measurements of the measures the study needs, in canonical units
-- reads: src_measurements, patient_base
SELECT
  m.patient_id,
  m.obs_date,
  m.measure,
  u.factor * m.value / u.divisor + u.offset_value AS value,
  u.low,
  u.high
FROM (
  SELECT
    patient_id,
    TRY_CAST(obs_date AS DATE) AS obs_date,
    LOWER(TRIM(CAST(measure AS TEXT))) AS measure,
    CASE
      WHEN value IS NULL OR TRIM(CAST(value AS TEXT)) = ''
      THEN TRY_CAST(TRIM(CAST(value_text AS TEXT)) AS DOUBLE)
      ELSE TRY_CAST(value AS DOUBLE)
    END AS value,
    TRIM(CAST(unit AS TEXT)) AS unit
  FROM src_measurements
) AS m
JOIN (VALUES
  ('creatinine', 'mg/dL', 1.0, 1.0, 0.0, 0.1, 20.0),
  ('creatinine', 'mg/dl', 1.0, 1.0, 0.0, 0.1, 20.0),
  ('creatinine', 'umol/L', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'µmol/L', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'μmol/L', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'umol/l', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'µmol/l', 1.0, 88.42, 0.0, 0.1, 20.0),
  ('egfr', 'mL/min/1.73m2', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'mL/min/1.73 m2', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'mL/min/{1.73_m2}', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'ml/min/1.73m2', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('egfr', 'mL/min/1.73m²', 1.0, 1.0, 0.0, 1.0, 200.0),
  ('hba1c', '%', 1.0, 1.0, 0.0, 3.0, 20.0),
  ('hba1c', '% Hb', 1.0, 1.0, 0.0, 3.0, 20.0),
  ('hba1c', '%{HbA1c}', 1.0, 1.0, 0.0, 3.0, 20.0),
  ('hba1c', 'mmol/mol', 0.09148, 1.0, 2.152, 3.0, 20.0)) AS u(measure, unit, factor, divisor, offset_value, low, high)
  ON u.measure = m.measure AND u.unit = m.unit
JOIN patient_base AS p
  ON p.patient_id = m.patient_id
WHERE
  m.measure IN ('creatinine', 'egfr', 'hba1c')
  AND m.obs_date <= CAST('2019-12-31' AS DATE)
  AND (
    p.death_date IS NULL OR m.obs_date <= p.death_date
  )
  AND NOT m.value IS NULL;

-- stage measurement_values [table]: measurement values inside their plausibility range
-- reads: measurement_rows
SELECT
  patient_id,
  obs_date,
  measure,
  value,
  FALSE AS derived
FROM measurement_rows
WHERE
  value BETWEEN low AND high;

-- stage derived_egfr [table]: eGFR derived from creatinine by CKD-EPI 2021 where no eGFR was reported
-- reads: measurement_values, patient_base
SELECT
  patient_id,
  obs_date,
  'egfr' AS measure,
  egfr AS value,
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
    c.measure = 'creatinine' AND r.patient_id IS NULL AND NOT p.birth_date IS NULL
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
    ('ATC', 'A10B', 'type2_diabetes.dm_drug', NULL, FALSE),
    ('ATC', 'C03C', 'heart_failure.loop_diuretic', NULL, FALSE),
    ('ICD10', 'E11', 'type2_diabetes.dm_code', NULL, FALSE),
    ('ICD10', 'I50', 'heart_failure.hf_code', NULL, FALSE),
    ('ICD10', 'N183', 'ckd.ckd_code', NULL, FALSE),
    ('ICD10', 'N184', 'ckd.ckd_code', NULL, FALSE),
    ('ICD10', 'N185', 'ckd.ckd_code', NULL, FALSE),
    ('ICD10', 'N186', 'ckd.ckd_code', NULL, FALSE),
    ('ICD9', '250', 'type2_diabetes.dm_code', NULL, FALSE),
    ('ICD9', '428', 'heart_failure.hf_code', NULL, FALSE),
    ('ICD9', '5853', 'ckd.ckd_code', NULL, FALSE),
    ('ICD9', '5854', 'ckd.ckd_code', NULL, FALSE),
    ('ICD9', '5855', 'ckd.ckd_code', NULL, FALSE),
    ('ICD9', '5856', 'ckd.ckd_code', NULL, FALSE)) AS c(code_system, prefix, evidence, source, is_exclusion)
    ON c.code_system = e.code_system
    AND c.prefix = LEFT(e.code, l.prefix_length)
    AND (
      c.source IS NULL OR c.source = e.source
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
    measure = 'hba1c' AND value >= 6.5
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
    measure = 'egfr' AND value < 60.0
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
    measure = 'egfr' AND value < 60.0
  GROUP BY
    patient_id,
    obs_date
) AS events
GROUP BY
  patient_id,
  evidence,
  event_date;

-- stage rule_onsets [table]: the first date each rule of each condition is met, per patient
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
  patient_id
UNION ALL
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
  patient_id
UNION ALL
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

-- stage condition_onsets [table]: each condition's onset per patient (rule met, or first evidence once a rule is met)
-- reads: rule_onsets
SELECT
  patient_id,
  MIN(CASE WHEN condition = 'type2_diabetes' THEN onset_date END) AS onset_type2_diabetes,
  MIN(CASE WHEN condition = 'ckd' THEN onset_date END) AS onset_ckd,
  MIN(CASE WHEN condition = 'heart_failure' THEN onset_date END) AS onset_heart_failure
FROM (
  SELECT
    patient_id,
    condition,
    onset_date
  FROM rule_onsets
  WHERE
    condition IN ('type2_diabetes', 'ckd', 'heart_failure')
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
      o.onset_heart_failure
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
