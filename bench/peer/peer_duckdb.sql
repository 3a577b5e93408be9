-- Benchmark peer (DuckDB): the methotrexate monitoring study, from raw extracts to the figures,
-- as one SQL script. peer_duckdb.py sets three variables and writes the final row out:
--   extracts_glob  'DIR/*.csv'            key_hex  64 hex digits      index_date  'YYYY-MM-DD'
-- Everything else is hard-coded from the policy files named beside each block.
--
-- Pseudonyms: DuckDB has no HMAC function, but sha256() takes a BLOB, so HMAC-SHA256 is built
-- here in SQL from its definition, H((K ^ opad) || H((K ^ ipad) || m)), with no Python UDF. The
-- message is the same bytes crates/sluice-link/src/pseudonym.rs hashes and the pseudonym is the
-- first 8 bytes read big-endian, so the pseudonyms equal sluice's.

-- --- the key: ipad and opad blocks (64 bytes: the 32 key bytes, then zeros) -------------------
CREATE TEMP TABLE hmac_key AS
SELECT unhex(string_agg(printf('%02x', xor(('0x' || substr(h, 2 * i + 1, 2))::INTEGER, 54)), '' ORDER BY i) || repeat('36', 32)) AS ipad,
       unhex(string_agg(printf('%02x', xor(('0x' || substr(h, 2 * i + 1, 2))::INTEGER, 92)), '' ORDER BY i) || repeat('5c', 32)) AS opad
FROM (SELECT getvariable('key_hex') AS h), range(32) t(i);

CREATE TEMP MACRO hmac64(msg, ipad, opad) AS
    ('0x' || substr(sha256(opad || unhex(sha256(ipad || msg))), 1, 16))::UBIGINT;

-- --- policies/profiles/quillmere.toml and policies/analytes.toml ----------------------------
CREATE TEMP TABLE setting_codes(code VARCHAR, setting VARCHAR);
INSERT INTO setting_codes VALUES ('GPR', 'community'), ('OPD', 'outpatient'), ('RHEUM', 'outpatient'),
    ('WARD', 'inpatient'), ('AMU', 'inpatient'), ('ED', 'emergency');
CREATE TEMP TABLE status_codes(code VARCHAR, status VARCHAR);
INSERT INTO status_codes VALUES ('F', 'final'), ('C', 'amended'), ('X', 'cancelled');
CREATE TEMP TABLE analyte_codes(code VARCHAR, analyte VARCHAR);
INSERT INTO analyte_codes VALUES ('NA', 'sodium'), ('K', 'potassium'), ('UREA', 'urea'),
    ('CREA', 'creatinine'), ('EGFR', 'egfr'), ('GLU', 'glucose'), ('HBA1C', 'hba1c'), ('TSH', 'tsh'),
    ('ACA', 'adjusted_calcium'), ('MG', 'magnesium'), ('PHOS', 'phosphate'), ('CK', 'ck'),
    ('ALT', 'alt'), ('AST', 'ast'), ('ALB', 'albumin'), ('HB', 'haemoglobin'), ('WBC', 'wbc'),
    ('NEUT', 'neutrophils'), ('LYMPH', 'lymphocytes'), ('EOS', 'eosinophils'), ('PLT', 'platelets'),
    ('MCV', 'mcv'), ('INR', 'inr');
-- Local unit text -> UCUM. The profile has no "mg/dL" or "g/dL" code (sluice would quarantine
-- such rows as an unknown unit); this peer accepts them and converts.
CREATE TEMP TABLE unit_codes(code VARCHAR, ucum VARCHAR);
INSERT INTO unit_codes VALUES ('mmol/L', 'mmol/L'), ('umol/L', 'umol/L'), ('mL/min/1.73m2', 'mL/min/{1.73_m2}'),
    ('mmol/mol', 'mmol/mol'), ('mU/L', 'm[IU]/L'), ('U/L', 'U/L'), ('g/L', 'g/L'), ('x10^9/L', '10*9/L'),
    ('fL', 'fL'), ('ratio', '{INR}'), ('mg/dL', 'mg/dL'), ('g/dL', 'g/dL');
