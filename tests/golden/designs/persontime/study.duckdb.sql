-- plan for study design_persontime (36 stages, dialect duckdb)

-- reads src_patients: patient_id, sex, death_date, birth_date, birth_year, practice_id, registration_date, deregistration_date

-- reads src_encounters: patient_id, encounter_date, encounter_type

-- reads src_diagnoses: patient_id, event_date, code_system, code, source

-- reads src_prescriptions: patient_id, start_date, atc, stop_date

-- reads src_measurements: patient_id, obs_date, measure, unit, value, value_text

-- stage patients_judged [view]: every patients row judged once: used, or the reason the quality log gives
-- reads: src_patients
SELECT
  *,
  CASE
    WHEN NOT source_problem IS NULL
    THEN source_problem
    WHEN patient_id IS NULL
    THEN 'missing patient_id'
    WHEN (
      (
        COALESCE(TRIM(CAST(birth_date AS TEXT)), '') <> ''
        AND TRY_CAST(birth_date AS DATE) IS NULL
      )
      OR (
        COALESCE(TRIM(CAST(death_date AS TEXT)), '') <> ''
        AND TRY_CAST(death_date AS DATE) IS NULL
      )
      OR (
        COALESCE(TRIM(CAST(registration_date AS TEXT)), '') <> ''
        AND TRY_CAST(registration_date AS DATE) IS NULL
      )
      OR (
        COALESCE(TRIM(CAST(deregistration_date AS TEXT)), '') <> ''
        AND TRY_CAST(deregistration_date AS DATE) IS NULL
      )
    )
    THEN 'unparseable date'
    ELSE 'used'
  END AS reason
FROM (
  SELECT
    patient_id,
    sex,
    death_date,
    birth_date,
    birth_year,
    practice_id,
    registration_date,
    deregistration_date,
    source_problem,
    source_position
  FROM src_patients
) AS r;

-- stage patient_base [table]: one typed row per patient: birth date (1 July when only the year is known), sex; a patient with a written but unreadable date is left out
-- reads: patients_judged
SELECT DISTINCT
  patient_id,
  COALESCE(TRY_CAST(birth_date AS DATE), MAKE_DATE(TRY_CAST(birth_year AS INT), 7, 1)) AS birth_date,
  NULLIF(UPPER(TRIM(CAST(sex AS TEXT))), '') AS sex,
  TRY_CAST(death_date AS DATE) AS death_date,
  NULLIF(TRIM(CAST(practice_id AS TEXT)), '') AS practice_id,
  TRY_CAST(registration_date AS DATE) AS registration_date,
  TRY_CAST(deregistration_date AS DATE) AS deregistration_date
FROM patients_judged
WHERE
  reason = 'used';

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

-- stage encounters_judged [view]: every encounters row judged once: used, or the reason the quality log gives
-- reads: patient_base, src_encounters
SELECT
  *,
  COALESCE(record_problem, timing_problem, 'used') AS reason
FROM (
  SELECT
    r.*,
    CASE
      WHEN NOT r.source_problem IS NULL
      THEN r.source_problem
      WHEN p.patient_id IS NULL
      THEN 'orphan patient'
      WHEN r.row_date IS NULL
      THEN 'unparseable date'
    END AS record_problem,
    CASE
      WHEN r.row_date > CAST('2019-12-31' AS DATE)
      THEN 'after end of data'
      WHEN NOT p.death_date IS NULL AND r.row_date > p.death_date
      THEN 'after death'
    END AS timing_problem
  FROM (
    SELECT
      patient_id,
      encounter_date,
      encounter_type,
      source_problem,
      source_position,
      TRY_CAST(encounter_date AS DATE) AS row_date
    FROM src_encounters
  ) AS r
  LEFT JOIN patient_base AS p
    ON p.patient_id = r.patient_id
) AS j;

-- stage encounter_rows [view]: usable encounters: a readable date, a known patient, not after death or end of data
-- reads: encounters_judged
SELECT
  patient_id,
  row_date AS encounter_date,
  LOWER(TRIM(CAST(encounter_type AS TEXT))) AS encounter_type
FROM encounters_judged
WHERE
  reason = 'used';

