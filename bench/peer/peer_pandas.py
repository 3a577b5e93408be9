#!/usr/bin/env python3
"""Benchmark peer (pandas): the methotrexate monitoring study, from raw extracts to the figures.

This is the job `sluice link` + `sluice measure` do for policies/studies/mtx-monitoring.toml,
written the way a strong analyst would write it in plain pandas, so that bench/run can compare
time, memory and answers. Everything the study needs is hard-coded below (copied from the policy
files named beside each block) except the index date.

    peer_pandas.py --extracts DIR --key FILE --index-date 2024-07-01 --out peer.json

Steps: read every monthly CSV (pyarrow's CSV reader, which handles quoted line breaks and lets us
count malformed rows); validate rows as sluice-source does (NHS modulus 11 with HOSP_NO fallback,
dates, codes, units, numeric results); pseudonymise patients with HMAC-SHA256 exactly as
crates/sluice-link/src/pseudonym.rs (so pseudonyms equal sluice's); drop repeated rows and resolve
amendments/cancellations as crates/sluice-link/src/store.rs does; tag notes with the words of
policies/tags/dmard.toml; then cohort, intervals and bands, worst results and critical results as
crates/sluice-study does.
"""

from __future__ import annotations

import argparse
import calendar
import datetime as dt
import hashlib
import hmac
import json
import re
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

# --- policies/profiles/quillmere.toml ---------------------------------------------------------
SITE = "quillmere"
COLUMNS = [
    "NHS_NUMBER", "HOSP_NO", "DOB", "SEX", "POSTCODE", "GP_CODE", "SPECIMEN_NO", "COLLECTED",
    "LOCATION", "CLINICAL_DETAILS", "TEST_CODE", "RESULT", "UNITS", "RESULT_STATUS", "REPORTED",
]
DATE_FMT, DATETIME_FMT = "%Y-%m-%d", "%Y-%m-%d %H:%M"
SETTING = {"GPR": "community", "OPD": "outpatient", "RHEUM": "outpatient", "WARD": "inpatient",
           "AMU": "inpatient", "ED": "emergency"}
STATUS = {"F": "final", "C": "amended", "X": "cancelled"}
SEX = {"F", "M", "U"}
ANALYTE = {"NA": "sodium", "K": "potassium", "UREA": "urea", "CREA": "creatinine", "EGFR": "egfr",
           "GLU": "glucose", "HBA1C": "hba1c", "TSH": "tsh", "ACA": "adjusted_calcium",
           "MG": "magnesium", "PHOS": "phosphate", "CK": "ck", "ALT": "alt", "AST": "ast",
           "ALB": "albumin", "HB": "haemoglobin", "WBC": "wbc", "NEUT": "neutrophils",
           "LYMPH": "lymphocytes", "EOS": "eosinophils", "PLT": "platelets", "MCV": "mcv",
           "INR": "inr"}
# Local unit text -> UCUM. The profile's [codes.unit] has no "mg/dL" or "g/dL" (sluice would
# quarantine such rows as an unknown unit); this peer accepts them and converts, as asked.
UNIT = {"mmol/L": "mmol/L", "umol/L": "umol/L", "mL/min/1.73m2": "mL/min/{1.73_m2}",
        "mmol/mol": "mmol/mol", "mU/L": "m[IU]/L", "U/L": "U/L", "g/L": "g/L",
        "x10^9/L": "10*9/L", "fL": "fL", "ratio": "{INR}", "mg/dL": "mg/dL", "g/dL": "g/dL"}

# --- policies/analytes.toml: canonical unit and accepted conversions (factor to canonical) -----
CANONICAL = {"sodium": "mmol/L", "potassium": "mmol/L", "urea": "mmol/L", "creatinine": "umol/L",
             "egfr": "mL/min/{1.73_m2}", "glucose": "mmol/L", "hba1c": "mmol/mol",
             "tsh": "m[IU]/L", "adjusted_calcium": "mmol/L", "magnesium": "mmol/L",
             "phosphate": "mmol/L", "ck": "U/L", "alt": "U/L", "ast": "U/L", "albumin": "g/L",
             "haemoglobin": "g/L", "wbc": "10*9/L", "neutrophils": "10*9/L",
             "lymphocytes": "10*9/L", "eosinophils": "10*9/L", "platelets": "10*9/L",
             "mcv": "fL", "inr": "{INR}"}