-- Accepted units per analyte with the factor to the canonical unit.
CREATE TEMP TABLE unit_factors(analyte VARCHAR, ucum VARCHAR, factor DOUBLE);
INSERT INTO unit_factors VALUES ('sodium', 'mmol/L', 1), ('potassium', 'mmol/L', 1), ('urea', 'mmol/L', 1),
    ('creatinine', 'umol/L', 1), ('creatinine', 'mg/dL', 88.42), ('egfr', 'mL/min/{1.73_m2}', 1),
    ('glucose', 'mmol/L', 1), ('glucose', 'mg/dL', 0.0555), ('hba1c', 'mmol/mol', 1), ('tsh', 'm[IU]/L', 1),
    ('adjusted_calcium', 'mmol/L', 1), ('magnesium', 'mmol/L', 1), ('phosphate', 'mmol/L', 1),
    ('ck', 'U/L', 1), ('alt', 'U/L', 1), ('ast', 'U/L', 1), ('albumin', 'g/L', 1), ('albumin', 'g/dL', 10),
    ('haemoglobin', 'g/L', 1), ('haemoglobin', 'g/dL', 10),
    ('wbc', '10*9/L', 1), ('wbc', '10*3/uL', 1), ('neutrophils', '10*9/L', 1), ('neutrophils', '10*3/uL', 1),
    ('lymphocytes', '10*9/L', 1), ('lymphocytes', '10*3/uL', 1), ('eosinophils', '10*9/L', 1),
    ('eosinophils', '10*3/uL', 1), ('platelets', '10*9/L', 1), ('platelets', '10*3/uL', 1),
    ('mcv', 'fL', 1), ('inr', '{INR}', 1);

-- --- policies/tags/dmard.toml (bit: 1 monitoring, 2 methotrexate, 4.. the other DMARDs) -------
CREATE TEMP TABLE tag_literal(bit INTEGER, pattern VARCHAR);
INSERT INTO tag_literal VALUES
    (1, '\b(?:monitoring|monitor|dmard bloods|shared care|drug bloods)\b'),
    (2, '\b(?:methotrexate|mtx)\b'),
    (4, '\b(?:leflunomide|arava)\b'),
    (8, '\b(?:sulfasalazine|sulphasalazine|ssz)\b'),
    (16, '\b(?:hydroxychloroquine|hcq)\b'),
    (32, '\b(?:azathioprine|aza)\b'),
    (64, '\b(?:mycophenolate|mmf)\b');
-- Fuzzy terms: one word within the dictionary's default distance (0 below 5 letters, 1 for 5-8,
-- 2 from 9). DuckDB's damerau_levenshtein is the unrestricted distance where sluice uses optimal
-- string alignment; they differ only on rare strings (OSA is never smaller), not on the synthetic
-- misspellings.
CREATE TEMP TABLE tag_fuzzy AS
SELECT bit, term, CASE WHEN length(term) < 5 THEN 0 WHEN length(term) <= 8 THEN 1 ELSE 2 END AS d
FROM (VALUES (1, 'monitoring'), (2, 'methotrexate'), (4, 'leflunomide'), (8, 'sulfasalazine'),
             (8, 'sulphasalazine'), (16, 'hydroxychloroquine'), (32, 'azathioprine'), (64, 'mycophenolate')) t(bit, term);

-- --- policies/reference/critical-limits.toml ------------------------------------------------
CREATE TEMP TABLE critical_limits(analyte VARCHAR, low DOUBLE, high DOUBLE, strict BOOLEAN);
INSERT INTO critical_limits VALUES ('sodium', 120, 160, false), ('potassium', 2.5, 6.5, false),
    ('urea', NULL, 30, false), ('creatinine', NULL, 354, false), ('glucose', 2.5, 25, false),
    ('adjusted_calcium', 1.8, 3.5, false), ('magnesium', 0.4, NULL, false), ('phosphate', 0.3, NULL, false),
    ('alt', NULL, 600, false), ('ck', NULL, 5000, false), ('haemoglobin', 60, NULL, true),
    ('neutrophils', 0.5, NULL, true), ('platelets', 30, NULL, true), ('inr', NULL, 8, true);

-- --- policies/studies/mtx-monitoring.toml (index date from the command line) ------------------
CREATE TEMP TABLE study AS
SELECT idx - INTERVAL 12 MONTH AS base_from, idx AS base_to, idx AS fu_from, idx + INTERVAL 12 MONTH AS fu_to,
       (idx - INTERVAL 12 MONTH) - INTERVAL 12 MONTH AS exclude_from,
       (idx - INTERVAL 12 MONTH) - INTERVAL 3 MONTH AS stable_by