-- stage encounter_summary [table]: first and last usable encounter per patient (and the first in the index window)
-- reads: encounter_rows
SELECT
  patient_id,
  MIN(encounter_date) AS first_encounter,
  MAX(encounter_date) AS last_encounter,
  MIN(
    CASE
      WHEN encounter_date BETWEEN CAST('2015-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
      THEN encounter_date
    END
  ) AS first_in_window
FROM encounter_rows
GROUP BY
  patient_id;

-- stage distinct_codes [table]: each distinct code of the extract, normalised, with what is wrong with it
-- reads: src_diagnoses, src_prescriptions
SELECT
  source_table,
  raw_system,
  raw_code,
  raw_source,
  code_system,
  code,
  source,
  CASE
    WHEN source_table = 'prescriptions'
    THEN CASE
      WHEN NOT REGEXP_MATCHES(COALESCE(code, ''), '^[A-Z]([0-9]{2}([A-Z]([A-Z]([0-9]{2})?)?)?)?$')
      THEN 'malformed code'
    END
    WHEN NOT COALESCE(code_system, '') IN ('ICD9', 'ICD10')
    THEN 'unknown code system'
    WHEN COALESCE(code_system, '') = 'ICD9'
    AND NOT REGEXP_MATCHES(
      COALESCE(code, ''),
      '^([0-9]{3}([0-9]{1,2})?|V[0-9]{2}([0-9]{1,2})?|E[0-9]{3}([0-9])?)$'
    )
    THEN 'malformed code'
    WHEN COALESCE(code_system, '') = 'ICD10'
    AND NOT REGEXP_MATCHES(COALESCE(code, ''), '^[A-Z][0-9][0-9A-Z]([0-9A-Z]{1,4})?$')
    THEN 'malformed code'
  END AS problem
FROM (
  SELECT
    source_table,
    raw_system,
    raw_code,
    raw_source,
    CASE WHEN source_table = 'prescriptions' THEN 'ATC' ELSE UPPER(TRIM(raw_system)) END AS code_system,
    REPLACE(REPLACE(UPPER(raw_code), '.', ''), ' ', '') AS code,
    LOWER(TRIM(raw_source)) AS source
  FROM (
    SELECT DISTINCT
      'diagnoses' AS source_table,
      CAST(code_system AS TEXT) AS raw_system,
      CAST(code AS TEXT) AS raw_code,
      CAST(source AS TEXT) AS raw_source
    FROM src_diagnoses
    UNION ALL
    SELECT DISTINCT
      'prescriptions' AS source_table,
      CAST(NULL AS TEXT) AS raw_system,
      CAST(atc AS TEXT) AS raw_code,
      CAST(NULL AS TEXT) AS raw_source
    FROM src_prescriptions
  ) AS found
) AS c;

-- stage diagnoses_judged [view]: every diagnoses row judged once: used, or the reason the quality log gives
-- reads: distinct_codes, patient_base, src_diagnoses
SELECT
  *,
  COALESCE(record_problem, code_problem, timing_problem, 'used') AS reason
FROM (
  SELECT
    r.*,
    CASE
      WHEN NOT r.source_problem IS NULL
      THEN r.source_problem
      WHEN p.patient_id IS NULL
      THEN 'orphan patient'
      WHEN r.row_date IS NULL
      THEN 'unparseable date'
    END AS record_problem,
    c.problem AS code_problem,
    CASE
      WHEN r.row_date > CAST('2019-12-31' AS DATE)
      THEN 'after end of data'
      WHEN NOT p.death_date IS NULL AND r.row_date > p.death_date
      THEN 'after death'
    END AS timing_problem
  FROM (
    SELECT
      patient_id,
      event_date,
      code_system,
      code,
      source,
      source_problem,
      source_position,
      TRY_CAST(event_date AS DATE) AS row_date,
      'diagnoses' AS source_table,
      CAST(code_system AS TEXT) AS raw_system,
      CAST(code AS TEXT) AS raw_code,
      CAST(source AS TEXT) AS raw_source,
      CAST(NULL AS INT) AS duration_days
    FROM src_diagnoses
  ) AS r
  LEFT JOIN patient_base AS p
    ON p.patient_id = r.patient_id
  LEFT JOIN distinct_codes AS c
    ON r.source_table = c.source_table
    AND r.raw_system IS NOT DISTINCT FROM c.raw_system
    AND r.raw_code IS NOT DISTINCT FROM c.raw_code
    AND r.raw_source IS NOT DISTINCT FROM c.raw_source
) AS j;

-- stage prescriptions_judged [view]: every prescriptions row judged once: used, or the reason the quality log gives
-- reads: distinct_codes, patient_base, src_prescriptions
SELECT
  *,
  COALESCE(record_problem, code_problem, timing_problem, 'used') AS reason
FROM (
  SELECT
    r.*,
    CASE
      WHEN NOT r.source_problem IS NULL
      THEN r.source_problem
      WHEN p.patient_id IS NULL
      THEN 'orphan patient'
      WHEN r.row_date IS NULL
      THEN 'unparseable date'
    END AS record_problem,
    c.problem AS code_problem,
    CASE
      WHEN r.row_date > CAST('2019-12-31' AS DATE)
      THEN 'after end of data'
      WHEN NOT p.death_date IS NULL AND r.row_date > p.death_date
      THEN 'after death'
    END AS timing_problem
  FROM (
    SELECT
      patient_id,
      start_date,
      atc,
      stop_date,
      source_problem,
      source_position,
      TRY_CAST(start_date AS DATE) AS row_date,
      'prescriptions' AS source_table,
      CAST(NULL AS TEXT) AS raw_system,
      CAST(atc AS TEXT) AS raw_code,
      CAST(NULL AS TEXT) AS raw_source,
      CAST(DATE_DIFF('DAY', TRY_CAST(start_date AS DATE), TRY_CAST(stop_date AS DATE)) + 1 AS INT) AS duration_days
    FROM src_prescriptions
  ) AS r
  LEFT JOIN patient_base AS p
    ON p.patient_id = r.patient_id
  LEFT JOIN distinct_codes AS c
    ON r.source_table = c.source_table
    AND r.raw_system IS NOT DISTINCT FROM c.raw_system
    AND r.raw_code IS NOT DISTINCT FROM c.raw_code
    AND r.raw_source IS NOT DISTINCT FROM c.raw_source
) AS j;

-- stage coded_rows [view]: usable diagnosis and prescription rows with their raw codes
-- reads: diagnoses_judged, prescriptions_judged
SELECT
  patient_id,
  row_date AS event_date,
  source_table,
  raw_system,
  raw_code,
  raw_source,
  duration_days
FROM diagnoses_judged
WHERE
  reason = 'used'
UNION ALL
SELECT
  patient_id,
  row_date AS event_date,
  source_table,
  raw_system,
  raw_code,
  raw_source,
  duration_days
FROM prescriptions_judged
WHERE
  reason = 'used';

-- stage measurement_shapes [table]: each distinct measure, unit, value and value_text of the extract parsed, converted and judged once
-- reads: src_measurements
WITH read AS (
  SELECT
    key_measure,
    key_unit,
    key_value,
    key_value_text,
    LOWER(TRIM(CAST(key_measure AS TEXT))) AS measure,
    TRY_CAST(key_value AS DOUBLE) AS value_number,
    CASE
      WHEN NOT TRY_CAST(key_value AS DOUBLE) IS NULL
      THEN FALSE
      ELSE NULLIF(TRIM(CAST(key_value AS TEXT)), '') IS NULL
    END AS value_missing,
    NULLIF(TRIM(CAST(key_value AS TEXT)), '') AS value_given,
    NULLIF(TRIM(CAST(key_value_text AS TEXT)), '') AS text_given,
    NULLIF(TRIM(CAST(key_unit AS TEXT)), '') AS unit_given
  FROM (
    SELECT DISTINCT
      measure AS key_measure,
      unit AS key_unit,
      value AS key_value,
      value_text AS key_value_text
    FROM src_measurements
  ) AS d
), split AS (
  SELECT
    *,
    CASE
      WHEN value_missing
      THEN NULLIF(
        REGEXP_EXTRACT(text_given, '^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$', 1),
        ''
      )
    END AS text_qualifier,
    CASE
      WHEN value_missing
      THEN NULLIF(
        REGEXP_EXTRACT(text_given, '^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$', 2),
        ''
      )
    END AS text_number,
    CASE
      WHEN value_missing
      THEN NULLIF(
        TRIM(REGEXP_EXTRACT(text_given, '^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$', 4)),
        ''
      )
    END AS text_unit
  FROM read
), parsed AS (
  SELECT
    key_measure,
    key_unit,
    key_value,
    key_value_text,
    measure,
    CASE
      WHEN NOT value_missing
      THEN value_number
      WHEN text_number LIKE '%,%' AND REGEXP_MATCHES(text_number, '^[0-9]+,[0-9]{1,2}$')
      THEN TRY_CAST(REPLACE(text_number, ',', '.') AS DOUBLE)
      WHEN text_number LIKE '%,%'
      THEN NULL
      ELSE TRY_CAST(text_number AS DOUBLE)
    END AS reading,
    CASE WHEN value_missing THEN text_qualifier END AS qualifier,
    COALESCE(unit_given, CASE WHEN value_missing THEN text_unit END) AS unit,
    value_missing
    AND NOT text_unit IS NULL
    AND NOT unit_given IS NULL
    AND text_unit <> unit_given AS unit_conflict,
    value_missing AND text_given IS NULL AS empty,
    CASE WHEN value_missing THEN LOWER(text_given) END AS category,
    value_given,
    text_given,
    unit_given
  FROM split
)
SELECT
  r.key_measure,
  r.key_unit,
  r.key_value,
  r.key_value_text,
  r.measure,
  r.qualifier,
  CASE WHEN k.is_coded THEN r.category END AS category,
  r.value_given AS raw_value,
  r.text_given AS raw_value_text,
  r.unit_given AS raw_unit,
  u.factor * r.reading / u.divisor + u.offset_value AS value,
  CASE
    WHEN k.measure IS NULL
    THEN 'unknown measure'
    WHEN k.is_coded
    AND (
      r.category IS NULL
      OR NOT (
        (
          r.measure = 'smoking' AND r.category = 'current'
        )
        OR (
          r.measure = 'smoking' AND r.category = 'former'
        )
        OR (
          r.measure = 'smoking' AND r.category = 'never'
        )
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
  ('creatinine', 'mmol/L', 1000.0, 88.42, 0.0, 0.1, 20.0),
  ('creatinine', 'mmol/l', 1000.0, 88.42, 0.0, 0.1, 20.0),
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
  ('height', '[in_i]', 2.54, 1.0, 0.0, 40.0, 250.0),
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
  ('weight', 'g', 1.0, 1000.0, 0.0, 2.0, 400.0),
  ('weight', '[lb_av]', 0.45359237, 1.0, 0.0, 2.0, 400.0)) AS u(measure, unit, factor, divisor, offset_value, low, high)
  ON u.measure = r.measure AND u.unit = r.unit;

-- stage measurement_rows [view]: every distinct measurement row with its shape's value and what stops its use
-- reads: measurement_shapes, patient_base, src_measurements
SELECT
  r.patient_id,
  r.obs_date,
  s.measure,
  s.qualifier,
  s.category,
  s.raw_value,
  s.raw_value_text,
  s.raw_unit,
  r.copies,
  r.source_position,
  r.source_problem,
  s.value,
  CASE
    WHEN NOT r.source_problem IS NULL
    THEN r.source_problem
    WHEN p.patient_id IS NULL
    THEN 'orphan patient'
    WHEN r.obs_date IS NULL
    THEN 'unparseable date'
  END AS record_problem,
  CASE
    WHEN r.obs_date > CAST('2019-12-31' AS DATE)
    THEN 'after end of data'
    WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
    THEN 'after death'
  END AS timing_problem,
  COALESCE(
    CASE
      WHEN NOT r.source_problem IS NULL
      THEN r.source_problem
      WHEN p.patient_id IS NULL
      THEN 'orphan patient'
      WHEN r.obs_date IS NULL
      THEN 'unparseable date'
    END,
    CASE
      WHEN r.obs_date > CAST('2019-12-31' AS DATE)
      THEN 'after end of data'
      WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
      THEN 'after death'
    END,
    s.problem
  ) AS problem
FROM (
  SELECT
    patient_id,
    TRY_CAST(obs_date AS DATE) AS obs_date,
    measure,
    unit,
    value,
    value_text,
    copies,
    source_position,
    source_problem
  FROM (
    SELECT
      patient_id,
      obs_date,
      measure,
      unit,
      value,
      value_text,
      source_problem,
      MIN(source_position) AS source_position,
      COUNT(*) AS copies
    FROM src_measurements
    GROUP BY
      patient_id,
      obs_date,
      measure,
      unit,
      value,
      value_text,
      source_problem
  ) AS g
) AS r
LEFT JOIN patient_base AS p
  ON p.patient_id = r.patient_id
LEFT JOIN measurement_shapes AS s
  ON s.key_measure IS NOT DISTINCT FROM r.measure
  AND s.key_unit IS NOT DISTINCT FROM r.unit
  AND s.key_value IS NOT DISTINCT FROM r.value
  AND s.key_value_text IS NOT DISTINCT FROM r.value_text;

-- stage measurements_judged [view]: every measurement row once, parsed, converted and judged: quality log and contact
-- reads: measurement_shapes, patient_base, src_measurements
SELECT
  patient_id,
  obs_date,
  measure,
  value,
  qualifier,
  category,
  copies,
  source_position,
  source_problem,
  record_problem,
  timing_problem,
  problem
FROM (
  SELECT
    r.patient_id,
    r.obs_date,
    s.measure,
    s.qualifier,
    s.category,
    s.raw_value,
    s.raw_value_text,
    s.raw_unit,
    r.copies,
    r.source_position,
    r.source_problem,
    s.value,
    CASE
      WHEN NOT r.source_problem IS NULL
      THEN r.source_problem
      WHEN p.patient_id IS NULL
      THEN 'orphan patient'
      WHEN r.obs_date IS NULL
      THEN 'unparseable date'
    END AS record_problem,
    CASE
      WHEN r.obs_date > CAST('2019-12-31' AS DATE)
      THEN 'after end of data'
      WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
      THEN 'after death'
    END AS timing_problem,
    COALESCE(
      CASE
        WHEN NOT r.source_problem IS NULL
        THEN r.source_problem
        WHEN p.patient_id IS NULL
        THEN 'orphan patient'
        WHEN r.obs_date IS NULL
        THEN 'unparseable date'
      END,
      CASE
        WHEN r.obs_date > CAST('2019-12-31' AS DATE)
        THEN 'after end of data'
        WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
        THEN 'after death'
      END,
      s.problem
    ) AS problem
  FROM (
    SELECT
      patient_id,
      TRY_CAST(obs_date AS DATE) AS obs_date,
      measure,
      unit,
      value,
      value_text,
      copies,
      source_position,
      source_problem
    FROM (
      SELECT
        patient_id,
        obs_date,
        measure,
        unit,
        value,
        value_text,
        source_problem,
        source_position,
        1 AS copies
      FROM src_measurements
    ) AS g
  ) AS r
  LEFT JOIN patient_base AS p
    ON p.patient_id = r.patient_id
  LEFT JOIN measurement_shapes AS s
    ON s.key_measure IS NOT DISTINCT FROM r.measure
    AND s.key_unit IS NOT DISTINCT FROM r.unit
    AND s.key_value IS NOT DISTINCT FROM r.value
    AND s.key_value_text IS NOT DISTINCT FROM r.value_text
) AS j;

-- stage measurement_copies [table]: the distinct measurement rows whose hash another row shares (the only ones that can have exact copies), with their copies
-- reads: src_measurements
SELECT
  patient_id,
  obs_date,
  measure,
  unit,
  value,
  value_text,
  source_problem,
  MIN(source_position) AS source_position,
  COUNT(*) AS copies
FROM (
  SELECT
    patient_id,
    obs_date,
    measure,
    unit,
    value,
    value_text,
    source_problem,
    source_position
  FROM src_measurements
  WHERE
    HASH(patient_id, obs_date, measure, unit, value, value_text, source_problem) IN (
      SELECT
        HASH(patient_id, obs_date, measure, unit, value, value_text, source_problem) AS row_hash
      FROM src_measurements
      GROUP BY
        HASH(patient_id, obs_date, measure, unit, value, value_text, source_problem)
      HAVING
        COUNT(*) > 1
    )
) AS h
GROUP BY
  patient_id,
  obs_date,
  measure,
  unit,
  value,
  value_text,
  source_problem
HAVING
  COUNT(*) > 1;

-- stage measurement_values [table]: usable values some stage can read, in canonical units: those that are evidence, those near a possible index date, and what derived values need
-- reads: measurement_copies, measurement_shapes, patient_base, src_measurements
SELECT
  patient_id,
  obs_date,
  measure,
  value,
  qualifier,
  category,
  FALSE AS derived
FROM (
  SELECT
    u.*
  FROM (
    SELECT
      r.patient_id,
      r.obs_date,
      s.measure,
      s.value,
      s.qualifier,
      s.category,
      r.raw_date,
      s.key_measure,
      s.key_unit,
      s.key_value,
      s.key_value_text,
      r.source_problem
    FROM (
      SELECT
        patient_id,
        obs_date AS raw_date,
        TRY_CAST(obs_date AS DATE) AS obs_date,
        measure,
        unit,
        value,
        value_text,
        source_problem
      FROM src_measurements
    ) AS r
    JOIN (
      SELECT
        key_measure,
        key_unit,
        key_value,
        key_value_text,
        measure,
        value,
        qualifier,
        category
      FROM measurement_shapes
      WHERE
        problem IS NULL AND measure IN ('hba1c')
    ) AS s
      ON s.key_measure IS NOT DISTINCT FROM r.measure
      AND s.key_unit IS NOT DISTINCT FROM r.unit
      AND s.key_value IS NOT DISTINCT FROM r.value
      AND s.key_value_text IS NOT DISTINCT FROM r.value_text
    LEFT JOIN patient_base AS p
      ON p.patient_id = r.patient_id
    WHERE
      CASE
        WHEN NOT r.source_problem IS NULL
        THEN r.source_problem
        WHEN p.patient_id IS NULL
        THEN 'orphan patient'
        WHEN r.obs_date IS NULL
        THEN 'unparseable date'
      END IS NULL
      AND CASE
        WHEN r.obs_date > CAST('2019-12-31' AS DATE)
        THEN 'after end of data'
        WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
        THEN 'after death'
      END IS NULL
  ) AS u
  LEFT JOIN measurement_copies AS c
    ON c.patient_id IS NOT DISTINCT FROM u.patient_id
    AND c.obs_date IS NOT DISTINCT FROM u.raw_date
    AND c.measure IS NOT DISTINCT FROM u.key_measure
    AND c.unit IS NOT DISTINCT FROM u.key_unit
    AND c.value IS NOT DISTINCT FROM u.key_value
    AND c.value_text IS NOT DISTINCT FROM u.key_value_text
    AND c.source_problem IS NOT DISTINCT FROM u.source_problem
  WHERE
    c.copies IS NULL
) AS u
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
UNION ALL
SELECT
  patient_id,
  obs_date,
  measure,
  value,
  qualifier,
  category,
  FALSE AS derived
FROM (
  SELECT
    r.patient_id,
    r.obs_date,
    s.measure,
    s.value,
    s.qualifier,
    s.category,
    r.raw_date,
    s.key_measure,
    s.key_unit,
    s.key_value,
    s.key_value_text,
    r.source_problem
  FROM (
    SELECT
      patient_id,
      obs_date AS raw_date,
      TRY_CAST(obs_date AS DATE) AS obs_date,
      measure,
      unit,
      value,
      value_text,
      source_problem
    FROM measurement_copies
  ) AS r
  JOIN (
    SELECT
      key_measure,
      key_unit,
      key_value,
      key_value_text,
      measure,
      value,
      qualifier,
      category
    FROM measurement_shapes
    WHERE
      problem IS NULL AND measure IN ('hba1c')
  ) AS s
    ON s.key_measure IS NOT DISTINCT FROM r.measure
    AND s.key_unit IS NOT DISTINCT FROM r.unit
    AND s.key_value IS NOT DISTINCT FROM r.value
    AND s.key_value_text IS NOT DISTINCT FROM r.value_text
  LEFT JOIN patient_base AS p
    ON p.patient_id = r.patient_id
  WHERE
    CASE
      WHEN NOT r.source_problem IS NULL
      THEN r.source_problem
      WHEN p.patient_id IS NULL
      THEN 'orphan patient'
      WHEN r.obs_date IS NULL
      THEN 'unparseable date'
    END IS NULL
    AND CASE
      WHEN r.obs_date > CAST('2019-12-31' AS DATE)
      THEN 'after end of data'
      WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
      THEN 'after death'
    END IS NULL
) AS u
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
  END;

-- stage codes_to_evidence [table]: each distinct extract code with the evidence it matches or is excluded from
-- reads: distinct_codes
SELECT
  c.source_table,
  c.raw_system,
  c.raw_code,
  c.raw_source,
  c.code_system,
  c.code,
  c.source,
  m.evidence,
  BOOL_OR(CAST(NOT m.is_exclusion AS BOOLEAN)) AS included,
  BOOL_OR(CAST(m.is_exclusion AS BOOLEAN)) AS excluded,
  CASE
    WHEN BOOL_OR(CAST(NOT m.is_exclusion AND m.min_days IS NULL AS BOOLEAN))
    THEN NULL
    ELSE MIN(CASE WHEN NOT m.is_exclusion THEN m.min_days END)
  END AS min_days
FROM distinct_codes AS c
CROSS JOIN (VALUES
  (3),
  (4),
  (5)) AS l(prefix_length)
JOIN (VALUES
  ('ATC', 'A10B', 872629348, NULL, NULL, FALSE),
  ('ATC', 'C03C', 2082671494, NULL, NULL, FALSE),
  ('ICD10', 'E11', 16584386, NULL, NULL, FALSE),
  ('ICD10', 'I110', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I130', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I132', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I50', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '250', 16584386, NULL, NULL, FALSE),
  ('ICD9', '25001', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25003', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25011', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25013', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25021', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25023', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25031', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25033', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25041', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25043', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25051', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25053', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25061', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25063', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25071', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25073', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25081', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25083', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25091', 16584386, NULL, NULL, TRUE),
  ('ICD9', '25093', 16584386, NULL, NULL, TRUE),
  ('ICD9', '40201', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40211', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40291', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40401', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40403', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40411', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40413', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40491', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40493', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '428', 2055434026, NULL, NULL, FALSE)) AS m(code_system, prefix, evidence, source, min_days, is_exclusion)
  ON m.code_system = c.code_system
  AND m.prefix = LEFT(c.code, l.prefix_length)
  AND (
    m.source IS NULL OR m.source = c.source
  )
WHERE
  c.problem IS NULL
GROUP BY
  c.source_table,
  c.raw_system,
  c.raw_code,
  c.raw_source,
  c.code_system,
  c.code,
  c.source,
  m.evidence;

-- stage coded_row_evidence [view]: each usable diagnosis or prescription row with the evidence its code matches
-- reads: coded_rows, codes_to_evidence
SELECT DISTINCT
  e.patient_id,
  e.event_date,
  m.code_system,
  m.code,
  e.raw_code,
  m.source,
  e.duration_days,
  m.evidence,
  m.excluded OR NOT m.included AS excluded
FROM coded_rows AS e
JOIN codes_to_evidence AS m
  ON e.source_table = m.source_table
  AND e.raw_system IS NOT DISTINCT FROM m.raw_system
  AND e.raw_code IS NOT DISTINCT FROM m.raw_code
  AND e.raw_source IS NOT DISTINCT FROM m.raw_source
WHERE
  m.excluded OR m.min_days IS NULL OR e.duration_days >= m.min_days;

-- stage coded_evidence_days [view]: matched rows counted per patient, evidence and day (kept only in evidence_events)
-- reads: coded_row_evidence
SELECT
  patient_id,
  evidence,
  event_date,
  CAST(COUNT(*) AS INT) AS n_rows
FROM (
  SELECT
    patient_id,
    event_date,
    evidence
  FROM coded_row_evidence
  WHERE
    NOT excluded
) AS m
GROUP BY
  patient_id,
  evidence,
  event_date;

-- stage evidence_events [table]: one row per patient, evidence and day, with the day number for windows
-- reads: coded_evidence_days, measurement_values
SELECT
  patient_id,
  evidence,
  event_date,
  CAST(DATE_DIFF('DAY', CAST('1970-01-01' AS DATE), event_date) AS INT) AS day,
  CAST(n_rows AS INT) AS n_rows
FROM (
  SELECT
    patient_id,
    evidence,
    event_date,
    n_rows
  FROM coded_evidence_days
  UNION ALL
  SELECT
    patient_id,
    2017758955 /* type2_diabetes.a1c_high */ AS evidence,
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
) AS events;

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
    SUM(CASE WHEN evidence = 2055434026 /* heart_failure.hf_code */ THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN (2055434026 /* heart_failure.hf_code */)
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
    SUM(
      CASE WHEN evidence = 2055434026 /* heart_failure.hf_code */ THEN n_rows ELSE 0 END
    ) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_0,
    SUM(
      CASE
        WHEN evidence = 2082671494 /* heart_failure.loop_diuretic */
        THEN n_rows
        ELSE 0
      END
    ) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_1
  FROM evidence_events
  WHERE
    evidence IN (
      2055434026, /* heart_failure.hf_code */
      2082671494 /* heart_failure.loop_diuretic */
    )
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
    SUM(CASE WHEN evidence = 16584386 /* type2_diabetes.dm_code */ THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN (16584386 /* type2_diabetes.dm_code */)
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
    SUM(
      CASE WHEN evidence = 16584386 /* type2_diabetes.dm_code */ THEN n_rows ELSE 0 END
    ) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_0,
    SUM(
      CASE WHEN evidence = 872629348 /* type2_diabetes.dm_drug */ THEN n_rows ELSE 0 END
    ) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 365 PRECEDING AND CURRENT ROW) AS in_frame_1
  FROM evidence_events
  WHERE
    evidence IN (16584386, /* type2_diabetes.dm_code */872629348 /* type2_diabetes.dm_drug */)
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
    SUM(CASE WHEN evidence = 2017758955 /* type2_diabetes.a1c_high */ THEN 1 ELSE 0 END) OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN 730 PRECEDING AND CURRENT ROW) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN (2017758955 /* type2_diabetes.a1c_high */)
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

-- stage condition_onsets [table]: each condition's onset per patient, one column per condition the table needs
-- reads: onset_heart_failure, onset_type2_diabetes
SELECT
  patient_id,
  MIN(CASE WHEN condition = 'heart_failure' THEN onset_date END) AS onset_heart_failure,
  MIN(CASE WHEN condition = 'type2_diabetes' THEN onset_date END) AS onset_type2_diabetes
FROM (
  SELECT
    patient_id,
    'heart_failure' AS condition,
    onset_date
  FROM onset_heart_failure
  UNION ALL
  SELECT
    patient_id,
    'type2_diabetes' AS condition,
    onset_date
  FROM onset_type2_diabetes
) AS onsets
GROUP BY
  patient_id;

-- stage index_dates [table]: index: the first encounter between 2015-01-01 and 2016-12-31
-- reads: encounter_summary
SELECT
  patient_id,
  first_in_window AS index_date
FROM encounter_summary
WHERE
  NOT first_in_window IS NULL;

-- stage eligibility [table]: the source population with follow-up and one pass/fail column per eligibility step
-- reads: condition_onsets, encounter_summary, index_dates, patient_base
SELECT
  patient_id,
  sex,
  birth_date,
  death_date,
  practice_id,
  registration_date,
  deregistration_date,
  index_date,
  first_encounter,
  last_encounter,
  age_at_index,
  onset_heart_failure,
  onset_type2_diabetes,
  prevalent_heart_failure,
  prevalent_type2_diabetes,
  horizon_end,
  followup_end,
  end_reason,
  COALESCE(sex IN ('F', 'M'), FALSE) AS step_1,
  COALESCE(death_date IS NULL OR death_date > index_date, FALSE) AS step_2,
  COALESCE(age_at_index BETWEEN 40 AND 85, FALSE) AS step_3
FROM (
  SELECT
    *,
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
      *,
      CAST(index_date + INTERVAL 1461 DAY AS DATE) AS horizon_end,
      LEAST(
        COALESCE(death_date, CAST('9999-12-31' AS DATE)),
        COALESCE(CAST('2019-12-31' AS DATE), CAST('9999-12-31' AS DATE)),
        COALESCE(CAST(last_encounter + INTERVAL 365 DAY AS DATE), CAST('9999-12-31' AS DATE)),
        COALESCE(CAST(index_date + INTERVAL 1461 DAY AS DATE), CAST('9999-12-31' AS DATE))
      ) AS followup_end
    FROM (
      SELECT
        *,
        COALESCE(NOT onset_heart_failure IS NULL AND onset_heart_failure <= index_date, FALSE) AS prevalent_heart_failure,
        COALESCE(NOT onset_type2_diabetes IS NULL AND onset_type2_diabetes <= index_date, FALSE) AS prevalent_type2_diabetes
      FROM (
        SELECT
          i.patient_id,
          p.sex,
          p.birth_date,
          p.death_date,
          p.practice_id,
          p.registration_date,
          p.deregistration_date,
          i.index_date,
          s.first_encounter,
          s.last_encounter,
          YEAR(i.index_date) - YEAR(p.birth_date) - CASE
            WHEN MONTH(i.index_date) * 100 + DAY(i.index_date) < MONTH(p.birth_date) * 100 + DAY(p.birth_date)
            THEN 1
            ELSE 0
          END AS age_at_index,
          o.onset_heart_failure,
          o.onset_type2_diabetes
        FROM index_dates AS i
        JOIN patient_base AS p
          ON p.patient_id = i.patient_id
        JOIN encounter_summary AS s
          ON s.patient_id = i.patient_id
        LEFT JOIN condition_onsets AS o
          ON o.patient_id = i.patient_id
      ) AS b
    ) AS v
  ) AS fu
) AS f;

-- stage attrition [table]: patients in the extract, without an index date, and at each eligibility step
-- reads: eligibility, patient_base
WITH totals AS (
  SELECT
    COUNT(*) AS n_0,
    (
      SELECT
        COUNT(*)
      FROM patient_base
    ) AS n_all,
    COALESCE(SUM(CASE WHEN step_1 THEN 1 ELSE 0 END), 0) AS n_1,
    COALESCE(SUM(CASE WHEN step_1 AND step_2 THEN 1 ELSE 0 END), 0) AS n_2,
    COALESCE(SUM(CASE WHEN (
      step_1 AND step_2
    ) AND step_3 THEN 1 ELSE 0 END), 0) AS n_3
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
    -2 AS step_number,
    'patients_in_extract' AS step,
    'patients in the extract' AS description,
    n_all AS patients_before,
    0 AS removed,
    n_all AS remaining
  FROM totals
  UNION ALL
  SELECT
    -1,
    'without_index_date',
    'without an index date',
    n_all,
    n_all - n_0,
    n_0
  FROM totals
  UNION ALL
  SELECT
    0,
    'source_population',
    'the first encounter between 2015-01-01 and 2016-12-31',
    n_0,
    0,
    n_0
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
) AS steps;

-- stage population [table]: the source population with the first eligibility step each patient failed
-- reads: eligibility
SELECT
  patient_id,
  index_date,
  CASE
    WHEN NOT step_1
    THEN 'sex'
    WHEN NOT step_2
    THEN 'alive_at_index'
    WHEN NOT step_3
    THEN 'age'
  END AS excluded_at
FROM eligibility;

-- stage cohort [table]: the analysis table: one row per eligible patient
-- reads: eligibility
SELECT
  f.patient_id,
  f.index_date,
  CAST(f.age_at_index AS INT) AS age_at_index,
  f.sex,
  f.prevalent_heart_failure AS prevalent_heart_failure,
  NOT f.prevalent_heart_failure AS at_risk_heart_failure,
  CASE
    WHEN NOT f.prevalent_heart_failure
    THEN COALESCE(
      f.onset_heart_failure > f.index_date AND f.onset_heart_failure <= f.followup_end,
      FALSE
    )
  END AS incident_heart_failure,
  f.onset_heart_failure AS onset_heart_failure,
  CAST(CASE
    WHEN NOT f.prevalent_heart_failure
    AND COALESCE(
      f.onset_heart_failure > f.index_date AND f.onset_heart_failure <= f.followup_end,
      FALSE
    )
    THEN DATE_DIFF('DAY', f.index_date, f.onset_heart_failure)
  END AS INT) AS days_to_heart_failure,
  CAST(CASE
    WHEN NOT f.prevalent_heart_failure
    AND COALESCE(
      f.onset_heart_failure > f.index_date AND f.onset_heart_failure <= f.followup_end,
      FALSE
    )
    THEN DATE_DIFF('DAY', f.index_date, f.onset_heart_failure)
    WHEN NOT f.prevalent_heart_failure
    THEN DATE_DIFF('DAY', f.index_date, f.followup_end)
  END AS INT) AS time_heart_failure,
  CAST(CASE
    WHEN NOT f.prevalent_heart_failure
    AND COALESCE(
      f.onset_heart_failure > f.index_date AND f.onset_heart_failure <= f.followup_end,
      FALSE
    )
    THEN 1
    WHEN NOT f.prevalent_heart_failure AND f.end_reason = 'death'
    THEN 2
    WHEN NOT f.prevalent_heart_failure
    THEN 0
  END AS INT) AS event_heart_failure,
  f.prevalent_type2_diabetes AS prevalent_type2_diabetes,
  NOT f.prevalent_type2_diabetes AS at_risk_type2_diabetes,
  CASE
    WHEN NOT f.prevalent_type2_diabetes
    THEN COALESCE(
      f.onset_type2_diabetes > f.index_date
      AND f.onset_type2_diabetes <= f.followup_end,
      FALSE
    )
  END AS incident_type2_diabetes,
  f.onset_type2_diabetes AS onset_type2_diabetes,
  CAST(CASE
    WHEN NOT f.prevalent_type2_diabetes
    AND COALESCE(
      f.onset_type2_diabetes > f.index_date
      AND f.onset_type2_diabetes <= f.followup_end,
      FALSE
    )
    THEN DATE_DIFF('DAY', f.index_date, f.onset_type2_diabetes)
  END AS INT) AS days_to_type2_diabetes,
  CAST(CASE
    WHEN NOT f.prevalent_type2_diabetes
    AND COALESCE(
      f.onset_type2_diabetes > f.index_date
      AND f.onset_type2_diabetes <= f.followup_end,
      FALSE
    )
    THEN DATE_DIFF('DAY', f.index_date, f.onset_type2_diabetes)
    WHEN NOT f.prevalent_type2_diabetes
    THEN DATE_DIFF('DAY', f.index_date, f.followup_end)
  END AS INT) AS time_type2_diabetes,
  CAST(CASE
    WHEN NOT f.prevalent_type2_diabetes
    AND COALESCE(
      f.onset_type2_diabetes > f.index_date
      AND f.onset_type2_diabetes <= f.followup_end,
      FALSE
    )
    THEN 1
    WHEN NOT f.prevalent_type2_diabetes AND f.end_reason = 'death'
    THEN 2
    WHEN NOT f.prevalent_type2_diabetes
    THEN 0
  END AS INT) AS event_type2_diabetes,
  f.followup_end,
  CAST(DATE_DIFF('DAY', f.index_date, f.followup_end) AS INT) AS followup_days,
  f.end_reason
FROM eligibility AS f
WHERE
  f.step_1 AND f.step_2 AND f.step_3;

-- stage followup_not_negative [check]: no patient of the cohort may have follow-up ending before the index date
-- reads: cohort
SELECT
  patient_id,
  index_date,
  followup_end,
  end_reason
FROM cohort
WHERE
  followup_days < 0
ORDER BY
  patient_id
LIMIT 5;

-- stage rows_read [table]: rows read per extract table, counted on their own to check the quality log
-- reads: src_diagnoses, src_encounters, src_measurements, src_patients, src_prescriptions
SELECT
  'patients' AS source_table,
  CAST(COUNT(*) AS BIGINT) AS n_rows
FROM src_patients
UNION ALL
SELECT
  'encounters' AS source_table,
  CAST(COUNT(*) AS BIGINT) AS n_rows
FROM src_encounters
UNION ALL
SELECT
  'diagnoses' AS source_table,
  CAST(COUNT(*) AS BIGINT) AS n_rows
FROM src_diagnoses
UNION ALL
SELECT
  'prescriptions' AS source_table,
  CAST(COUNT(*) AS BIGINT) AS n_rows
FROM src_prescriptions
UNION ALL
SELECT
  'measurements' AS source_table,
  CAST(COUNT(*) AS BIGINT) AS n_rows
FROM src_measurements;

-- stage quality_log [table]: every extract row: used, or set aside with the first reason that applies
-- reads: diagnoses_judged, distinct_codes, encounters_judged, measurement_copies, measurement_shapes, measurements_judged, patient_base, patients_judged, prescriptions_judged, src_diagnoses, src_encounters, src_patients, src_prescriptions
WITH summary AS (
  SELECT
    reason,
    'patients' AS source_table,
    SUM(n_rows) - SUM(duplicates) AS distinct_rows,
    SUM(duplicates) AS duplicates,
    MIN(CASE WHEN reason <> 'used' THEN source_position END) AS first_position
  FROM (
    SELECT
      reason,
      1 AS n_rows,
      0 AS duplicates,
      source_position
    FROM patients_judged
    UNION ALL
    SELECT
      reason,
      0 AS n_rows,
      CASE
        WHEN patient_id IS NULL OR NOT source_problem IS NULL
        THEN 0
        ELSE copies - 1
      END AS duplicates,
      CAST(NULL AS BIGINT) AS source_position
    FROM (
      SELECT
        *,
        CASE
          WHEN NOT source_problem IS NULL
          THEN source_problem
          WHEN patient_id IS NULL
          THEN 'missing patient_id'
          WHEN (
            (
              COALESCE(TRIM(CAST(birth_date AS TEXT)), '') <> ''
              AND TRY_CAST(birth_date AS DATE) IS NULL
            )
            OR (
              COALESCE(TRIM(CAST(death_date AS TEXT)), '') <> ''
              AND TRY_CAST(death_date AS DATE) IS NULL
            )
            OR (
              COALESCE(TRIM(CAST(registration_date AS TEXT)), '') <> ''
              AND TRY_CAST(registration_date AS DATE) IS NULL
            )
            OR (
              COALESCE(TRIM(CAST(deregistration_date AS TEXT)), '') <> ''
              AND TRY_CAST(deregistration_date AS DATE) IS NULL
            )
          )
          THEN 'unparseable date'
          ELSE 'used'
        END AS reason
      FROM (
        SELECT
          patient_id,
          sex,
          death_date,
          birth_date,
          birth_year,
          practice_id,
          registration_date,
          deregistration_date,
          source_problem,
          MIN(source_position) AS source_position,
          COUNT(*) AS copies
        FROM (
          SELECT
            patient_id,
            sex,
            death_date,
            birth_date,
            birth_year,
            practice_id,
            registration_date,
            deregistration_date,
            source_problem,
            source_position
          FROM src_patients
          WHERE
            HASH(
              patient_id,
              sex,
              death_date,
              birth_date,
              birth_year,
              practice_id,
              registration_date,
              deregistration_date,
              source_problem
            ) IN (
              SELECT
                HASH(
                  patient_id,
                  sex,
                  death_date,
                  birth_date,
                  birth_year,
                  practice_id,
                  registration_date,
                  deregistration_date,
                  source_problem
                ) AS row_hash
              FROM src_patients
              GROUP BY
                HASH(
                  patient_id,
                  sex,
                  death_date,
                  birth_date,
                  birth_year,
                  practice_id,
                  registration_date,
                  deregistration_date,
                  source_problem
                )
              HAVING
                COUNT(*) > 1
            )
        ) AS h
        GROUP BY
          patient_id,
          sex,
          death_date,
          birth_date,
          birth_year,
          practice_id,
          registration_date,
          deregistration_date,
          source_problem
      ) AS r
    ) AS j
    WHERE
      copies > 1
  ) AS c
  GROUP BY
    reason
  UNION ALL
  SELECT
    reason,
    'encounters' AS source_table,
    SUM(n_rows) - SUM(duplicates) AS distinct_rows,
    SUM(duplicates) AS duplicates,
    MIN(CASE WHEN reason <> 'used' THEN source_position END) AS first_position
  FROM (
    SELECT
      reason,
      1 AS n_rows,
      0 AS duplicates,
      source_position
    FROM encounters_judged
    UNION ALL
    SELECT
      reason,
      0 AS n_rows,
      CASE
        WHEN patient_id IS NULL OR NOT source_problem IS NULL
        THEN 0
        ELSE copies - 1
      END AS duplicates,
      CAST(NULL AS BIGINT) AS source_position
    FROM (
      SELECT
        *,
        COALESCE(record_problem, timing_problem, 'used') AS reason
      FROM (
        SELECT
          r.*,
          CASE
            WHEN NOT r.source_problem IS NULL
            THEN r.source_problem
            WHEN p.patient_id IS NULL
            THEN 'orphan patient'
            WHEN r.row_date IS NULL
            THEN 'unparseable date'
          END AS record_problem,
          CASE
            WHEN r.row_date > CAST('2019-12-31' AS DATE)
            THEN 'after end of data'
            WHEN NOT p.death_date IS NULL AND r.row_date > p.death_date
            THEN 'after death'
          END AS timing_problem
        FROM (
          SELECT
            patient_id,
            encounter_date,
            encounter_type,
            source_problem,
            source_position,
            copies,
            TRY_CAST(encounter_date AS DATE) AS row_date
          FROM (
            SELECT
              patient_id,
              encounter_date,
              encounter_type,
              source_problem,
              MIN(source_position) AS source_position,
              COUNT(*) AS copies
            FROM (
              SELECT
                patient_id,
                encounter_date,
                encounter_type,
                source_problem,
                source_position
              FROM src_encounters
              WHERE
                HASH(patient_id, encounter_date, encounter_type, source_problem) IN (
                  SELECT
                    HASH(patient_id, encounter_date, encounter_type, source_problem) AS row_hash
                  FROM src_encounters
                  GROUP BY
                    HASH(patient_id, encounter_date, encounter_type, source_problem)
                  HAVING
                    COUNT(*) > 1
                )
            ) AS h
            GROUP BY
              patient_id,
              encounter_date,
              encounter_type,
              source_problem
          ) AS g
        ) AS r
        LEFT JOIN patient_base AS p
          ON p.patient_id = r.patient_id
      ) AS j
    ) AS j
    WHERE
      copies > 1
  ) AS c
  GROUP BY
    reason
  UNION ALL
  SELECT
    reason,
    'diagnoses' AS source_table,
    SUM(n_rows) - SUM(duplicates) AS distinct_rows,
    SUM(duplicates) AS duplicates,
    MIN(CASE WHEN reason <> 'used' THEN source_position END) AS first_position
  FROM (
    SELECT
      reason,
      1 AS n_rows,
      0 AS duplicates,
      source_position
    FROM diagnoses_judged
    UNION ALL
    SELECT
      reason,
      0 AS n_rows,
      CASE
        WHEN patient_id IS NULL OR NOT source_problem IS NULL
        THEN 0
        ELSE copies - 1
      END AS duplicates,
      CAST(NULL AS BIGINT) AS source_position
    FROM (
      SELECT
        *,
        COALESCE(record_problem, code_problem, timing_problem, 'used') AS reason
      FROM (
        SELECT
          r.*,
          CASE
            WHEN NOT r.source_problem IS NULL
            THEN r.source_problem
            WHEN p.patient_id IS NULL
            THEN 'orphan patient'
            WHEN r.row_date IS NULL
            THEN 'unparseable date'
          END AS record_problem,
          c.problem AS code_problem,
          CASE
            WHEN r.row_date > CAST('2019-12-31' AS DATE)
            THEN 'after end of data'
            WHEN NOT p.death_date IS NULL AND r.row_date > p.death_date
            THEN 'after death'
          END AS timing_problem
        FROM (
          SELECT
            patient_id,
            event_date,
            code_system,
            code,
            source,
            source_problem,
            source_position,
            copies,
            TRY_CAST(event_date AS DATE) AS row_date,
            'diagnoses' AS source_table,
            CAST(code_system AS TEXT) AS raw_system,
            CAST(code AS TEXT) AS raw_code,
            CAST(source AS TEXT) AS raw_source,
            CAST(NULL AS INT) AS duration_days
          FROM (
            SELECT
              patient_id,
              event_date,
              code_system,
              code,
              source,
              source_problem,
              MIN(source_position) AS source_position,
              COUNT(*) AS copies
            FROM (
              SELECT
                patient_id,
                event_date,
                code_system,
                code,
                source,
                source_problem,
                source_position
              FROM src_diagnoses
              WHERE
                HASH(patient_id, event_date, code_system, code, source, source_problem) IN (
                  SELECT
                    HASH(patient_id, event_date, code_system, code, source, source_problem) AS row_hash
                  FROM src_diagnoses
                  GROUP BY
                    HASH(patient_id, event_date, code_system, code, source, source_problem)
                  HAVING
                    COUNT(*) > 1
                )
            ) AS h
            GROUP BY
              patient_id,
              event_date,
              code_system,
              code,
              source,
              source_problem
          ) AS g
        ) AS r
        LEFT JOIN patient_base AS p
          ON p.patient_id = r.patient_id
        LEFT JOIN distinct_codes AS c
          ON r.source_table = c.source_table
          AND r.raw_system IS NOT DISTINCT FROM c.raw_system
          AND r.raw_code IS NOT DISTINCT FROM c.raw_code
          AND r.raw_source IS NOT DISTINCT FROM c.raw_source
      ) AS j
    ) AS j
    WHERE
      copies > 1
  ) AS c
  GROUP BY
    reason
  UNION ALL
  SELECT
    reason,
    'prescriptions' AS source_table,
    SUM(n_rows) - SUM(duplicates) AS distinct_rows,
    SUM(duplicates) AS duplicates,
    MIN(CASE WHEN reason <> 'used' THEN source_position END) AS first_position
  FROM (
    SELECT
      reason,
      1 AS n_rows,
      0 AS duplicates,
      source_position
    FROM prescriptions_judged
    UNION ALL
    SELECT
      reason,
      0 AS n_rows,
      CASE
        WHEN patient_id IS NULL OR NOT source_problem IS NULL
        THEN 0
        ELSE copies - 1
      END AS duplicates,
      CAST(NULL AS BIGINT) AS source_position
    FROM (
      SELECT
        *,
        COALESCE(record_problem, code_problem, timing_problem, 'used') AS reason
      FROM (
        SELECT
          r.*,
          CASE
            WHEN NOT r.source_problem IS NULL
            THEN r.source_problem
            WHEN p.patient_id IS NULL
            THEN 'orphan patient'
            WHEN r.row_date IS NULL
            THEN 'unparseable date'
          END AS record_problem,
          c.problem AS code_problem,
          CASE
            WHEN r.row_date > CAST('2019-12-31' AS DATE)
            THEN 'after end of data'
            WHEN NOT p.death_date IS NULL AND r.row_date > p.death_date
            THEN 'after death'
          END AS timing_problem
        FROM (
          SELECT
            patient_id,
            start_date,
            atc,
            stop_date,
            source_problem,
            source_position,
            copies,
            TRY_CAST(start_date AS DATE) AS row_date,
            'prescriptions' AS source_table,
            CAST(NULL AS TEXT) AS raw_system,
            CAST(atc AS TEXT) AS raw_code,
            CAST(NULL AS TEXT) AS raw_source,
            CAST(DATE_DIFF('DAY', TRY_CAST(start_date AS DATE), TRY_CAST(stop_date AS DATE)) + 1 AS INT) AS duration_days
          FROM (
            SELECT
              patient_id,
              start_date,
              atc,
              stop_date,
              source_problem,
              MIN(source_position) AS source_position,
              COUNT(*) AS copies
            FROM (
              SELECT
                patient_id,
                start_date,
                atc,
                stop_date,
                source_problem,
                source_position
              FROM src_prescriptions
              WHERE
                HASH(patient_id, start_date, atc, stop_date, source_problem) IN (
                  SELECT
                    HASH(patient_id, start_date, atc, stop_date, source_problem) AS row_hash
                  FROM src_prescriptions
                  GROUP BY
                    HASH(patient_id, start_date, atc, stop_date, source_problem)
                  HAVING
                    COUNT(*) > 1
                )
            ) AS h
            GROUP BY
              patient_id,
              start_date,
              atc,
              stop_date,
              source_problem
          ) AS g
        ) AS r
        LEFT JOIN patient_base AS p
          ON p.patient_id = r.patient_id
        LEFT JOIN distinct_codes AS c
          ON r.source_table = c.source_table
          AND r.raw_system IS NOT DISTINCT FROM c.raw_system
          AND r.raw_code IS NOT DISTINCT FROM c.raw_code
          AND r.raw_source IS NOT DISTINCT FROM c.raw_source
      ) AS j
    ) AS j
    WHERE
      copies > 1
  ) AS c
  GROUP BY
    reason
  UNION ALL
  SELECT
    reason,
    'measurements' AS source_table,
    SUM(n_rows) - SUM(duplicates) AS distinct_rows,
    SUM(duplicates) AS duplicates,
    MIN(CASE WHEN reason <> 'used' THEN source_position END) AS first_position
  FROM (
    SELECT
      COALESCE(problem, 'used') AS reason,
      1 AS n_rows,
      0 AS duplicates,
      source_position
    FROM measurements_judged
    UNION ALL
    SELECT
      COALESCE(problem, 'used') AS reason,
      0 AS n_rows,
      CASE
        WHEN patient_id IS NULL OR NOT source_problem IS NULL
        THEN 0
        ELSE copies - 1
      END AS duplicates,
      CAST(NULL AS BIGINT) AS source_position
    FROM (
      SELECT
        r.patient_id,
        r.obs_date,
        s.measure,
        s.qualifier,
        s.category,
        s.raw_value,
        s.raw_value_text,
        s.raw_unit,
        r.copies,
        r.source_position,
        r.source_problem,
        s.value,
        CASE
          WHEN NOT r.source_problem IS NULL
          THEN r.source_problem
          WHEN p.patient_id IS NULL
          THEN 'orphan patient'
          WHEN r.obs_date IS NULL
          THEN 'unparseable date'
        END AS record_problem,
        CASE
          WHEN r.obs_date > CAST('2019-12-31' AS DATE)
          THEN 'after end of data'
          WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
          THEN 'after death'
        END AS timing_problem,
        COALESCE(
          CASE
            WHEN NOT r.source_problem IS NULL
            THEN r.source_problem
            WHEN p.patient_id IS NULL
            THEN 'orphan patient'
            WHEN r.obs_date IS NULL
            THEN 'unparseable date'
          END,
          CASE
            WHEN r.obs_date > CAST('2019-12-31' AS DATE)
            THEN 'after end of data'
            WHEN NOT p.death_date IS NULL AND r.obs_date > p.death_date
            THEN 'after death'
          END,
          s.problem
        ) AS problem
      FROM (
        SELECT
          patient_id,
          TRY_CAST(obs_date AS DATE) AS obs_date,
          measure,
          unit,
          value,
          value_text,
          copies,
          source_position,
          source_problem
        FROM (
          SELECT
            *
          FROM measurement_copies
        ) AS g
      ) AS r
      LEFT JOIN patient_base AS p
        ON p.patient_id = r.patient_id
      LEFT JOIN measurement_shapes AS s
        ON s.key_measure IS NOT DISTINCT FROM r.measure
        AND s.key_unit IS NOT DISTINCT FROM r.unit
        AND s.key_value IS NOT DISTINCT FROM r.value
        AND s.key_value_text IS NOT DISTINCT FROM r.value_text
    ) AS j
    WHERE
      copies > 1
  ) AS c
  GROUP BY
    reason
)
SELECT
  source_table,
  CASE WHEN reason = 'used' THEN 'used' ELSE 'set aside' END AS outcome,
  CASE WHEN reason = 'used' THEN 'used' ELSE reason END AS reason,
  CAST(SUM(n) AS BIGINT) AS n_rows,
  MIN(first_position) AS first_position
FROM (
  SELECT
    source_table,
    reason,
    distinct_rows AS n,
    first_position
  FROM summary
  UNION ALL
  SELECT
    source_table,
    'exact duplicate' AS reason,
    duplicates AS n,
    CAST(NULL AS BIGINT) AS first_position
  FROM summary
  WHERE
    duplicates > 0
) AS counted
GROUP BY
  source_table,
  reason;

-- stage evidence_counts [table]: patient-days per piece of evidence, so a definition matching no row is reported
-- reads: evidence_events
SELECT
  evidence,
  COUNT(*) AS n_events
FROM evidence_events
GROUP BY
  evidence;

-- stage persontime_spans [view]: each cohort patient's follow-up days (index + 1 to followup_end) and incident onsets
-- reads: cohort, eligibility
SELECT
  c.patient_id,
  e.birth_date,
  c.index_date,
  CAST(c.index_date + INTERVAL 1 DAY AS DATE) AS piece_start,
  c.followup_end AS piece_end,
  c.at_risk_heart_failure AS at_risk_heart_failure,
  c.at_risk_type2_diabetes AS at_risk_type2_diabetes,
  CASE WHEN c.incident_heart_failure THEN c.onset_heart_failure END AS onset_heart_failure,
  CASE WHEN c.incident_type2_diabetes THEN c.onset_type2_diabetes END AS onset_type2_diabetes
FROM cohort AS c
JOIN eligibility AS e
  ON e.patient_id = c.patient_id
WHERE
  c.followup_end > c.index_date;

-- stage persontime [table]: follow-up split at age bands, calendar years and time since index, with days at risk and events per outcome
-- reads: persontime_spans
SELECT
  p.patient_id,
  p.age_band,
  p.age_band_start,
  p.calendar_year,
  p.since_index_band,
  p.piece_start AS cell_start,
  p.piece_end AS cell_end,
  CAST(DATE_DIFF('DAY', p.piece_start, p.piece_end) + 1 AS INT) AS days,
  CAST(CASE
    WHEN NOT p.at_risk_heart_failure
    THEN NULL
    WHEN p.onset_heart_failure IS NULL OR p.onset_heart_failure > p.piece_end
    THEN DATE_DIFF('DAY', p.piece_start, p.piece_end) + 1
    WHEN p.onset_heart_failure < p.piece_start
    THEN 0
    ELSE DATE_DIFF('DAY', p.piece_start, p.onset_heart_failure) + 1
  END AS INT) AS days_at_risk_heart_failure,
  CAST(CASE
    WHEN NOT p.at_risk_heart_failure
    THEN NULL
    WHEN p.onset_heart_failure BETWEEN p.piece_start AND p.piece_end
    THEN 1
    ELSE 0
  END AS TINYINT) AS events_heart_failure,
  CAST(CASE
    WHEN NOT p.at_risk_type2_diabetes
    THEN NULL
    WHEN p.onset_type2_diabetes IS NULL OR p.onset_type2_diabetes > p.piece_end
    THEN DATE_DIFF('DAY', p.piece_start, p.piece_end) + 1
    WHEN p.onset_type2_diabetes < p.piece_start
    THEN 0
    ELSE DATE_DIFF('DAY', p.piece_start, p.onset_type2_diabetes) + 1
  END AS INT) AS days_at_risk_type2_diabetes,
  CAST(CASE
    WHEN NOT p.at_risk_type2_diabetes
    THEN NULL
    WHEN p.onset_type2_diabetes BETWEEN p.piece_start AND p.piece_end
    THEN 1
    ELSE 0
  END AS TINYINT) AS events_type2_diabetes
FROM (
  SELECT
    p.patient_id,
    p.birth_date,
    p.index_date,
    p.at_risk_heart_failure,
    p.at_risk_type2_diabetes,
    p.onset_heart_failure,
    p.onset_type2_diabetes,
    p.age_band,
    p.age_band_start,
    p.since_index_band,
    CAST(p.calendar_year AS INT) AS calendar_year,
    GREATEST(p.piece_start, MAKE_DATE(p.calendar_year, 1, 1)) AS piece_start,
    LEAST(p.piece_end, MAKE_DATE(p.calendar_year, 12, 31)) AS piece_end
  FROM (
    SELECT
      p.patient_id,
      p.birth_date,
      p.index_date,
      p.at_risk_heart_failure,
      p.at_risk_type2_diabetes,
      p.onset_heart_failure,
      p.onset_type2_diabetes,
      p.age_band,
      p.age_band_start,
      p.since_index_band,
      p.piece_start,
      p.piece_end,
      UNNEST(GENERATE_SERIES(YEAR(p.piece_start), YEAR(p.piece_end))) AS calendar_year
    FROM (
      SELECT
        p.patient_id,
        p.birth_date,
        p.index_date,
        p.at_risk_heart_failure,
        p.at_risk_type2_diabetes,
        p.onset_heart_failure,
        p.onset_type2_diabetes,
        p.age_band,
        p.age_band_start,
        b.label AS since_index_band,
        GREATEST(
          p.piece_start,
          CAST(MAKE_DATE(YEAR(p.index_date) + b.lower_years, MONTH(p.index_date), 1) + INTERVAL (DAY(p.index_date) - 1) DAY AS DATE)
        ) AS piece_start,
        LEAST(
          p.piece_end,
          CASE
            WHEN b.upper_years IS NULL
            THEN p.piece_end
            ELSE CAST(CAST(MAKE_DATE(YEAR(p.index_date) + b.upper_years, MONTH(p.index_date), 1) + INTERVAL (DAY(p.index_date) - 1) DAY AS DATE) + INTERVAL (-1) DAY AS DATE)
          END
        ) AS piece_end
      FROM (
        SELECT
          p.patient_id,
          p.birth_date,
          p.index_date,
          p.at_risk_heart_failure,
          p.at_risk_type2_diabetes,
          p.onset_heart_failure,
          p.onset_type2_diabetes,
          b.label AS age_band,
          CAST(b.lower_years AS INT) AS age_band_start,
          GREATEST(
            p.piece_start,
            CAST(MAKE_DATE(YEAR(p.birth_date) + b.lower_years, MONTH(p.birth_date), 1) + INTERVAL (DAY(p.birth_date) - 1) DAY AS DATE)
          ) AS piece_start,
          LEAST(
            p.piece_end,
            CASE
              WHEN b.upper_years IS NULL
              THEN p.piece_end
              ELSE CAST(CAST(MAKE_DATE(YEAR(p.birth_date) + b.upper_years, MONTH(p.birth_date), 1) + INTERVAL (DAY(p.birth_date) - 1) DAY AS DATE) + INTERVAL (-1) DAY AS DATE)
            END
          ) AS piece_end
        FROM persontime_spans AS p
        CROSS JOIN (VALUES
          ('40-49', 40, 50),
          ('50-59', 50, 60),
          ('60-64', 60, 65),
          ('65-69', 65, 70),
          ('70-79', 70, 80),
          ('80+', 80, CAST(NULL AS INT))) AS b(label, lower_years, upper_years)
        WHERE
          CAST(MAKE_DATE(YEAR(p.birth_date) + b.lower_years, MONTH(p.birth_date), 1) + INTERVAL (DAY(p.birth_date) - 1) DAY AS DATE) <= p.piece_end
          AND (
            b.upper_years IS NULL
            OR CAST(MAKE_DATE(YEAR(p.birth_date) + b.upper_years, MONTH(p.birth_date), 1) + INTERVAL (DAY(p.birth_date) - 1) DAY AS DATE) > p.piece_start
          )
      ) AS p
      CROSS JOIN (VALUES
        ('0-1', 0, 1),
        ('1-3', 1, 3),
        ('3+', 3, CAST(NULL AS INT))) AS b(label, lower_years, upper_years)
      WHERE
        CAST(MAKE_DATE(YEAR(p.index_date) + b.lower_years, MONTH(p.index_date), 1) + INTERVAL (DAY(p.index_date) - 1) DAY AS DATE) <= p.piece_end
        AND (
          b.upper_years IS NULL
          OR CAST(MAKE_DATE(YEAR(p.index_date) + b.upper_years, MONTH(p.index_date), 1) + INTERVAL (DAY(p.index_date) - 1) DAY AS DATE) > p.piece_start
        )
    ) AS p
  ) AS p
) AS p;

-- stage persontime_accounting [check]: every patient's cells add up to followup_days, time_X and incident_X
-- reads: cohort, persontime
SELECT
  c.patient_id,
  CASE
    WHEN COALESCE(s.days, 0) <> c.followup_days
    THEN 'days <> followup_days'
    WHEN s.first_day <> CAST(c.index_date + INTERVAL 1 DAY AS DATE)
    OR s.last_day <> c.followup_end
    THEN 'cells do not run from index + 1 to followup_end'
    WHEN c.at_risk_heart_failure
    AND COALESCE(s.risk_heart_failure, 0) <> c.time_heart_failure
    THEN 'days_at_risk_heart_failure <> time_heart_failure'
    WHEN c.at_risk_heart_failure
    AND COALESCE(s.events_heart_failure, 0) <> CASE WHEN c.incident_heart_failure THEN 1 ELSE 0 END
    THEN 'events_heart_failure <> incident_heart_failure'
    WHEN NOT c.at_risk_heart_failure AND COALESCE(s.marked_heart_failure, 0) > 0
    THEN 'values for heart_failure where not at risk'
    WHEN c.at_risk_type2_diabetes
    AND COALESCE(s.risk_type2_diabetes, 0) <> c.time_type2_diabetes
    THEN 'days_at_risk_type2_diabetes <> time_type2_diabetes'
    WHEN c.at_risk_type2_diabetes
    AND COALESCE(s.events_type2_diabetes, 0) <> CASE WHEN c.incident_type2_diabetes THEN 1 ELSE 0 END
    THEN 'events_type2_diabetes <> incident_type2_diabetes'
    WHEN NOT c.at_risk_type2_diabetes AND COALESCE(s.marked_type2_diabetes, 0) > 0
    THEN 'values for type2_diabetes where not at risk'
  END AS difference
FROM cohort AS c
LEFT JOIN (
  SELECT
    patient_id,
    SUM(days) AS days,
    MIN(cell_start) AS first_day,
    MAX(cell_end) AS last_day,
    SUM(days_at_risk_heart_failure) AS risk_heart_failure,
    SUM(events_heart_failure) AS events_heart_failure,
    COUNT(days_at_risk_heart_failure) + COUNT(events_heart_failure) AS marked_heart_failure,
    SUM(days_at_risk_type2_diabetes) AS risk_type2_diabetes,
    SUM(events_type2_diabetes) AS events_type2_diabetes,
    COUNT(days_at_risk_type2_diabetes) + COUNT(events_type2_diabetes) AS marked_type2_diabetes
  FROM persontime
  GROUP BY
    patient_id
) AS s
  ON s.patient_id = c.patient_id
WHERE
  COALESCE(s.days, 0) <> c.followup_days
  OR (
    s.first_day <> CAST(c.index_date + INTERVAL 1 DAY AS DATE)
    OR s.last_day <> c.followup_end
  )
  OR (
    c.at_risk_heart_failure
    AND COALESCE(s.risk_heart_failure, 0) <> c.time_heart_failure
  )
  OR (
    c.at_risk_heart_failure
    AND COALESCE(s.events_heart_failure, 0) <> CASE WHEN c.incident_heart_failure THEN 1 ELSE 0 END
  )
  OR (
    NOT c.at_risk_heart_failure AND COALESCE(s.marked_heart_failure, 0) > 0
  )
  OR (
    c.at_risk_type2_diabetes
    AND COALESCE(s.risk_type2_diabetes, 0) <> c.time_type2_diabetes
  )
  OR (
    c.at_risk_type2_diabetes
    AND COALESCE(s.events_type2_diabetes, 0) <> CASE WHEN c.incident_type2_diabetes THEN 1 ELSE 0 END
  )
  OR (
    NOT c.at_risk_type2_diabetes AND COALESCE(s.marked_type2_diabetes, 0) > 0
  )
ORDER BY
  c.patient_id
LIMIT 5;