CONVERT = {("creatinine", "mg/dL"): 88.42, ("glucose", "mg/dL"): 0.0555,
           ("albumin", "g/dL"): 10.0, ("haemoglobin", "g/dL"): 10.0}
for _a in ("wbc", "neutrophils", "lymphocytes", "eosinophils", "platelets"):
    CONVERT[(_a, "10*3/uL")] = 1.0
for _a, _u in CANONICAL.items():
    CONVERT[(_a, _u)] = 1.0

# --- policies/tags/dmard.toml: literal words/phrases and fuzzy single words per tag ------------
TAGS = {
    "monitoring": (["monitoring", "monitor", "dmard bloods", "shared care", "drug bloods"], ["monitoring"]),
    "methotrexate": (["methotrexate", "mtx"], ["methotrexate"]),
    "leflunomide": (["leflunomide", "arava"], ["leflunomide"]),
    "sulfasalazine": (["sulfasalazine", "sulphasalazine", "ssz"], ["sulfasalazine", "sulphasalazine"]),
    "hydroxychloroquine": (["hydroxychloroquine", "hcq"], ["hydroxychloroquine"]),
    "azathioprine": (["azathioprine", "aza"], ["azathioprine"]),
    "mycophenolate": (["mycophenolate", "mmf"], ["mycophenolate"]),
}
TAG_BIT = {t: 1 << i for i, t in enumerate(TAGS)}

# --- policies/studies/mtx-monitoring.toml ------------------------------------------------------
MARKER, DRUGS = "monitoring", ["methotrexate"]
EXCLUDE = ["leflunomide", "sulfasalazine", "hydroxychloroquine", "azathioprine", "mycophenolate"]
EXCLUDE_LOOKBACK_MONTHS, STABLE_MONTHS, MIN_EVENTS = 12, 3, 2
BANDS = [("monthly", 45), ("two_monthly", 75), ("three_monthly", 120), ("longer", None)]
WORSE = {"wbc": "min", "neutrophils": "min", "lymphocytes": "min", "platelets": "min",
         "mcv": "max", "alt": "max", "albumin": "min", "creatinine": "max", "egfr": "min"}

# --- policies/reference/critical-limits.toml: (low, high, strict) -------------------------------
CRITICAL = {"sodium": (120, 160, False), "potassium": (2.5, 6.5, False), "urea": (None, 30, False),
            "creatinine": (None, 354, False), "glucose": (2.5, 25, False),
            "adjusted_calcium": (1.8, 3.5, False), "magnesium": (0.4, None, False),
            "phosphate": (0.3, None, False), "alt": (None, 600, False), "ck": (None, 5000, False),
            "haemoglobin": (60, None, True), "neutrophils": (0.5, None, True),
            "platelets": (30, None, True), "inr": (None, 8, True)}

T0 = time.perf_counter()


def log(msg: str) -> None:
    print(f"[{time.perf_counter() - T0:7.2f}s] {msg}", file=sys.stderr)


# --- key and pseudonyms --------------------------------------------------------------------------
def read_key(path: str) -> bytes:
    """The 32 key bytes from a sluice key file (`key = "<64 hex>"`, format sluice-key-1)."""
    for line in Path(path).read_text().splitlines():
        m = re.fullmatch(r'\s*key\s*=\s*"([0-9a-fA-F]{64})"\s*', line)
        if m:
            return bytes.fromhex(m.group(1))
    sys.exit(f"{path}: no key = \"<64 hex digits>\" line")


