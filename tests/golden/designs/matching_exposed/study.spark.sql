-- plan for study design_matching_exposed (32 stages, dialect spark)

-- reads src_patients: patient_id, sex, death_date, birth_date, birth_year, practice_id, registration_date, deregistration_date

-- reads src_encounters: patient_id, encounter_date, encounter_type

-- reads src_diagnoses: patient_id, event_date, code_system, code, source

-- reads src_prescriptions: patient_id, start_date, atc, stop_date

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
  MIN(CASE WHEN FALSE THEN encounter_date END) AS first_in_window
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
  ('ATC', 'A10BB', 2032589656, NULL, NULL, FALSE),
  ('ATC', 'A10BH', 1640576594, NULL, NULL, FALSE),
  ('ATC', 'C03C', 2082671494, NULL, NULL, FALSE),
  ('ICD10', 'I110', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I130', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I132', 2055434026, NULL, NULL, FALSE),
  ('ICD10', 'I50', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40201', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40211', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40291', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40401', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40403', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40411', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40413', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40491', 2055434026, NULL, NULL, FALSE),
  ('ICD9', '40493', 2055434026, NULL, NULL, FALSE),
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
-- reads: coded_evidence_days
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

-- stage condition_onsets [table]: each condition's onset per patient, one column per condition the table needs
-- reads: onset_heart_failure
SELECT
  patient_id,
  MIN(CASE WHEN condition = 'heart_failure' THEN onset_date END) AS onset_heart_failure
FROM (
  SELECT
    patient_id,
    'heart_failure' AS condition,
    onset_date
  FROM onset_heart_failure
) AS onsets
GROUP BY
  patient_id;

-- stage index_dates [table]: index: the first record of an exposure group (sulfonylurea, dpp4) between 2015-01-01 and 2016-12-31
-- reads: evidence_events
WITH starts AS (
  SELECT
    e.patient_id,
    MIN(e.day) AS first_day
  FROM evidence_events AS e
  JOIN VALUES
    (1640576594, 'dpp4'),
    (2032589656, 'sulfonylurea') AS g(evidence, exposure_group)
    ON g.evidence = e.evidence
  WHERE
    e.event_date BETWEEN CAST('2015-01-01' AS DATE) AND CAST('2016-12-31' AS DATE)
  GROUP BY
    e.patient_id
), around AS (
  SELECT
    e.patient_id,
    e.event_date,
    e.day,
    s.first_day,
    g.exposure_group
  FROM evidence_events AS e
  JOIN VALUES
    (1640576594, 'dpp4'),
    (2032589656, 'sulfonylurea') AS g(evidence, exposure_group)
    ON g.evidence = e.evidence
  JOIN starts AS s
    ON s.patient_id = e.patient_id
  WHERE
    e.day BETWEEN s.first_day - 365 AND s.first_day
)
SELECT
  patient_id,
  MIN(CASE WHEN day = first_day THEN event_date END) AS index_date,
  CASE
    WHEN COUNT(DISTINCT CASE WHEN day = first_day THEN exposure_group END) = 1
    THEN MIN(CASE WHEN day = first_day THEN exposure_group END)
  END AS exposure,
  CAST(COUNT(DISTINCT CASE WHEN day = first_day THEN exposure_group END) AS INT) AS exposure_groups_at_index,
  CAST(COUNT(CASE WHEN day < first_day THEN 1 END) AS INT) AS exposure_washout_records