FROM (SELECT getvariable('index_date')::DATE AS idx);
CREATE TEMP TABLE worse(analyte VARCHAR, higher BOOLEAN);
INSERT INTO worse VALUES ('wbc', false), ('neutrophils', false), ('lymphocytes', false), ('platelets', false),
    ('mcv', true), ('alt', true), ('albumin', false), ('creatinine', true), ('egfr', false);

-- --- read every extract; rows with the wrong number of fields are rejected and counted --------
CREATE TEMP TABLE raw AS
SELECT row_number() OVER () AS seq, *   -- extract order (files in name order, rows in file order)
FROM read_csv(getvariable('extracts_glob'), header = true, delim = ',', quote = '"', escape = '"',
              auto_detect = false, ignore_errors = true, store_rejects = true, null_padding = false,
              columns = {'NHS_NUMBER': 'VARCHAR', 'HOSP_NO': 'VARCHAR', 'DOB': 'VARCHAR', 'SEX': 'VARCHAR',
                         'POSTCODE': 'VARCHAR', 'GP_CODE': 'VARCHAR', 'SPECIMEN_NO': 'VARCHAR',
                         'COLLECTED': 'VARCHAR', 'LOCATION': 'VARCHAR', 'CLINICAL_DETAILS': 'VARCHAR',
                         'TEST_CODE': 'VARCHAR', 'RESULT': 'VARCHAR', 'UNITS': 'VARCHAR',
                         'RESULT_STATUS': 'VARCHAR', 'REPORTED': 'VARCHAR'});
CREATE TEMP TABLE rows_read AS
SELECT (SELECT count(*) FROM raw) + (SELECT count(DISTINCT (scan_id, file_id, line)) FROM reject_errors) AS n;

-- --- NHS numbers: modulus 11 on the distinct values ---------------------------------------
CREATE TEMP TABLE nhs AS
WITH d AS (SELECT DISTINCT coalesce(NHS_NUMBER, '') AS raw, regexp_replace(trim(coalesce(NHS_NUMBER, '')), '[ -]', '', 'g') AS n FROM raw),
c AS (SELECT raw, n, CASE WHEN regexp_full_match(n, '[0-9]{10}')
        THEN 11 - list_sum(list_transform(range(9), lambda i: (ascii(substr(n, i + 1, 1)) - 48) * (10 - i))) % 11 END AS c FROM d)
SELECT raw, CASE WHEN c IS NOT NULL AND c % 11 = ascii(substr(n, 10, 1)) - 48 AND c <> 10
                  AND n <> repeat(substr(n, 1, 1), 10) THEN n END AS nhs
FROM c;

-- --- tags of the distinct notes -------------------------------------------------------------
CREATE TEMP TABLE notes AS
WITH n AS (SELECT DISTINCT coalesce(CLINICAL_DETAILS, '') AS notes FROM raw),
lit AS (SELECT notes, bit_or(bit) AS m FROM n JOIN tag_literal ON regexp_matches(lower(notes), pattern) GROUP BY notes),
w AS (SELECT DISTINCT notes, unnest(string_split_regex(lower(notes), '[^\pL\pN]+')) AS word FROM n),
dw AS (SELECT DISTINCT word FROM w WHERE word <> ''),
fw AS (SELECT word, bit_or(bit) AS m FROM dw JOIN tag_fuzzy ON abs(length(word) - length(term)) <= d
        AND damerau_levenshtein(word, term) <= d GROUP BY word),
fz AS (SELECT notes, bit_or(m) AS m FROM w JOIN fw USING (word) GROUP BY notes)
SELECT n.notes, coalesce(lit.m, 0) | coalesce(fz.m, 0) AS tags
FROM n LEFT JOIN lit USING (notes) LEFT JOIN fz USING (notes);

-- --- validation, as sluice-source does it ---------------------------------------------------
CREATE TEMP TABLE parsed AS
SELECT r.seq, nhs.nhs, trim(coalesce(r.HOSP_NO, '')) AS local_id,
       trim(coalesce(r.NHS_NUMBER, '')) = '' AS nhs_blank,
       trim(coalesce(r.DOB, '')) AS dob_raw, try_strptime(trim(r.DOB), '%Y-%m-%d')::DATE AS dob,
       trim(coalesce(r.SEX, '')) AS sex, trim(coalesce(r.SPECIMEN_NO, '')) AS specimen,
       try_strptime(trim(r.COLLECTED), '%Y-%m-%d %H:%M') AS collected,
       trim(coalesce(r.REPORTED, '')) AS reported_raw, try_strptime(trim(r.REPORTED), '%Y-%m-%d %H:%M') AS reported,
       s.setting, st.status, a.analyte, trim(coalesce(r.RESULT, '')) AS result,
       regexp_extract(trim(coalesce(r.RESULT, '')), '^(<=|>=|<|>)?\s*([0-9.+\-eE]+)$', ['q', 'num']) AS rx,
       f.factor, nt.tags