class Pseudonymiser:
    """First 8 bytes, big-endian, of HMAC-SHA256(key, label 0x1f [site 0x1f] id)."""

    def __init__(self, key: bytes):
        self.nhs = hmac.new(key, b"sluice:patient:nhs:v1\x1f", hashlib.sha256)
        self.local = hmac.new(key, b"sluice:patient:local:v1\x1f" + SITE.encode() + b"\x1f", hashlib.sha256)
        self.cache: dict[tuple[bool, str], int] = {}

    def get(self, is_local: bool, ident: str) -> int:
        k = (is_local, ident)
        v = self.cache.get(k)
        if v is None:
            m = (self.local if is_local else self.nhs).copy()
            m.update(ident.encode())
            v = int.from_bytes(m.digest()[:8], "big")
            self.cache[k] = v
        return v


def nhs_canonical(raw: str) -> str | None:
    """Ten digits if `raw` is a valid NHS number (modulus 11, not a placeholder), else None."""
    s = raw.strip().replace(" ", "").replace("-", "")
    if len(s) != 10 or not s.isascii() or not s.isdigit():
        return None
    d = [ord(c) - 48 for c in s]
    c = 11 - sum(x * w for x, w in zip(d[:9], range(10, 1, -1))) % 11
    c = 0 if c == 11 else c
    if c == 10 or c != d[9] or len(set(d)) == 1:
        return None
    return s


# --- tags ---------------------------------------------------------------------------------------
def osa(a: str, b: str) -> int:
    """Optimal string alignment distance (what sluice's fuzzy terms use)."""
    prev2, prev = None, list(range(len(b) + 1))
    for i in range(1, len(a) + 1):
        cur = [i] + [0] * len(b)
        for j in range(1, len(b) + 1):
            cost = a[i - 1] != b[j - 1]
            cur[j] = min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + cost)
            if i > 1 and j > 1 and a[i - 1] == b[j - 2] and a[i - 2] == b[j - 1]:
                cur[j] = min(cur[j], prev2[j - 2] + 1)
        prev2, prev = prev, cur
    return prev[len(b)]


class Tagger:
    # Literals: whole words/phrases, case-insensitive. Fuzzy: one word of the notes within the
    # dictionary's default edit distance (0 below 5 letters, 1 for 5-8, 2 from 9), which catches
    # the misspellings crates/sluice-synth/src/text.rs plants ("methotrexat", "metotrexate",
    # "methatrexate", "leflunamide", "sulfasalazin", "hydroxychloroquin", "azathioprin").
    def __init__(self):
        self.literal = {t: re.compile(r"\b(?:" + "|".join(re.escape(w) for w in lits) + r")\b")
                        for t, (lits, _) in TAGS.items()}
        self.fuzzy = [(t, w, 0 if len(w) < 5 else 1 if len(w) <= 8 else 2)
                      for t, (_, fz) in TAGS.items() for w in fz]
        self.words: dict[str, int] = {}
        self.notes: dict[str, int] = {}

    def word_mask(self, w: str) -> int:
        m = self.words.get(w)
        if m is None:
            m = 0
            for t, term, d in self.fuzzy:
                if abs(len(w) - len(term)) <= d and osa(w, term) <= d:
                    m |= TAG_BIT[t]
            self.words[w] = m
        return m

    def mask(self, notes: str) -> int:
        m = self.notes.get(notes)
        if m is None:
            low = notes.lower()
            m = 0
            for t, rx in self.literal.items():
                if rx.search(low):
                    m |= TAG_BIT[t]
            for w in re.split(r"[\W_]+", low):
                if w:
                    m |= self.word_mask(w)
            self.notes[notes] = m
        return m


# --- dates --------------------------------------------------------------------------------------
def add_months(d: dt.date, n: int) -> dt.date:
    """d plus n calendar months, the day clamped to the month's end (as chrono does)."""
    y, m = divmod(d.year * 12 + d.month - 1 + n, 12)
    return dt.date(y, m + 1, min(d.day, calendar.monthrange(y, m + 1)[1]))


def day_number(d: dt.date) -> int:
    return (d - dt.date(1970, 1, 1)).days