FROM around
GROUP BY
  patient_id;

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
  exposure,
  exposure_groups_at_index,
  exposure_washout_records,
  onset_heart_failure,
  prevalent_heart_failure,
  horizon_end,
  followup_end,
  end_reason,
  COALESCE(exposure_washout_records = 0, FALSE) AS step_1,
  COALESCE(exposure_groups_at_index = 1, FALSE) AS step_2,
  COALESCE(death_date IS NULL OR death_date > index_date, FALSE) AS step_3,
  COALESCE(age_at_index BETWEEN 40 AND 85, FALSE) AS step_4
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
          i.exposure,
          i.exposure_groups_at_index,
          i.exposure_washout_records,
          s.first_encounter,
          s.last_encounter,
          YEAR(i.index_date) - YEAR(p.birth_date) - CASE
            WHEN MONTH(i.index_date) * 100 + DAY(i.index_date) < MONTH(p.birth_date) * 100 + DAY(p.birth_date)
            THEN 1
            ELSE 0
          END AS age_at_index,
          o.onset_heart_failure
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
    'the first record of an exposure group (sulfonylurea, dpp4) between 2015-01-01 and 2016-12-31',
    n_0,
    0,
    n_0
  FROM totals
  UNION ALL
  SELECT
    1,
    'new_user',
    'no record of any exposure group (sulfonylurea, dpp4) in the 365 days before index (a new user)',
    n_0,
    n_0 - n_1,
    n_1
  FROM totals
  UNION ALL
  SELECT
    2,
    'one_exposure_group',
    'a record of one exposure group only on the index day',
    n_1,
    n_1 - n_2,
    n_2
  FROM totals
  UNION ALL
  SELECT
    3,
    'alive_at_index',
    'alive at index (no death on or before the index date)',
    n_2,
    n_2 - n_3,
    n_3
  FROM totals
  UNION ALL
  SELECT
    4,
    'age',
    'age at index between 40 and 85 years',
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
    THEN 'new_user'
    WHEN NOT step_2
    THEN 'one_exposure_group'
    WHEN NOT step_3
    THEN 'alive_at_index'
    WHEN NOT step_4
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
  f.exposure,
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
-- reads: src_diagnoses, src_encounters, src_patients, src_prescriptions
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
FROM src_prescriptions;

-- stage quality_log [table]: every extract row: used, or set aside with the first reason that applies
-- reads: diagnoses_judged, distinct_codes, encounters_judged, patient_base, patients_judged, prescriptions_judged, src_diagnoses, src_encounters, src_patients, src_prescriptions
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

-- stage matching_pool [table]: the extract's patients with matching variables, registration and first exposure or outcome onset
-- reads: condition_onsets, evidence_events, patient_base
SELECT
  p.patient_id,
  p.sex,
  CAST(YEAR(p.birth_date) AS INT) AS birth_year,
  p.practice_id,
  p.registration_date,
  p.deregistration_date,
  p.death_date,
  f.excluded_from
FROM patient_base AS p
LEFT JOIN (
  SELECT
    patient_id,
    MIN(first_day) AS excluded_from
  FROM (
    SELECT
      e.patient_id,
      e.event_date AS first_day
    FROM evidence_events AS e
    JOIN VALUES
      (1640576594, 'dpp4'),
      (2032589656, 'sulfonylurea') AS g(evidence, exposure_group)
      ON g.evidence = e.evidence
    UNION ALL
    SELECT
      patient_id,
      onset_heart_failure AS first_day
    FROM condition_onsets
    WHERE
      NOT onset_heart_failure IS NULL
  ) AS d
  GROUP BY
    patient_id
) AS f
  ON f.patient_id = p.patient_id;

-- stage matching_contact_spells [table]: spells in contact: contacts at most 180 days apart, to the last + 180
-- reads: encounter_rows, matching_pool
SELECT
  patient_id,
  MIN(contact_date) AS spell_start,
  CAST(DATE_ADD(MAX(contact_date), 180) AS DATE) AS spell_end