FROM raw r
JOIN nhs ON nhs.raw = coalesce(r.NHS_NUMBER, '')
JOIN notes nt ON nt.notes = coalesce(r.CLINICAL_DETAILS, '')
LEFT JOIN setting_codes s ON s.code = trim(r.LOCATION)
LEFT JOIN status_codes st ON st.code = trim(r.RESULT_STATUS)
LEFT JOIN analyte_codes a ON a.code = trim(r.TEST_CODE)
LEFT JOIN unit_codes u ON u.code = trim(r.UNITS)
LEFT JOIN unit_factors f ON f.analyte = a.analyte AND f.ucum = u.ucum;

CREATE TEMP TABLE valid AS
WITH v AS (
    SELECT *, CASE WHEN rx.num <> '' AND isfinite(try_cast(rx.num AS DOUBLE)) THEN try_cast(rx.num AS DOUBLE) END AS number
    FROM parsed)
SELECT seq, nhs, local_id, nhs IS NULL AS is_local, specimen, analyte, collected, reported, status, setting, tags,
       number * factor AS value, CASE WHEN number IS NOT NULL THEN rx.q ELSE '' END AS qual,
       CASE WHEN number IS NULL THEN result ELSE '' END AS text
FROM v
WHERE (nhs IS NOT NULL OR (nhs_blank AND local_id <> ''))
  AND (dob_raw = '' OR dob IS NOT NULL)
  AND sex IN ('', 'F', 'M', 'U')
  AND specimen <> ''
  AND collected IS NOT NULL
  AND (reported_raw = '' OR reported IS NOT NULL)
  AND setting IS NOT NULL AND status IS NOT NULL AND analyte IS NOT NULL
  AND (result <> '' OR status = 'cancelled')
  AND (number IS NULL OR factor IS NOT NULL)
  AND (dob IS NULL OR (year(collected) - year(dob) - ((month(collected) * 100 + day(collected)) < (month(dob) * 100 + day(dob)))::INTEGER) BETWEEN 0 AND 130);

-- --- pseudonyms of the distinct patients ----------------------------------------------------
CREATE TEMP TABLE patients AS
WITH d AS (SELECT DISTINCT is_local, CASE WHEN is_local THEN local_id ELSE nhs END AS id FROM valid)
SELECT is_local, id,
       hmac64(CASE WHEN is_local THEN encode('sluice:patient:local:v1' || chr(31) || 'quillmere' || chr(31) || id)
                   ELSE encode('sluice:patient:nhs:v1' || chr(31) || id) END, k.ipad, k.opad) AS patient
FROM d, hmac_key k;

-- --- the store's merge rule: repeats dropped, the newest version current, cancellations withdraw
CREATE TEMP TABLE results AS
WITH p AS (
    SELECT pt.patient, v.*, year(v.collected) * 12 + month(v.collected) AS month
    FROM valid v JOIN patients pt ON pt.is_local = v.is_local AND pt.id = CASE WHEN v.is_local THEN v.local_id ELSE v.nhs END),
dedup AS (
    SELECT * FROM p
    QUALIFY row_number() OVER (PARTITION BY month, specimen, analyte, status, reported, value, qual, text ORDER BY seq) = 1),
same_patient AS (   -- a specimen already stored for a different patient is quarantined
    SELECT * FROM dedup
    QUALIFY patient = first(patient ORDER BY seq) OVER (PARTITION BY month, specimen, analyte)),
newest AS (
    SELECT * FROM same_patient
    QUALIFY row_number() OVER (PARTITION BY month, specimen, analyte ORDER BY reported DESC NULLS FIRST, seq DESC) = 1)
SELECT patient, specimen, analyte, collected, collected::DATE AS day, value, setting, tags,
       (tags & 3) = 3 AS event
FROM newest WHERE status <> 'cancelled';

-- --- cohort ---------------------------------------------------------------------------------
CREATE TEMP TABLE excluded AS
SELECT DISTINCT patient FROM results, study
WHERE (tags & 124) <> 0 AND day >= exclude_from AND day < fu_to;