def whole_years(birth: pd.Series, on: pd.Series) -> np.ndarray:
    y = on.dt.year.to_numpy() - birth.dt.year.to_numpy()
    later = (on.dt.month.to_numpy() * 100 + on.dt.day.to_numpy()) < (birth.dt.month.to_numpy() * 100 + birth.dt.day.to_numpy())
    return y - later


# --- reading and validating one extract ---------------------------------------------------------
VALUE_RX = r"^(<=|>=|<|>)?\s*([0-9.+\-eE]+)$"


def read_extract(path: Path, seq_base: int, pseudo: Pseudonymiser, tagger: Tagger) -> tuple[pd.DataFrame, int]:
    bad = [0]

    def invalid(_row):  # a row with the wrong number of fields is quarantined, not fatal
        bad[0] += 1
        return "skip"

    table = pacsv.read_csv(
        path,
        read_options=pacsv.ReadOptions(use_threads=True, block_size=1 << 24),
        parse_options=pacsv.ParseOptions(delimiter=",", quote_char='"', newlines_in_values=True,
                                         invalid_row_handler=invalid),
        convert_options=pacsv.ConvertOptions(column_types={c: pa.string() for c in COLUMNS},
                                             include_columns=[c for c in COLUMNS if c not in ("POSTCODE", "GP_CODE")],
                                             strings_can_be_null=False, quoted_strings_can_be_null=False),
    )
    df = table.to_pandas()
    n_read = len(df) + bad[0]
    df["seq"] = np.arange(seq_base, seq_base + len(df), dtype=np.int64)
    s = {c: df[c].str.strip() for c in df.columns if c not in ("CLINICAL_DETAILS", "seq")}

    # Patient: a valid NHS number, or the hospital number when the NHS number is blank.
    nhs_map = {v: nhs_canonical(v) for v in s["NHS_NUMBER"].unique()}
    nhs = s["NHS_NUMBER"].map(nhs_map)
    use_local = (s["NHS_NUMBER"] == "") & (s["HOSP_NO"] != "")
    ok = nhs.notna() | use_local

    dob = pd.to_datetime(s["DOB"], format=DATE_FMT, errors="coerce")
    ok &= (s["DOB"] == "") | dob.notna()
    ok &= s["SEX"].isin(SEX) | (s["SEX"] == "")
    ok &= s["SPECIMEN_NO"] != ""
    collected = pd.to_datetime(s["COLLECTED"], format=DATETIME_FMT, errors="coerce")
    ok &= collected.notna()
    reported = pd.to_datetime(s["REPORTED"], format=DATETIME_FMT, errors="coerce")
    ok &= (s["REPORTED"] == "") | reported.notna()
    setting = s["LOCATION"].map(SETTING)
    status = s["RESULT_STATUS"].map(STATUS)
    analyte = s["TEST_CODE"].map(ANALYTE)
    ok &= setting.notna() & status.notna() & analyte.notna()

    # Result: number, qualified number (">90": the bound is kept as the value) or text.
    raw = s["RESULT"]
    cancelled = status == "cancelled"
    ok &= (raw != "") | cancelled
    parts = raw.str.extract(VALUE_RX)
    number = pd.to_numeric(parts[1], errors="coerce")
    numeric = number.notna() & np.isfinite(number)
    text = raw.where(~numeric & (raw != ""), "")
    ucum = s["UNITS"].map(UNIT)
    factor = pd.Series([CONVERT.get((a, u), np.nan) for a, u in zip(analyte, ucum)], index=df.index, dtype=float)
    ok &= ~numeric | factor.notna()
    value = (number * factor).where(numeric)
    qual = parts[0].where(numeric, "").fillna("")

    # Age at collection must be 0-130 years when a birth date is given.
    has_dob = dob.notna() & collected.notna()
    age = pd.Series(0, index=df.index)
    age[has_dob] = whole_years(dob[has_dob], collected[has_dob])
    ok &= ~has_dob | ((age >= 0) & (age <= 130))

    keep = ok.to_numpy()
    nhs, local_id = nhs[keep], s["HOSP_NO"][keep]
    is_local = use_local[keep] & nhs.isna()
    pid = np.fromiter((pseudo.get(True, l) if il else pseudo.get(False, n)
                       for n, l, il in zip(nhs, local_id, is_local)), dtype=np.uint64, count=int(keep.sum()))
    notes = df["CLINICAL_DETAILS"][keep]
    note_map = {v: tagger.mask(v) for v in notes.unique()}
    out = pd.DataFrame({
        "patient": pid,
        "specimen": s["SPECIMEN_NO"][keep].to_numpy(),
        "analyte": analyte[keep].to_numpy(),
        "collected": collected[keep].to_numpy(),
        "reported": reported[keep].to_numpy(),
        "status": status[keep].to_numpy(),
        "value": value[keep].to_numpy(),
        "qual": qual[keep].to_numpy(),
        "text": text[keep].to_numpy(),
        "setting": setting[keep].to_numpy(),
        "tags": notes.map(note_map).to_numpy(dtype=np.int64),
        "seq": df["seq"][keep].to_numpy(),
    })
    return out, n_read


