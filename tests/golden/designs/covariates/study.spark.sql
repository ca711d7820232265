-- plan for study design_covariates (39 stages, dialect spark)

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
        COALESCE(TRIM(CAST(birth_date AS STRING)), '') <> ''
        AND CASE
          WHEN CAST(birth_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
          THEN TRY_CAST(REGEXP_REPLACE(
            TRIM(CAST(birth_date AS STRING)),
            '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
            '$1-$3-$4'
          ) AS DATE)
        END IS NULL
      )
      OR (
        COALESCE(TRIM(CAST(death_date AS STRING)), '') <> ''
        AND CASE
          WHEN CAST(death_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
          THEN TRY_CAST(REGEXP_REPLACE(
            TRIM(CAST(death_date AS STRING)),
            '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
            '$1-$3-$4'
          ) AS DATE)
        END IS NULL
      )
      OR (
        COALESCE(TRIM(CAST(registration_date AS STRING)), '') <> ''
        AND CASE
          WHEN CAST(registration_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
          THEN TRY_CAST(REGEXP_REPLACE(
            TRIM(CAST(registration_date AS STRING)),
            '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
            '$1-$3-$4'
          ) AS DATE)
        END IS NULL
      )
      OR (
        COALESCE(TRIM(CAST(deregistration_date AS STRING)), '') <> ''
        AND CASE
          WHEN CAST(deregistration_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
          THEN TRY_CAST(REGEXP_REPLACE(
            TRIM(CAST(deregistration_date AS STRING)),
            '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
            '$1-$3-$4'
          ) AS DATE)
        END IS NULL
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
  COALESCE(
    CASE
      WHEN CAST(birth_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
      THEN TRY_CAST(REGEXP_REPLACE(
        TRIM(CAST(birth_date AS STRING)),
        '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
        '$1-$3-$4'
      ) AS DATE)
    END,
    CASE
      WHEN COALESCE(
        TRY_CAST(birth_year AS INT),
        TRY_CAST(ROUND(
          CASE
            WHEN NOT CAST(birth_year AS STRING) RLIKE '[0-9.][dDfF]\\s*$'
            THEN TRY_CAST(birth_year AS DOUBLE)
          END
        ) AS INT)
      ) BETWEEN 1 AND 9999
      THEN MAKE_DATE(
        COALESCE(
          TRY_CAST(birth_year AS INT),
          TRY_CAST(ROUND(
            CASE
              WHEN NOT CAST(birth_year AS STRING) RLIKE '[0-9.][dDfF]\\s*$'
              THEN TRY_CAST(birth_year AS DOUBLE)
            END
          ) AS INT)
        ),
        7,
        1
      )
    END
  ) AS birth_date,
  NULLIF(UPPER(TRIM(CAST(sex AS STRING))), '') AS sex,
  CASE
    WHEN CAST(death_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
    THEN TRY_CAST(REGEXP_REPLACE(
      TRIM(CAST(death_date AS STRING)),
      '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
      '$1-$3-$4'
    ) AS DATE)
  END AS death_date,
  NULLIF(TRIM(CAST(practice_id AS STRING)), '') AS practice_id,
  CASE
    WHEN CAST(registration_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
    THEN TRY_CAST(REGEXP_REPLACE(
      TRIM(CAST(registration_date AS STRING)),
      '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
      '$1-$3-$4'
    ) AS DATE)
  END AS registration_date,
  CASE
    WHEN CAST(deregistration_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
    THEN TRY_CAST(REGEXP_REPLACE(
      TRIM(CAST(deregistration_date AS STRING)),
      '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
      '$1-$3-$4'
    ) AS DATE)
  END AS deregistration_date
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
  patient_id NULLS LAST
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
      CASE
        WHEN CAST(encounter_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
        THEN TRY_CAST(REGEXP_REPLACE(
          TRIM(CAST(encounter_date AS STRING)),
          '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
          '$1-$3-$4'
        ) AS DATE)
      END AS row_date
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
  LOWER(TRIM(CAST(encounter_type AS STRING))) AS encounter_type
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
      WHEN NOT COALESCE(code, '') RLIKE '^[A-Z]([0-9]{2}([A-Z]([A-Z]([0-9]{2})?)?)?)?$'
      THEN 'malformed code'
    END
    WHEN NOT COALESCE(code_system, '') IN ('ICD9', 'ICD10')
    THEN 'unknown code system'
    WHEN COALESCE(code_system, '') = 'ICD9'
    AND NOT COALESCE(code, '') RLIKE '^([0-9]{3}([0-9]{1,2})?|V[0-9]{2}([0-9]{1,2})?|E[0-9]{3}([0-9])?)$'
    THEN 'malformed code'
    WHEN COALESCE(code_system, '') = 'ICD10'
    AND NOT COALESCE(code, '') RLIKE '^[A-Z][0-9][0-9A-Z]([0-9A-Z]{1,4})?$'
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
      CAST(code_system AS STRING) AS raw_system,
      CAST(code AS STRING) AS raw_code,
      CAST(source AS STRING) AS raw_source
    FROM src_diagnoses
    UNION ALL
    SELECT DISTINCT
      'prescriptions' AS source_table,
      CAST(NULL AS STRING) AS raw_system,
      CAST(atc AS STRING) AS raw_code,
      CAST(NULL AS STRING) AS raw_source
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
      CASE
        WHEN CAST(event_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
        THEN TRY_CAST(REGEXP_REPLACE(
          TRIM(CAST(event_date AS STRING)),
          '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
          '$1-$3-$4'
        ) AS DATE)
      END AS row_date,
      'diagnoses' AS source_table,
      CAST(code_system AS STRING) AS raw_system,
      CAST(code AS STRING) AS raw_code,
      CAST(source AS STRING) AS raw_source,
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
      CASE
        WHEN CAST(start_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
        THEN TRY_CAST(REGEXP_REPLACE(
          TRIM(CAST(start_date AS STRING)),
          '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
          '$1-$3-$4'
        ) AS DATE)
      END AS row_date,
      'prescriptions' AS source_table,
      CAST(NULL AS STRING) AS raw_system,
      CAST(atc AS STRING) AS raw_code,
      CAST(NULL AS STRING) AS raw_source,
      CAST(DATEDIFF(
        DAY,
        CASE
          WHEN CAST(start_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
          THEN TRY_CAST(REGEXP_REPLACE(
            TRIM(CAST(start_date AS STRING)),
            '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
            '$1-$3-$4'
          ) AS DATE)
        END,
        CASE
          WHEN CAST(stop_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
          THEN TRY_CAST(REGEXP_REPLACE(
            TRIM(CAST(stop_date AS STRING)),
            '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
            '$1-$3-$4'
          ) AS DATE)
        END
      ) + 1 AS INT) AS duration_days
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
    LOWER(TRIM(CAST(key_measure AS STRING))) AS measure,
    CASE
      WHEN NOT CAST(key_value AS STRING) RLIKE '[0-9.][dDfF]\\s*$'
      THEN TRY_CAST(key_value AS DOUBLE)
    END AS value_number,
    CASE
      WHEN NOT CASE
        WHEN NOT CAST(key_value AS STRING) RLIKE '[0-9.][dDfF]\\s*$'
        THEN TRY_CAST(key_value AS DOUBLE)
      END IS NULL
      THEN FALSE
      ELSE NULLIF(TRIM(CAST(key_value AS STRING)), '') IS NULL
    END AS value_missing,
    NULLIF(TRIM(CAST(key_value AS STRING)), '') AS value_given,
    NULLIF(TRIM(CAST(key_value_text AS STRING)), '') AS text_given,
    NULLIF(TRIM(CAST(key_unit AS STRING)), '') AS unit_given
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
      THEN NULLIF(REGEXP_EXTRACT(text_given, '^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$'), '')
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
      WHEN text_number LIKE '%,%' AND text_number RLIKE '^[0-9]+,[0-9]{1,2}$'
      THEN CASE
        WHEN NOT CAST(REPLACE(text_number, ',', '.') AS STRING) RLIKE '[0-9.][dDfF]\\s*$'
        THEN TRY_CAST(REPLACE(text_number, ',', '.') AS DOUBLE)
      END
      WHEN text_number LIKE '%,%'
      THEN NULL
      ELSE CASE
        WHEN NOT CAST(text_number AS STRING) RLIKE '[0-9.][dDfF]\\s*$'
        THEN TRY_CAST(text_number AS DOUBLE)
      END
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
  CASE
    WHEN u.divisor = 0
    THEN u.factor * r.reading * CAST('Infinity' AS DOUBLE)
    ELSE u.factor * r.reading / u.divisor
  END + u.offset_value AS value,
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
    WHEN NOT CASE
      WHEN u.divisor = 0
      THEN u.factor * r.reading * CAST('Infinity' AS DOUBLE)
      ELSE u.factor * r.reading / u.divisor
    END + u.offset_value BETWEEN u.low AND u.high
    THEN 'implausible value'
  END AS problem
FROM parsed AS r
LEFT JOIN VALUES
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
  ('weight', FALSE) AS k(measure, is_coded)
  ON k.measure = r.measure
LEFT JOIN VALUES
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
  ('weight', '[lb_av]', 0.45359237, 1.0, 0.0, 2.0, 400.0) AS u(measure, unit, factor, divisor, offset_value, low, high)
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
    CASE
      WHEN CAST(obs_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
      THEN TRY_CAST(REGEXP_REPLACE(
        TRIM(CAST(obs_date AS STRING)),
        '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
        '$1-$3-$4'
      ) AS DATE)
    END AS obs_date,
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
      CASE
        WHEN CAST(obs_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
        THEN TRY_CAST(REGEXP_REPLACE(
          TRIM(CAST(obs_date AS STRING)),
          '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
          '$1-$3-$4'
        ) AS DATE)
      END AS obs_date,
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
        CASE
          WHEN CAST(obs_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
          THEN TRY_CAST(REGEXP_REPLACE(
            TRIM(CAST(obs_date AS STRING)),
            '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
            '$1-$3-$4'
          ) AS DATE)
        END AS obs_date,
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
        problem IS NULL
        AND measure IN ('bmi', 'creatinine', 'egfr', 'hba1c', 'height', 'sbp', 'weight')
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
  measure IN ('height')
  OR (
    measure = 'bmi'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  )
  OR (
    measure = 'creatinine'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  )
  OR (
    measure = 'egfr'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  )
  OR (
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
  )
  OR (
    measure = 'sbp'
    AND (
      obs_date BETWEEN CAST('2014-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
      OR obs_date BETWEEN CAST('2014-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
    )
  )
  OR (
    measure = 'weight'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  )
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
      CASE
        WHEN CAST(obs_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
        THEN TRY_CAST(REGEXP_REPLACE(
          TRIM(CAST(obs_date AS STRING)),
          '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
          '$1-$3-$4'
        ) AS DATE)
      END AS obs_date,
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
      problem IS NULL
      AND measure IN ('bmi', 'creatinine', 'egfr', 'hba1c', 'height', 'sbp', 'weight')
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
  measure IN ('height')
  OR (
    measure = 'bmi'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  )
  OR (
    measure = 'creatinine'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  )
  OR (
    measure = 'egfr'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  )
  OR (
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
  )
  OR (
    measure = 'sbp'
    AND (
      obs_date BETWEEN CAST('2014-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
      OR obs_date BETWEEN CAST('2014-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
    )
  )
  OR (
    measure = 'weight'
    AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  );

-- stage derived_egfr [table]: eGFR derived from creatinine by CKD-EPI 2021 where none was reported that day
-- reads: measurement_values, patient_base
SELECT
  patient_id,
  obs_date,
  'egfr' AS measure,
  egfr AS value,
  CAST(NULL AS STRING) AS qualifier,
  CAST(NULL AS STRING) AS category,
  TRUE AS derived
FROM (
  SELECT
    c.patient_id,
    c.obs_date,
    142 * POWER(
      LEAST(
        CASE
          WHEN k.kappa = 0
          THEN c.value * CAST('Infinity' AS DOUBLE)
          ELSE c.value / k.kappa
        END,
        1
      ),
      k.alpha
    ) * POWER(
      GREATEST(
        CASE
          WHEN k.kappa = 0
          THEN c.value * CAST('Infinity' AS DOUBLE)
          ELSE c.value / k.kappa
        END,
        1
      ),
      -1.2
    ) * POWER(
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
  JOIN VALUES
    ('F', 0.7, -0.241, 1.012),
    ('M', 0.9, -0.302, 1.0) AS k(sex, kappa, alpha, female_factor)
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

-- stage derived_bmi [table]: BMI from weight and the latest height where none was reported that day
-- reads: measurement_values
SELECT
  patient_id,
  obs_date,
  'bmi' AS measure,
  bmi AS value,
  CAST(NULL AS STRING) AS qualifier,
  CAST(NULL AS STRING) AS category,
  TRUE AS derived
FROM (
  SELECT
    w.patient_id,
    w.obs_date,
    CASE
      WHEN POWER(h.height_cm / 100, 2) = 0
      THEN w.value * CAST('Infinity' AS DOUBLE)
      ELSE w.value / POWER(h.height_cm / 100, 2)
    END AS bmi
  FROM measurement_values AS w
  JOIN (
    SELECT
      patient_id,
      AVG(value) AS height_cm
    FROM (
      SELECT
        patient_id,
        value,
        obs_date,
        MAX(obs_date) OVER (PARTITION BY patient_id) AS last_date
      FROM measurement_values
      WHERE
        measure = 'height' AND qualifier IS NULL
    ) AS heights
    WHERE
      obs_date = last_date
    GROUP BY
      patient_id
  ) AS h
    ON h.patient_id = w.patient_id
  LEFT JOIN (
    SELECT DISTINCT
      patient_id,
      obs_date
    FROM measurement_values
    WHERE
      measure = 'bmi'
  ) AS r
    ON r.patient_id = w.patient_id AND r.obs_date = w.obs_date
  WHERE
    w.measure = 'weight' AND w.qualifier IS NULL AND r.patient_id IS NULL
) AS d
WHERE
  bmi BETWEEN 10.0 AND 80.0;

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
  BOOL_OR(NOT m.is_exclusion) AS included,
  BOOL_OR(m.is_exclusion) AS excluded,
  CASE
    WHEN BOOL_OR(NOT m.is_exclusion AND m.min_days IS NULL)
    THEN NULL
    ELSE MIN(CASE WHEN NOT m.is_exclusion THEN m.min_days END)
  END AS min_days
FROM distinct_codes AS c
CROSS JOIN VALUES
  (3),
  (4),
  (5) AS l(prefix_length)
JOIN VALUES
  ('ATC', 'A10B', 872629348, NULL, NULL, FALSE),
  ('ATC', 'C02', 1369371461, NULL, NULL, FALSE),
  ('ATC', 'C03', 1369371461, NULL, NULL, FALSE),
  ('ATC', 'C03C', 2082671494, NULL, NULL, FALSE),
  ('ATC', 'C07', 1369371461, NULL, NULL, FALSE),
  ('ATC', 'C08', 1369371461, NULL, NULL, FALSE),
  ('ATC', 'C09', 1369371461, NULL, NULL, FALSE),
  ('ICD10', 'B18', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'B20', 818584883, NULL, NULL, FALSE),
  ('ICD10', 'B21', 818584883, NULL, NULL, FALSE),
  ('ICD10', 'B22', 818584883, NULL, NULL, FALSE),
  ('ICD10', 'B24', 818584883, NULL, NULL, FALSE),
  ('ICD10', 'C00', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C01', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C02', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C03', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C04', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C05', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C06', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C07', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C08', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C09', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C10', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C11', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C12', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C13', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C14', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C15', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C16', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C17', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C18', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C19', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C20', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C21', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C22', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C23', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C24', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C25', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C26', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C30', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C31', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C32', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C33', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C34', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C37', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C38', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C39', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C40', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C41', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C43', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C45', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C46', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C47', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C48', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C49', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C50', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C51', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C52', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C53', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C54', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C55', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C56', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C57', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C58', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C60', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C61', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C62', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C63', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C64', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C65', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C66', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C67', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C68', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C69', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C70', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C71', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C72', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C73', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C74', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C75', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C76', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C77', 1188480176, NULL, NULL, FALSE),
  ('ICD10', 'C78', 1188480176, NULL, NULL, FALSE),
  ('ICD10', 'C79', 1188480176, NULL, NULL, FALSE),
  ('ICD10', 'C80', 1188480176, NULL, NULL, FALSE),
  ('ICD10', 'C81', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C82', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C83', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C84', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C85', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C88', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C90', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C91', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C92', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C93', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C94', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C95', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C96', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'C97', 1617294027, NULL, NULL, FALSE),
  ('ICD10', 'E100', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E101', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E102', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E103', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E104', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E105', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E106', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E107', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E108', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E109', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E11', 16584386, NULL, NULL, FALSE),
  ('ICD10', 'E110', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E111', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E112', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E113', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E114', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E115', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E116', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E117', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E118', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E119', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E120', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E121', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E122', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E123', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E124', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E125', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E126', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E127', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E128', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E129', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E130', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E131', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E132', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E133', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E134', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E135', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E136', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E137', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E138', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E139', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E140', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E141', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E142', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E143', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E144', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E145', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E146', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E147', 1855815331, NULL, NULL, FALSE),
  ('ICD10', 'E148', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'E149', 696433381, NULL, NULL, FALSE),
  ('ICD10', 'F00', 684695303, NULL, NULL, FALSE),
  ('ICD10', 'F01', 684695303, NULL, NULL, FALSE),
  ('ICD10', 'F02', 684695303, NULL, NULL, FALSE),
  ('ICD10', 'F03', 684695303, NULL, NULL, FALSE),
  ('ICD10', 'F051', 684695303, NULL, NULL, FALSE),
  ('ICD10', 'G041', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G114', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G30', 684695303, NULL, NULL, FALSE),
  ('ICD10', 'G311', 684695303, NULL, NULL, FALSE),
  ('ICD10', 'G45', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'G46', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'G801', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G802', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G81', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G82', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G830', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G831', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G832', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G833', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G834', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'G839', 103697730, NULL, NULL, FALSE),
  ('ICD10', 'H340', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I099', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I10', 2001683759, NULL, NULL, FALSE),
  ('ICD10', 'I11', 2001683759, NULL, NULL, FALSE),
  ('ICD10', 'I110', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I110', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I12', 2001683759, NULL, NULL, FALSE),
  ('ICD10', 'I120', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'I13', 2001683759, NULL, NULL, FALSE),
  ('ICD10', 'I130', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I130', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I131', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'I132', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I132', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I15', 2001683759, NULL, NULL, FALSE),
  ('ICD10', 'I21', 703042088, NULL, NULL, FALSE),
  ('ICD10', 'I22', 703042088, NULL, NULL, FALSE),
  ('ICD10', 'I252', 703042088, NULL, NULL, FALSE),
  ('ICD10', 'I255', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I278', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'I279', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'I420', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I425', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I426', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I427', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I428', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I429', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I43', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I50', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'I50', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I60', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I61', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I62', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I63', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I64', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I65', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I66', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I67', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I68', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I69', 1577684049, NULL, NULL, FALSE),
  ('ICD10', 'I70', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I71', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I731', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I738', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I739', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I771', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I790', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I792', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'I850', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'I859', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'I864', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'I982', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'J40', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J41', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J42', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J43', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J44', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J45', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J46', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J47', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J60', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J61', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J62', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J63', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J64', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J65', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J66', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J67', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J684', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J701', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'J703', 294785012, NULL, NULL, FALSE),
  ('ICD10', 'K25', 1714082935, NULL, NULL, FALSE),
  ('ICD10', 'K26', 1714082935, NULL, NULL, FALSE),
  ('ICD10', 'K27', 1714082935, NULL, NULL, FALSE),
  ('ICD10', 'K28', 1714082935, NULL, NULL, FALSE),
  ('ICD10', 'K551', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'K558', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'K559', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'K700', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K701', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K702', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K703', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K704', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'K709', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K711', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'K713', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K714', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K715', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K717', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K721', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'K729', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'K73', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K74', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K760', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K762', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K763', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K764', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K765', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'K766', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'K767', 2204522, NULL, NULL, FALSE),
  ('ICD10', 'K768', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'K769', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'M05', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M06', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M315', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M32', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M33', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M34', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M351', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M353', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'M360', 264104370, NULL, NULL, FALSE),
  ('ICD10', 'N032', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N033', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N034', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N035', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N036', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N037', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N052', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N053', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N054', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N055', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N056', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N057', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N18', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N181', 752661743, NULL, NULL, TRUE),
  ('ICD10', 'N182', 752661743, NULL, NULL, TRUE),
  ('ICD10', 'N19', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'N250', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'P290', 1177630332, NULL, NULL, FALSE),
  ('ICD10', 'Z490', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'Z491', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'Z492', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'Z940', 752661743, NULL, NULL, FALSE),
  ('ICD10', 'Z944', 300580152, NULL, NULL, FALSE),
  ('ICD10', 'Z958', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'Z959', 416310112, NULL, NULL, FALSE),
  ('ICD10', 'Z992', 752661743, NULL, NULL, FALSE),
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
  ('ICD9', '401', 2001683759, NULL, NULL, FALSE),
  ('ICD9', '402', 2001683759, NULL, NULL, FALSE),
  ('ICD9', '40201', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40211', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40291', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '403', 2001683759, NULL, NULL, FALSE),
  ('ICD9', '404', 2001683759, NULL, NULL, FALSE),
  ('ICD9', '40401', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40403', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40411', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40413', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40491', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40493', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '405', 2001683759, NULL, NULL, FALSE),
  ('ICD9', '428', 2055434026, NULL, NULL, FALSE) AS m(code_system, prefix, evidence, source, min_days, is_exclusion)
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
  CAST(DATEDIFF(DAY, CAST('1970-01-01' AS DATE), event_date) AS INT) AS day,
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
    SUM(CASE WHEN evidence = 2055434026 /* heart_failure.hf_code */ THEN 1 ELSE 0 END) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 730 PRECEDING AND CURRENT ROW
    ) AS in_frame_0
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
    ) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 365 PRECEDING AND CURRENT ROW
    ) AS in_frame_0,
    SUM(
      CASE
        WHEN evidence = 2082671494 /* heart_failure.loop_diuretic */
        THEN n_rows
        ELSE 0
      END
    ) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 365 PRECEDING AND CURRENT ROW
    ) AS in_frame_1
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
    SUM(CASE WHEN evidence = 2001683759 /* hypertension.htn_code */ THEN 1 ELSE 0 END) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 730 PRECEDING AND CURRENT ROW
    ) AS in_frame_0
  FROM evidence_events
  WHERE
    evidence IN (2001683759 /* hypertension.htn_code */)
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
    SUM(
      CASE
        WHEN evidence = 1369371461 /* hypertension.antihypertensive */
        THEN n_rows
        ELSE 0
      END
    ) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 365 PRECEDING AND CURRENT ROW
    ) AS in_frame_0,
    SUM(
      CASE WHEN evidence = 2001683759 /* hypertension.htn_code */ THEN n_rows ELSE 0 END
    ) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 365 PRECEDING AND CURRENT ROW
    ) AS in_frame_1
  FROM evidence_events
  WHERE
    evidence IN (
      1369371461, /* hypertension.antihypertensive */
      2001683759 /* hypertension.htn_code */
    )
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
    SUM(CASE WHEN evidence = 16584386 /* type2_diabetes.dm_code */ THEN 1 ELSE 0 END) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 730 PRECEDING AND CURRENT ROW
    ) AS in_frame_0
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
    ) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 365 PRECEDING AND CURRENT ROW
    ) AS in_frame_0,
    SUM(
      CASE WHEN evidence = 872629348 /* type2_diabetes.dm_drug */ THEN n_rows ELSE 0 END
    ) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 365 PRECEDING AND CURRENT ROW
    ) AS in_frame_1
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
    SUM(CASE WHEN evidence = 2017758955 /* type2_diabetes.a1c_high */ THEN 1 ELSE 0 END) OVER (
      PARTITION BY patient_id
      ORDER BY day NULLS LAST
      RANGE BETWEEN 730 PRECEDING AND CURRENT ROW
    ) AS in_frame_0
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
-- reads: onset_heart_failure, onset_hypertension
SELECT
  patient_id,
  MIN(CASE WHEN condition = 'heart_failure' THEN onset_date END) AS onset_heart_failure,
  MIN(CASE WHEN condition = 'hypertension' THEN onset_date END) AS onset_hypertension
FROM (
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

-- stage index_dates [table]: index: the first encounter between 2015-01-01 and 2016-12-31
-- reads: encounter_summary
SELECT
  patient_id,
  first_in_window AS index_date
FROM encounter_summary
WHERE
  NOT first_in_window IS NULL;

-- stage window_counts [table]: per patient, evidence and encounters counted in windows around the index date
-- reads: encounter_rows, evidence_events, index_dates
SELECT
  i.patient_id,
  COALESCE(ev.charlson_myocardial_infarction, 0) AS charlson_myocardial_infarction,
  COALESCE(ev.charlson_congestive_heart_failure, 0) AS charlson_congestive_heart_failure,
  COALESCE(ev.charlson_peripheral_vascular_disease, 0) AS charlson_peripheral_vascular_disease,
  COALESCE(ev.charlson_cerebrovascular_disease, 0) AS charlson_cerebrovascular_disease,
  COALESCE(ev.charlson_dementia, 0) AS charlson_dementia,
  COALESCE(ev.charlson_chronic_pulmonary_disease, 0) AS charlson_chronic_pulmonary_disease,
  COALESCE(ev.charlson_rheumatic_disease, 0) AS charlson_rheumatic_disease,
  COALESCE(ev.charlson_peptic_ulcer_disease, 0) AS charlson_peptic_ulcer_disease,
  COALESCE(ev.charlson_mild_liver_disease, 0) AS charlson_mild_liver_disease,
  COALESCE(ev.charlson_diabetes_without_complications, 0) AS charlson_diabetes_without_complications,
  COALESCE(ev.charlson_diabetes_with_complications, 0) AS charlson_diabetes_with_complications,
  COALESCE(ev.charlson_hemiplegia_paraplegia, 0) AS charlson_hemiplegia_paraplegia,
  COALESCE(ev.charlson_renal_disease, 0) AS charlson_renal_disease,
  COALESCE(ev.charlson_malignancy, 0) AS charlson_malignancy,
  COALESCE(ev.charlson_moderate_severe_liver_disease, 0) AS charlson_moderate_severe_liver_disease,
  COALESCE(ev.charlson_metastatic_solid_tumour, 0) AS charlson_metastatic_solid_tumour,
  COALESCE(ev.charlson_hiv_aids, 0) AS charlson_hiv_aids,
  ev.first_evidence_type2_diabetes AS first_evidence_type2_diabetes,
  COALESCE(en.count_visits, 0) AS count_visits
FROM index_dates AS i
LEFT JOIN (
  SELECT
    patient_id,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 703042088 /* @charlson.myocardial_infarction */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_myocardial_infarction,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 1177630332 /* @charlson.congestive_heart_failure */
          AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_congestive_heart_failure,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 416310112 /* @charlson.peripheral_vascular_disease */
          AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_peripheral_vascular_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 1577684049 /* @charlson.cerebrovascular_disease */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_cerebrovascular_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 684695303 /* @charlson.dementia */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_dementia,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 294785012 /* @charlson.chronic_pulmonary_disease */
          AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_chronic_pulmonary_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 264104370 /* @charlson.rheumatic_disease */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_rheumatic_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 1714082935 /* @charlson.peptic_ulcer_disease */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_peptic_ulcer_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 300580152 /* @charlson.mild_liver_disease */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_mild_liver_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 696433381 /* @charlson.diabetes_without_complications */
          AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_diabetes_without_complications,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 1855815331 /* @charlson.diabetes_with_complications */
          AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_diabetes_with_complications,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 103697730 /* @charlson.hemiplegia_paraplegia */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_hemiplegia_paraplegia,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 752661743 /* @charlson.renal_disease */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_renal_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 1617294027 /* @charlson.malignancy */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_malignancy,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 2204522 /* @charlson.moderate_severe_liver_disease */
          AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_moderate_severe_liver_disease,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 1188480176 /* @charlson.metastatic_solid_tumour */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_metastatic_solid_tumour,
    COALESCE(
      SUM(
        CASE
          WHEN e.evidence = 818584883 /* @charlson.hiv_aids */ AND e_offset <= 0
          THEN e.n_rows
          ELSE 0
        END
      ),
      0
    ) AS charlson_hiv_aids,
    MIN(
      CASE
        WHEN e.evidence IN (
          2017758955, /* type2_diabetes.a1c_high */
          16584386, /* type2_diabetes.dm_code */
          872629348 /* type2_diabetes.dm_drug */
        )
        AND e_offset <= 0
        THEN e.event_date
      END
    ) AS first_evidence_type2_diabetes
  FROM (
    SELECT
      i.patient_id,
      e.evidence,
      e.event_date,
      e.n_rows,
      DATEDIFF(DAY, i.index_date, e.event_date) AS e_offset
    FROM index_dates AS i
    JOIN (
      SELECT
        patient_id,
        evidence,
        event_date,
        n_rows
      FROM evidence_events
      WHERE
        evidence IN (
          1577684049, /* @charlson.cerebrovascular_disease */
          294785012, /* @charlson.chronic_pulmonary_disease */
          1177630332, /* @charlson.congestive_heart_failure */
          684695303, /* @charlson.dementia */
          1855815331, /* @charlson.diabetes_with_complications */
          696433381, /* @charlson.diabetes_without_complications */
          103697730, /* @charlson.hemiplegia_paraplegia */
          818584883, /* @charlson.hiv_aids */
          1617294027, /* @charlson.malignancy */
          1188480176, /* @charlson.metastatic_solid_tumour */
          300580152, /* @charlson.mild_liver_disease */
          2204522, /* @charlson.moderate_severe_liver_disease */
          703042088, /* @charlson.myocardial_infarction */
          1714082935, /* @charlson.peptic_ulcer_disease */
          416310112, /* @charlson.peripheral_vascular_disease */
          752661743, /* @charlson.renal_disease */
          264104370, /* @charlson.rheumatic_disease */
          2017758955, /* type2_diabetes.a1c_high */
          16584386, /* type2_diabetes.dm_code */
          872629348 /* type2_diabetes.dm_drug */
        )
        AND event_date <= CAST('2016-12-31' AS DATE)
    ) AS e
      ON e.patient_id = i.patient_id AND e.event_date <= i.index_date
  ) AS e
  GROUP BY
    patient_id
) AS ev
  ON ev.patient_id = i.patient_id
LEFT JOIN (
  SELECT
    patient_id,
    SUM(CASE WHEN e_offset BETWEEN -365 AND -1 THEN 1 ELSE 0 END) AS count_visits
  FROM (
    SELECT DISTINCT
      e.patient_id,
      e.encounter_date,
      e.encounter_type,
      DATEDIFF(DAY, i.index_date, e.encounter_date) AS e_offset
    FROM encounter_rows AS e
    JOIN index_dates AS i
      ON i.patient_id = e.patient_id
      AND DATEDIFF(DAY, i.index_date, e.encounter_date) BETWEEN -365 AND 0
    WHERE
      e.encounter_date BETWEEN CAST('2014-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  ) AS v
  GROUP BY
    patient_id
) AS en
  ON en.patient_id = i.patient_id;

-- stage measure_covariates [table]: per patient, measurement covariates summarised in their windows
-- reads: derived_bmi, derived_egfr, index_dates, measurement_values
WITH baseline_values AS (
  SELECT
    v.patient_id,
    v.measure,
    v.obs_date,
    v.value,
    v.derived,
    DATEDIFF(DAY, i.index_date, v.obs_date) AS e_offset
  FROM (
    SELECT
      patient_id,
      measure,
      obs_date,
      value,
      derived
    FROM derived_bmi
    WHERE
      measure IN ('bmi', 'egfr', 'sbp')
      AND qualifier IS NULL
      AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
    UNION ALL
    SELECT
      patient_id,
      measure,
      obs_date,
      value,
      derived
    FROM derived_egfr
    WHERE
      measure IN ('bmi', 'egfr', 'sbp')
      AND qualifier IS NULL
      AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
    UNION ALL
    SELECT
      patient_id,
      measure,
      obs_date,
      value,
      derived
    FROM measurement_values
    WHERE
      measure IN ('bmi', 'egfr', 'sbp')
      AND qualifier IS NULL
      AND obs_date BETWEEN CAST('2013-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  ) AS v
  JOIN index_dates AS i
    ON i.patient_id = v.patient_id
    AND DATEDIFF(DAY, i.index_date, v.obs_date) BETWEEN -730 AND 0
)
SELECT
  i.patient_id,
  c0.m_bmi,
  c0.m_bmi_date,
  c0.m_bmi_derived,
  c1.m_sbp_mean,
  c2.m_sbp_max,
  c3.m_egfr,
  c3.m_egfr_date,
  c3.m_egfr_derived
FROM index_dates AS i
LEFT JOIN (
  SELECT
    patient_id,
    AVG(value) AS m_bmi,
    obs_date AS m_bmi_date,
    BOOL_OR(derived) AS m_bmi_derived
  FROM (
    SELECT
      patient_id,
      obs_date,
      value,
      derived,
      MAX(obs_date) OVER (PARTITION BY patient_id) AS last_date
    FROM (
      SELECT
        patient_id,
        obs_date,
        value,
        derived
      FROM baseline_values
      WHERE
        measure = 'bmi' AND e_offset BETWEEN -730 AND 0
    ) AS v
  ) AS r
  WHERE
    obs_date = last_date
  GROUP BY
    patient_id,
    obs_date
) AS c0
  ON c0.patient_id = i.patient_id
LEFT JOIN (
  SELECT
    patient_id,
    AVG(value) AS m_sbp_mean
  FROM (
    SELECT
      patient_id,
      obs_date,
      value,
      derived
    FROM baseline_values
    WHERE
      measure = 'sbp' AND e_offset BETWEEN -365 AND 0
  ) AS v
  GROUP BY
    patient_id
) AS c1
  ON c1.patient_id = i.patient_id
LEFT JOIN (
  SELECT
    patient_id,
    MAX(value) AS m_sbp_max
  FROM (
    SELECT
      patient_id,
      obs_date,
      value,
      derived
    FROM baseline_values
    WHERE
      measure = 'sbp' AND e_offset BETWEEN -365 AND 0
  ) AS v
  GROUP BY
    patient_id
) AS c2
  ON c2.patient_id = i.patient_id
LEFT JOIN (
  SELECT
    patient_id,
    AVG(value) AS m_egfr,
    obs_date AS m_egfr_date,
    BOOL_OR(derived) AS m_egfr_derived
  FROM (
    SELECT
      patient_id,
      obs_date,
      value,
      derived,
      MAX(obs_date) OVER (PARTITION BY patient_id) AS last_date
    FROM (
      SELECT
        patient_id,
        obs_date,
        value,
        derived
      FROM baseline_values
      WHERE
        measure = 'egfr' AND e_offset BETWEEN -730 AND 0
    ) AS v
  ) AS r
  WHERE
    obs_date = last_date
  GROUP BY
    patient_id,
    obs_date
) AS c3
  ON c3.patient_id = i.patient_id;

-- stage eligibility [table]: the source population with follow-up and one pass/fail column per eligibility step
-- reads: condition_onsets, encounter_summary, index_dates, patient_base, window_counts
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
  onset_hypertension,
  prevalent_heart_failure,
  horizon_end,
  followup_end,
  end_reason,
  COALESCE(sex IN ('F', 'M'), FALSE) AS step_1,
  COALESCE(death_date IS NULL OR death_date > index_date, FALSE) AS step_2,
  COALESCE(age_at_index BETWEEN 40 AND 85, FALSE) AS step_3,
  COALESCE(DATEDIFF(DAY, first_encounter, index_date) >= 730, FALSE) AS step_4
FROM (
  SELECT
    *,
    CASE
      WHEN death_date = followup_end
      THEN 'death'
      WHEN CAST('2019-12-31' AS DATE) = followup_end
      THEN 'end_of_data'
      WHEN CAST(DATE_ADD(last_encounter, 365) AS DATE) = followup_end
      THEN 'lost_contact'
      WHEN CAST(DATE_ADD(index_date, 1461) AS DATE) = followup_end
      THEN 'horizon'
    END AS end_reason
  FROM (
    SELECT
      *,
      CAST(DATE_ADD(index_date, 1461) AS DATE) AS horizon_end,
      LEAST(
        COALESCE(death_date, CAST('9999-12-31' AS DATE)),
        COALESCE(CAST('2019-12-31' AS DATE), CAST('9999-12-31' AS DATE)),
        COALESCE(CAST(DATE_ADD(last_encounter, 365) AS DATE), CAST('9999-12-31' AS DATE)),
        COALESCE(CAST(DATE_ADD(index_date, 1461) AS DATE), CAST('9999-12-31' AS DATE))
      ) AS followup_end
    FROM (
      SELECT
        *,
        COALESCE(NOT onset_heart_failure IS NULL AND onset_heart_failure <= index_date, FALSE) AS prevalent_heart_failure
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
          o.onset_hypertension
        FROM index_dates AS i
        JOIN patient_base AS p
          ON p.patient_id = i.patient_id
        JOIN encounter_summary AS s
          ON s.patient_id = i.patient_id
        LEFT JOIN condition_onsets AS o
          ON o.patient_id = i.patient_id
        LEFT JOIN window_counts AS w
          ON w.patient_id = i.patient_id
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
    ) AS n_4
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
  UNION ALL
  SELECT
    4,
    'history',
    'first encounter at least 730 days before index',
    n_3,
    n_3 - n_4,
    n_4
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
    WHEN NOT step_4
    THEN 'history'
  END AS excluded_at
FROM eligibility;

-- stage cohort [table]: the analysis table: one row per eligible patient
-- reads: eligibility, measure_covariates, window_counts
SELECT
  f.patient_id,
  f.index_date,
  CAST(f.age_at_index AS INT) AS age_at_index,
  f.sex,
  CAST(m.m_bmi AS DOUBLE) AS bmi,
  m.m_bmi_date AS bmi_date,
  m.m_bmi_derived AS bmi_derived,
  CAST(m.m_sbp_mean AS DOUBLE) AS sbp_mean,
  CAST(m.m_sbp_max AS DOUBLE) AS sbp_max,
  CAST(m.m_egfr AS DOUBLE) AS egfr,
  m.m_egfr_date AS egfr_date,
  m.m_egfr_derived AS egfr_derived,
  CAST(w.count_visits AS INT) AS visits,
  CAST(DATEDIFF(DAY, w.first_evidence_type2_diabetes, f.index_date) AS INT) AS dm_years,
  COALESCE(NOT f.onset_hypertension IS NULL AND f.onset_hypertension <= f.index_date, FALSE) AS htn,
  CAST(CASE WHEN COALESCE(w.charlson_myocardial_infarction, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_congestive_heart_failure, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_peripheral_vascular_disease, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_cerebrovascular_disease, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_dementia, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_chronic_pulmonary_disease, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_rheumatic_disease, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_peptic_ulcer_disease, 0) > 0 THEN 1 ELSE 0 END + CASE
    WHEN COALESCE(w.charlson_mild_liver_disease, 0) > 0
    AND NOT COALESCE(w.charlson_moderate_severe_liver_disease, 0) > 0
    THEN 1
    ELSE 0
  END + CASE
    WHEN COALESCE(w.charlson_diabetes_without_complications, 0) > 0
    AND NOT COALESCE(w.charlson_diabetes_with_complications, 0) > 0
    THEN 1
    ELSE 0
  END + CASE WHEN COALESCE(w.charlson_diabetes_with_complications, 0) > 0 THEN 2 ELSE 0 END + CASE WHEN COALESCE(w.charlson_hemiplegia_paraplegia, 0) > 0 THEN 2 ELSE 0 END + CASE WHEN COALESCE(w.charlson_renal_disease, 0) > 0 THEN 2 ELSE 0 END + CASE
    WHEN COALESCE(w.charlson_malignancy, 0) > 0
    AND NOT COALESCE(w.charlson_metastatic_solid_tumour, 0) > 0
    THEN 2
    ELSE 0
  END + CASE
    WHEN COALESCE(w.charlson_moderate_severe_liver_disease, 0) > 0
    THEN 3
    ELSE 0
  END + CASE WHEN COALESCE(w.charlson_metastatic_solid_tumour, 0) > 0 THEN 6 ELSE 0 END + CASE WHEN COALESCE(w.charlson_hiv_aids, 0) > 0 THEN 6 ELSE 0 END AS INT) AS charlson,
  CAST(CASE WHEN COALESCE(w.charlson_congestive_heart_failure, 0) > 0 THEN 2 ELSE 0 END + CASE WHEN COALESCE(w.charlson_dementia, 0) > 0 THEN 2 ELSE 0 END + CASE WHEN COALESCE(w.charlson_chronic_pulmonary_disease, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_rheumatic_disease, 0) > 0 THEN 1 ELSE 0 END + CASE
    WHEN COALESCE(w.charlson_mild_liver_disease, 0) > 0
    AND NOT COALESCE(w.charlson_moderate_severe_liver_disease, 0) > 0
    THEN 2
    ELSE 0
  END + CASE WHEN COALESCE(w.charlson_diabetes_with_complications, 0) > 0 THEN 1 ELSE 0 END + CASE WHEN COALESCE(w.charlson_hemiplegia_paraplegia, 0) > 0 THEN 2 ELSE 0 END + CASE WHEN COALESCE(w.charlson_renal_disease, 0) > 0 THEN 1 ELSE 0 END + CASE
    WHEN COALESCE(w.charlson_malignancy, 0) > 0
    AND NOT COALESCE(w.charlson_metastatic_solid_tumour, 0) > 0
    THEN 2
    ELSE 0
  END + CASE
    WHEN COALESCE(w.charlson_moderate_severe_liver_disease, 0) > 0
    THEN 4
    ELSE 0
  END + CASE WHEN COALESCE(w.charlson_metastatic_solid_tumour, 0) > 0 THEN 6 ELSE 0 END + CASE WHEN COALESCE(w.charlson_hiv_aids, 0) > 0 THEN 4 ELSE 0 END AS INT) AS charlson_quan,
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
    THEN DATEDIFF(DAY, f.index_date, f.onset_heart_failure)
  END AS INT) AS days_to_heart_failure,
  CAST(CASE
    WHEN NOT f.prevalent_heart_failure
    AND COALESCE(
      f.onset_heart_failure > f.index_date AND f.onset_heart_failure <= f.followup_end,
      FALSE
    )
    THEN DATEDIFF(DAY, f.index_date, f.onset_heart_failure)
    WHEN NOT f.prevalent_heart_failure
    THEN DATEDIFF(DAY, f.index_date, f.followup_end)
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
  f.followup_end,
  CAST(DATEDIFF(DAY, f.index_date, f.followup_end) AS INT) AS followup_days,
  f.end_reason
FROM eligibility AS f
LEFT JOIN window_counts AS w
  ON w.patient_id = f.patient_id
LEFT JOIN measure_covariates AS m
  ON m.patient_id = f.patient_id
WHERE
  f.step_1 AND f.step_2 AND f.step_3 AND f.step_4;

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
  patient_id NULLS LAST
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
              COALESCE(TRIM(CAST(birth_date AS STRING)), '') <> ''
              AND CASE
                WHEN CAST(birth_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
                THEN TRY_CAST(REGEXP_REPLACE(
                  TRIM(CAST(birth_date AS STRING)),
                  '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                  '$1-$3-$4'
                ) AS DATE)
              END IS NULL
            )
            OR (
              COALESCE(TRIM(CAST(death_date AS STRING)), '') <> ''
              AND CASE
                WHEN CAST(death_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
                THEN TRY_CAST(REGEXP_REPLACE(
                  TRIM(CAST(death_date AS STRING)),
                  '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                  '$1-$3-$4'
                ) AS DATE)
              END IS NULL
            )
            OR (
              COALESCE(TRIM(CAST(registration_date AS STRING)), '') <> ''
              AND CASE
                WHEN CAST(registration_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
                THEN TRY_CAST(REGEXP_REPLACE(
                  TRIM(CAST(registration_date AS STRING)),
                  '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                  '$1-$3-$4'
                ) AS DATE)
              END IS NULL
            )
            OR (
              COALESCE(TRIM(CAST(deregistration_date AS STRING)), '') <> ''
              AND CASE
                WHEN CAST(deregistration_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
                THEN TRY_CAST(REGEXP_REPLACE(
                  TRIM(CAST(deregistration_date AS STRING)),
                  '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                  '$1-$3-$4'
                ) AS DATE)
              END IS NULL
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
            CASE
              WHEN CAST(encounter_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
              THEN TRY_CAST(REGEXP_REPLACE(
                TRIM(CAST(encounter_date AS STRING)),
                '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                '$1-$3-$4'
              ) AS DATE)
            END AS row_date
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
            CASE
              WHEN CAST(event_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
              THEN TRY_CAST(REGEXP_REPLACE(
                TRIM(CAST(event_date AS STRING)),
                '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                '$1-$3-$4'
              ) AS DATE)
            END AS row_date,
            'diagnoses' AS source_table,
            CAST(code_system AS STRING) AS raw_system,
            CAST(code AS STRING) AS raw_code,
            CAST(source AS STRING) AS raw_source,
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
            CASE
              WHEN CAST(start_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
              THEN TRY_CAST(REGEXP_REPLACE(
                TRIM(CAST(start_date AS STRING)),
                '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                '$1-$3-$4'
              ) AS DATE)
            END AS row_date,
            'prescriptions' AS source_table,
            CAST(NULL AS STRING) AS raw_system,
            CAST(atc AS STRING) AS raw_code,
            CAST(NULL AS STRING) AS raw_source,
            CAST(DATEDIFF(
              DAY,
              CASE
                WHEN CAST(start_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
                THEN TRY_CAST(REGEXP_REPLACE(
                  TRIM(CAST(start_date AS STRING)),
                  '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                  '$1-$3-$4'
                ) AS DATE)
              END,
              CASE
                WHEN CAST(stop_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
                THEN TRY_CAST(REGEXP_REPLACE(
                  TRIM(CAST(stop_date AS STRING)),
                  '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
                  '$1-$3-$4'
                ) AS DATE)
              END
            ) + 1 AS INT) AS duration_days
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
          CASE
            WHEN CAST(obs_date AS STRING) RLIKE '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$'
            THEN TRY_CAST(REGEXP_REPLACE(
              TRIM(CAST(obs_date AS STRING)),
              '^\\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\\2([0-9]{1,2})([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\\.[0-9]+)?)?\\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\\s*$',
              '$1-$3-$4'
            ) AS DATE)
          END AS obs_date,
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