CREATE TEMP TABLE events AS
SELECT patient, specimen, day FROM results WHERE event
QUALIFY row_number() OVER (PARTITION BY specimen ORDER BY patient, collected) = 1;

CREATE TEMP TABLE cohort AS
SELECT e.patient FROM events e, study s
WHERE e.patient NOT IN (SELECT patient FROM excluded)
GROUP BY e.patient, s.stable_by, s.base_from, s.base_to, s.fu_from, s.fu_to
HAVING min(e.day) <= s.stable_by   -- stable: first event at least 3 months before baseline
   AND count(*) FILTER (WHERE e.day >= s.base_from AND e.day < s.base_to) >= 2
   AND count(*) FILTER (WHERE e.day >= s.fu_from AND e.day < s.fu_to) >= 2;

-- Intervals between successive events belong to the window of the later event.
CREATE TEMP TABLE bands AS
WITH iv AS (
    SELECT e.patient, e.day, e.day - lag(e.day) OVER (PARTITION BY e.patient ORDER BY e.day) AS days
    FROM events e JOIN cohort USING (patient)),
w AS (
    SELECT patient, CASE WHEN day >= base_from AND day < base_to THEN 'baseline'
                         WHEN day >= fu_from AND day < fu_to THEN 'follow_up' END AS win, days
    FROM iv, study WHERE days IS NOT NULL),
m AS (SELECT patient, win, median(days) AS med FROM w WHERE win IS NOT NULL GROUP BY ALL)
SELECT c.patient,
       coalesce(max(CASE WHEN win = 'baseline' THEN band END), 'none') AS before_band,
       coalesce(max(CASE WHEN win = 'follow_up' THEN band END), 'none') AS after_band
FROM cohort c LEFT JOIN (
    SELECT patient, win, CASE WHEN med <= 45 THEN 'monthly' WHEN med <= 75 THEN 'two_monthly'
                              WHEN med <= 120 THEN 'three_monthly' ELSE 'longer' END AS band FROM m) b USING (patient)
GROUP BY c.patient;

-- --- results of cohort patients in the windows ----------------------------------------------
CREATE TEMP TABLE cohort_results AS
SELECT r.*, CASE WHEN r.day < s.fu_from THEN 'baseline' ELSE 'follow_up' END AS win
FROM results r JOIN cohort USING (patient), study s
WHERE r.value IS NOT NULL AND r.day >= s.base_from AND r.day < s.fu_to;

CREATE TEMP TABLE worst_diff AS
WITH w AS (
    SELECT r.patient, r.analyte, r.win, CASE WHEN any_value(wo.higher) THEN max(r.value) ELSE min(r.value) END AS v
    FROM cohort_results r JOIN worse wo USING (analyte) WHERE r.event GROUP BY ALL)
SELECT b.analyte, avg(f.v - b.v) AS mean_difference
FROM w b JOIN w f ON f.patient = b.patient AND f.analyte = b.analyte AND b.win = 'baseline' AND f.win = 'follow_up'
GROUP BY b.analyte;

CREATE TEMP TABLE critical AS
SELECT w.win, count(*) FILTER (WHERE r.event) AS monitoring, count(*) FILTER (WHERE NOT r.event) AS other
FROM (VALUES ('baseline'), ('follow_up')) w(win)
LEFT JOIN (SELECT r.* FROM cohort_results r JOIN critical_limits l USING (analyte)
           WHERE CASE WHEN l.strict THEN r.value < l.low OR r.value > l.high
                      ELSE r.value <= l.low OR r.value >= l.high END) r ON r.win = w.win
GROUP BY w.win;

-- --- the answer: one JSON document --------------------------------------------------------
SELECT json_object(
    'cohort', (SELECT count(*) FROM cohort),
    'transitions', coalesce((SELECT json_group_object(k, n) FROM (SELECT before_band || '->' || after_band AS k, count(*) AS n FROM bands GROUP BY k ORDER BY k)), '{}'::JSON),
    'worst_mean_difference', coalesce((SELECT json_group_object(analyte, mean_difference) FROM (SELECT * FROM worst_diff ORDER BY analyte)), '{}'::JSON),
    'critical', (SELECT json_group_object(win, json_object('monitoring', monitoring, 'other', other)) FROM (SELECT * FROM critical ORDER BY win)),
    'rows_read', (SELECT n FROM rows_read)
) AS answer;