# --- the store's merge rule ---------------------------------------------------------------------
def current_versions(rows: pd.DataFrame) -> pd.DataFrame:
    """Per (collection month, specimen, analyte): drop exact repeats of a version already seen;
    the newest version (latest report time, then latest in extract order) is current, unless it
    is a cancellation, which withdraws the result (crates/sluice-link/src/store.rs)."""
    rows["month"] = rows["collected"].dt.year * 12 + rows["collected"].dt.month
    key = ["month", "specimen", "analyte"]
    rows = rows.sort_values("seq", kind="stable")
    rows = rows.drop_duplicates(key + ["status", "reported", "value", "qual", "text"], keep="first")
    # A specimen already stored for a different patient is quarantined.
    rows = rows[rows["patient"] == rows.groupby(key, sort=False)["patient"].transform("first")]
    rows = rows.sort_values(["reported", "seq"], kind="stable")
    rows = rows.drop_duplicates(key, keep="last")
    return rows[rows["status"] != "cancelled"].sort_values("seq", kind="stable").reset_index(drop=True)


def band(days: float) -> str:
    for name, top in BANDS:
        if top is None or days <= top:
            return name
    raise AssertionError


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--extracts", required=True, help="folder of monthly CSV extracts (quillmere layout)")
    ap.add_argument("--key", required=True, help="sluice key file")
    ap.add_argument("--index-date", default="2024-07-01", help="policy change date YYYY-MM-DD")
    ap.add_argument("--out", required=True, help="JSON file to write")
    a = ap.parse_args()

    index = dt.date.fromisoformat(a.index_date)
    windows = {"baseline": (add_months(index, -12), index), "follow_up": (index, add_months(index, 12))}
    first_from, last_to = windows["baseline"][0], windows["follow_up"][1]
    exclude_from = add_months(first_from, -EXCLUDE_LOOKBACK_MONTHS)
    stable_by = add_months(first_from, -STABLE_MONTHS)

    pseudo, tagger = Pseudonymiser(read_key(a.key)), Tagger()
    files = sorted(Path(a.extracts).glob("*.csv"))
    if not files:
        sys.exit(f"{a.extracts}: no *.csv extracts")
    parts, rows_read, seq = [], 0, 0
    for f in files:
        df, n = read_extract(f, seq, pseudo, tagger)
        parts.append(df)
        rows_read += n
        seq += n
    rows = pd.concat(parts, ignore_index=True)
    del parts
    log(f"read {rows_read} rows from {len(files)} files, {len(rows)} valid")
    rows = current_versions(rows)
    log(f"{len(rows)} current results")

    day = (rows["collected"].to_numpy().astype("datetime64[D]").astype(np.int64))
    rows["day"] = day
    tags = rows["tags"].to_numpy()
    need = TAG_BIT[MARKER] | sum(TAG_BIT[t] for t in DRUGS)
    rows["event"] = (tags & need) == need
    excl_bits = sum(TAG_BIT[t] for t in EXCLUDE)

    # Cohort.
    excluded = set(rows.loc[((tags & excl_bits) != 0) & (day >= day_number(exclude_from)) & (day < day_number(last_to)), "patient"])
    ev = rows.loc[rows["event"], ["patient", "specimen", "collected", "day"]]
    ev = ev.sort_values(["patient", "collected", "specimen"], kind="stable").drop_duplicates("specimen")
    ev = ev[~ev["patient"].isin(excluded)]
    first = ev.groupby("patient")["day"].min()
    ev = ev[ev["patient"].isin(first.index[first <= day_number(stable_by)])]
    wb = {w: (day_number(f), day_number(t)) for w, (f, t) in windows.items()}
    ev_win = pd.Series(pd.NA, index=ev.index, dtype="string")
    for w, (f, t) in wb.items():
        ev_win[(ev["day"] >= f) & (ev["day"] < t)] = w
    ev["window"] = ev_win
    counts = ev.groupby(["patient", "window"]).size().unstack(fill_value=0).reindex(columns=list(wb), fill_value=0)
    cohort = counts.index[(counts >= MIN_EVENTS).all(axis=1)]
    ev = ev[ev["patient"].isin(cohort)].sort_values(["patient", "day"], kind="stable")
    log(f"cohort {len(cohort)}")

    # Intervals (attributed to the window of the later event), median per patient and window.
    ev["interval"] = ev.groupby("patient")["day"].diff()
    iv = ev.dropna(subset=["interval", "window"])
    med = iv.groupby(["patient", "window"])["interval"].median()
    bands = {w: med.xs(w, level="window").map(band).reindex(cohort).fillna("none").astype(str)
             if w in med.index.get_level_values("window") else pd.Series("none", index=cohort)
             for w in wb}
    trans = (bands["baseline"] + "->" + bands["follow_up"]).value_counts()
    transitions = {k: int(v) for k, v in sorted(trans.items())}

    # Results of cohort patients in the windows.
    res = rows[rows["patient"].isin(cohort) & rows["value"].notna() & (rows["day"] >= wb["baseline"][0]) & (rows["day"] < wb["follow_up"][1])].copy()
    res["window"] = np.where(res["day"] < wb["follow_up"][0], "baseline", "follow_up")

    # Worst result per patient, analyte and window among monitoring events; mean paired difference.
    worst_mean = {}
    evr = res[res["event"] & res["analyte"].isin(list(WORSE))]
    for an, g in evr.groupby("analyte"):
        w = g.groupby(["patient", "window"])["value"].agg(WORSE[an]).unstack()
        if {"baseline", "follow_up"} <= set(w.columns):
            d = (w["follow_up"] - w["baseline"]).dropna()
            if len(d):
                worst_mean[an] = float(d.mean())

    # Critical results in any setting, by window and whether the specimen is a monitoring event.
    crit = np.zeros(len(res), dtype=bool)
    for an, (lo, hi, strict) in CRITICAL.items():
        m = (res["analyte"] == an).to_numpy()
        v = res["value"].to_numpy()
        if lo is not None:
            crit |= m & ((v < lo) if strict else (v <= lo))
        if hi is not None:
            crit |= m & ((v > hi) if strict else (v >= hi))
    cr = res[crit]
    critical = {w: {"monitoring": int(((cr["window"] == w) & cr["event"]).sum()),
                    "other": int(((cr["window"] == w) & ~cr["event"]).sum())} for w in wb}

    out = {"cohort": int(len(cohort)), "transitions": transitions,
           "worst_mean_difference": dict(sorted(worst_mean.items())), "critical": critical,
           "rows_read": int(rows_read)}
    Path(a.out).write_text(json.dumps(out, indent=2) + "\n")
    log(f"wrote {a.out}")


if __name__ == "__main__":
    main()
