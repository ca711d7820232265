-- The demo study's three outcomes, written by hand as an analyst would, for DuckDB.
--
-- The same cohort as definitions/studies/orvane_multimorbidity.yaml without its covariates:
-- index at the first contact in 2015-2016; women and men alive at index, aged 40 to 85, seen
-- at least 730 days before index, not already a case of all three conditions; follow-up to
-- death, 2019-12-31, a year after the last contact or four years (1,461 days) after index.
-- For each outcome (type 2 diabetes, CKD stage 3+, heart failure, as defined in
-- definitions/conditions/) it gives the onset date, prevalent at index and incident during
-- follow-up (NULL when prevalent).
--
-- It reads the Parquet files of a canonical synthetic extract from the working directory (or
-- DuckDB's file_search_path) and assumes what `ascertain synth` writes: typed dates, numeric
-- `value` with a few results only in `value_text` ('6,8', '>90', '<0.5'), the units synth
-- uses (HbA1c in % or mmol/mol, creatinine in mg/dL or umol/L, eGFR in mL/min/1.73m2), sex
-- spelt with stray case and spaces, codes dotted or not and in either case. It does not read
-- the other shapes the tool accepts (text dates, other unit spellings, FHIR, mapped tables).
-- benchmarks/outcome_only.py compares its result with the tool's cohort.parquet.

WITH
patients AS (
    SELECT
        patient_id,
        -- a birth year alone stands for 1 July of that year, as the tool reads it
        COALESCE(birth_date, MAKE_DATE(birth_year, 7, 1)) AS birth_date,
        UPPER(TRIM(sex)) AS sex,
        death_date
    FROM 'patients.parquet'
),

-- rows of known patients, dated on or before death and the end of the data
encounters AS (
    SELECT e.patient_id, e.encounter_date
    FROM 'encounters.parquet' AS e
    JOIN patients AS p USING (patient_id)
    WHERE e.encounter_date <= DATE '2019-12-31'
      AND (p.death_date IS NULL OR e.encounter_date <= p.death_date)
),

diagnoses AS (
    SELECT
        d.patient_id,
        d.event_date AS day,
        UPPER(TRIM(d.code_system)) AS code_system,
        REPLACE(REPLACE(UPPER(d.code), '.', ''), ' ', '') AS code
    FROM 'diagnoses.parquet' AS d
    JOIN patients AS p USING (patient_id)
    WHERE d.event_date <= DATE '2019-12-31'
      AND (p.death_date IS NULL OR d.event_date <= p.death_date)
),

prescriptions AS (
    SELECT r.patient_id, r.start_date AS day, UPPER(r.atc) AS atc
    FROM 'prescriptions.parquet' AS r
    JOIN patients AS p USING (patient_id)
    WHERE r.start_date <= DATE '2019-12-31'
      AND (p.death_date IS NULL OR r.start_date <= p.death_date)
),

-- lab results in canonical units (HbA1c %, creatinine mg/dL, eGFR mL/min/1.73m2), with the
-- comparison sign of a text result ('>90') kept apart; implausible values are dropped
labs AS (
    SELECT patient_id, day, measure, sign, value
    FROM (
        SELECT
            m.patient_id,
            m.obs_date AS day,
            m.measure,
            CASE WHEN m.value IS NULL THEN NULLIF(REGEXP_EXTRACT(m.value_text, '^[<>]=?'), '') END AS sign,
            CASE
                WHEN m.measure = 'hba1c' AND m.unit = 'mmol/mol' THEN 0.09148 * n.number + 2.152
                WHEN m.measure = 'creatinine' AND m.unit IN ('umol/L', 'µmol/L') THEN n.number / 88.42
                ELSE n.number
            END AS value
        FROM 'measurements.parquet' AS m
        JOIN patients AS p USING (patient_id)
        CROSS JOIN LATERAL (
            SELECT COALESCE(
                m.value,
                TRY_CAST(REPLACE(REGEXP_REPLACE(m.value_text, '^[<>]=?\s*', ''), ',', '.') AS DOUBLE)
            ) AS number
        ) AS n
        WHERE m.measure IN ('hba1c', 'creatinine', 'egfr')
          AND m.obs_date <= DATE '2019-12-31'
          AND (p.death_date IS NULL OR m.obs_date <= p.death_date)
    )
    WHERE (measure = 'hba1c' AND value BETWEEN 3 AND 20)
       OR (measure = 'creatinine' AND value BETWEEN 0.1 AND 20)
       OR (measure = 'egfr' AND value BETWEEN 1 AND 200)
),

-- eGFR by CKD-EPI 2021 (Inker et al., N Engl J Med 2021; from memory) from an exact
-- creatinine result, on days without a reported eGFR
egfr AS (
    SELECT patient_id, day, sign, value FROM labs WHERE measure = 'egfr'
    UNION ALL
    SELECT patient_id, day, NULL AS sign, value
    FROM (
        SELECT
            c.patient_id,
            c.day,
            142
            * POWER(LEAST(c.value / k.kappa, 1), k.alpha)
            * POWER(GREATEST(c.value / k.kappa, 1), -1.2)
            * POWER(0.9938, DATE_SUB('year', p.birth_date, c.day))
            * k.female AS value
        FROM labs AS c
        JOIN patients AS p USING (patient_id)
        JOIN (VALUES ('F', 0.7, -0.241, 1.012), ('M', 0.9, -0.302, 1.0))
            AS k (sex, kappa, alpha, female) ON k.sex = p.sex
        WHERE c.measure = 'creatinine' AND c.sign IS NULL
          AND NOT EXISTS (
              SELECT 1 FROM labs AS r
              WHERE r.measure = 'egfr' AND r.patient_id = c.patient_id AND r.day = c.day
          )
    )
    WHERE value BETWEEN 1 AND 200
),

-- one row per patient, piece of evidence and day
evidence AS (
    SELECT DISTINCT patient_id, day,
        CASE
            WHEN (code_system = 'ICD10' AND code LIKE 'E11%')
              OR (code_system = 'ICD9' AND code LIKE '250%'
                  AND NOT REGEXP_MATCHES(code, '^250[0-9][13]'))  -- type 1: fifth digit 1 or 3
                THEN 'dm_code'
            WHEN (code_system = 'ICD10' AND REGEXP_MATCHES(code, '^N18[3-6]'))
              OR (code_system = 'ICD9' AND REGEXP_MATCHES(code, '^585[3-6]'))
                THEN 'ckd_code'
            WHEN (code_system = 'ICD10' AND REGEXP_MATCHES(code, '^(I50|I110|I130|I132)'))
              OR (code_system = 'ICD9' AND REGEXP_MATCHES(code, '^(428|402[019]1|404[019][13])'))
                THEN 'hf_code'
        END AS kind
    FROM diagnoses
    UNION
    SELECT patient_id, day,
        CASE WHEN atc LIKE 'A10B%' THEN 'dm_drug' WHEN atc LIKE 'C03C%' THEN 'loop_diuretic' END
    FROM prescriptions
    UNION
    SELECT patient_id, day, 'a1c_high' FROM labs
    WHERE measure = 'hba1c' AND value >= 6.5 AND COALESCE(sign, '>') IN ('>', '>=')
    UNION
    SELECT patient_id, day, 'egfr_low' FROM egfr
    WHERE (sign IS NULL AND value < 60) OR (sign = '<' AND value <= 60) OR (sign = '<=' AND value < 60)
),

-- for every evidence day: the previous day with the same evidence, and the latest day up to
-- it with each kind of evidence the two-kind rules need
timeline AS (
    SELECT
        patient_id, day, kind,
        LAG(day) OVER (PARTITION BY patient_id, kind ORDER BY day) AS previous_same,
        MIN(day) OVER (PARTITION BY patient_id, kind) AS first_same,
        MAX(CASE WHEN kind = 'dm_code' THEN day END) OVER by_day AS last_dm_code,
        MAX(CASE WHEN kind = 'dm_drug' THEN day END) OVER by_day AS last_dm_drug,
        MAX(CASE WHEN kind = 'hf_code' THEN day END) OVER by_day AS last_hf_code,
        MAX(CASE WHEN kind = 'loop_diuretic' THEN day END) OVER by_day AS last_loop_diuretic
    FROM evidence
    WHERE kind IS NOT NULL
    WINDOW by_day AS (PARTITION BY patient_id ORDER BY day)
),

onsets AS (
    SELECT
        patient_id,
        MIN(day) FILTER (
            -- two diabetes codes, or two high HbA1c, on different days within 730 days
            (kind IN ('dm_code', 'a1c_high') AND day - previous_same <= 730)
            -- a code and a glucose-lowering drug within 365 days
            OR (day - last_dm_code <= 365 AND day - last_dm_drug <= 365)
        ) AS onset_type2_diabetes,
        MIN(day) FILTER (
            -- two low eGFR at least 90 days apart, or two CKD codes within 730 days
            (kind = 'egfr_low' AND day - first_same >= 90)
            OR (kind = 'ckd_code' AND day - previous_same <= 730)
        ) AS onset_ckd,
        MIN(day) FILTER (
            (kind = 'hf_code' AND day - previous_same <= 730)
            OR (day - last_hf_code <= 365 AND day - last_loop_diuretic <= 365)
        ) AS onset_heart_failure
    FROM timeline
    GROUP BY patient_id
),

contacts AS (
    SELECT
        patient_id,
        MIN(encounter_date) AS first_contact,
        MAX(encounter_date) AS last_contact,
        MIN(encounter_date) FILTER (
            encounter_date BETWEEN DATE '2015-01-01' AND DATE '2016-12-31'
        ) AS index_date
    FROM encounters
    GROUP BY patient_id
),

population AS (
    SELECT
        p.patient_id,
        p.sex,
        p.death_date,
        c.index_date,
        c.first_contact,
        DATE_SUB('year', p.birth_date, c.index_date) AS age,
        LEAST(
            COALESCE(p.death_date, DATE '2019-12-31'),
            DATE '2019-12-31',
            CAST(c.last_contact + 365 AS DATE),
            CAST(c.index_date + 1461 AS DATE)
        ) AS followup_end,
        o.onset_type2_diabetes,
        o.onset_ckd,
        o.onset_heart_failure,
        COALESCE(o.onset_type2_diabetes <= c.index_date, FALSE) AS prevalent_type2_diabetes,
        COALESCE(o.onset_ckd <= c.index_date, FALSE) AS prevalent_ckd,
        COALESCE(o.onset_heart_failure <= c.index_date, FALSE) AS prevalent_heart_failure
    FROM patients AS p
    JOIN contacts AS c USING (patient_id)
    LEFT JOIN onsets AS o USING (patient_id)
    WHERE c.index_date IS NOT NULL
)

SELECT
    patient_id,
    index_date,
    followup_end,
    prevalent_type2_diabetes,
    CASE WHEN NOT prevalent_type2_diabetes
        THEN COALESCE(onset_type2_diabetes > index_date AND onset_type2_diabetes <= followup_end, FALSE)
    END AS incident_type2_diabetes,
    onset_type2_diabetes,
    prevalent_ckd,
    CASE WHEN NOT prevalent_ckd
        THEN COALESCE(onset_ckd > index_date AND onset_ckd <= followup_end, FALSE)
    END AS incident_ckd,
    onset_ckd,
    prevalent_heart_failure,
    CASE WHEN NOT prevalent_heart_failure
        THEN COALESCE(onset_heart_failure > index_date AND onset_heart_failure <= followup_end, FALSE)
    END AS incident_heart_failure,
    onset_heart_failure
FROM population
WHERE sex IN ('F', 'M')
  AND (death_date IS NULL OR death_date > index_date)
  AND age BETWEEN 40 AND 85
  AND index_date - first_contact >= 730
  AND NOT (prevalent_type2_diabetes AND prevalent_ckd AND prevalent_heart_failure)
ORDER BY patient_id