FROM (
  SELECT
    patient_id,
    contact_date,
    SUM(starts) OVER (
      PARTITION BY patient_id
      ORDER BY contact_date NULLS LAST
      ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW
    ) AS spell
  FROM (
    SELECT
      patient_id,
      contact_date,
      CASE
        WHEN LAG(contact_date) OVER (PARTITION BY patient_id ORDER BY contact_date NULLS LAST) >= CAST(DATE_ADD(contact_date, -180) AS DATE)
        THEN 0
        ELSE 1
      END AS starts
    FROM (
      SELECT DISTINCT
        c.patient_id,
        c.contact_date
      FROM (
        SELECT
          patient_id,
          encounter_date AS contact_date
        FROM encounter_rows
      ) AS c
      JOIN matching_pool AS q
        ON q.patient_id = c.patient_id
    ) AS d
  ) AS m
) AS n
GROUP BY
  patient_id,
  spell;

-- stage matching_sets [table]: one set per new user of sulfonylurea, dated on the index date
-- reads: cohort, patient_base
SELECT
  CAST(ROW_NUMBER() OVER (ORDER BY c.index_date NULLS LAST, c.patient_id NULLS LAST) AS INT) AS set_id,
  c.patient_id,
  c.index_date AS set_date,
  c.sex,
  CAST(YEAR(p.birth_date) AS INT) AS birth_year,
  p.practice_id
FROM cohort AS c
JOIN patient_base AS p
  ON p.patient_id = c.patient_id
WHERE
  c.exposure = 'sulfonylurea';

-- stage matching_candidates [table]: every eligible control of every set, with its draw key (MD5 of seed, case, control)
-- reads: matching_contact_spells, matching_pool, matching_sets
SELECT
  s.set_id,
  q.patient_id,
  q.sex,
  q.birth_year,
  q.practice_id,
  MD5(
    CONCAT(
      '7',
      '|',
      COALESCE(CAST(s.patient_id AS STRING), ''),
      '|',
      COALESCE(CAST(q.patient_id AS STRING), '')
    )
  ) AS draw_key
FROM matching_sets AS s
CROSS JOIN VALUES
  (-1),
  (0),
  (1) AS o(year_offset)
JOIN matching_pool AS q
  ON q.sex = s.sex AND q.birth_year = s.birth_year + o.year_offset AND TRUE
JOIN matching_contact_spells AS k
  ON k.patient_id = q.patient_id AND s.set_date BETWEEN k.spell_start AND k.spell_end
WHERE
  q.patient_id <> s.patient_id
  AND (
    q.registration_date IS NULL OR q.registration_date <= s.set_date
  )
  AND (
    q.deregistration_date IS NULL OR q.deregistration_date >= s.set_date
  )
  AND (
    q.death_date IS NULL OR q.death_date >= s.set_date
  )
  AND (
    q.excluded_from IS NULL OR q.excluded_from > s.set_date
  );

-- stage matching_limits [table]: the most ranked candidates each set's fill without replacement can reach
-- reads: matching_sets
SELECT
  s.set_id,
  3 * (
    1 + COUNT(e.set_id)
  ) AS draw_limit
FROM matching_sets AS s
CROSS JOIN VALUES
  (-2),
  (-1),
  (0),
  (1),
  (2) AS o(year_offset)
LEFT JOIN matching_sets AS e
  ON e.sex = s.sex
  AND e.birth_year = s.birth_year + o.year_offset
  AND e.set_id < s.set_id
  AND TRUE
GROUP BY
  s.set_id;

-- stage matching_draws [table]: candidates ranked by draw key within each set, as far as the fill can need them
-- reads: matching_candidates, matching_limits
SELECT
  r.set_id,
  r.patient_id,
  r.sex,
  r.birth_year,
  r.practice_id,
  r.draw_rank
FROM (
  SELECT
    set_id,
    patient_id,
    sex,
    birth_year,
    practice_id,
    CAST(ROW_NUMBER() OVER (PARTITION BY set_id ORDER BY draw_key NULLS LAST, patient_id NULLS LAST) AS INT) AS draw_rank
  FROM matching_candidates
) AS r
JOIN matching_limits AS l
  ON l.set_id = r.set_id
WHERE
  r.draw_rank <= l.draw_limit;
