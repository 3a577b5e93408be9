//! The linker: published HMAC vectors, keys, the accounting identity against planted truth,
//! incremental and idempotent runs, bad input, and a scan of the store for every identifier.

use crate::common;
use serde::Deserialize;
use sluice_link::key::{HmacSha256, Key};
use sluice_link::pseudonym::{Kind, Pseudonymiser};
use sluice_link::tags::TagDictionary;
use std::collections::HashSet;
use std::path::{Path, PathBuf};

#[derive(Deserialize)]
struct KeyRepeat {
    byte: String,
    times: usize,
}

#[derive(Deserialize)]
struct HmacCase {
    id: u32,
    #[serde(default)]
    key: Option<String>,
    #[serde(default)]
    key_repeat: Option<KeyRepeat>,
    #[serde(default)]
    data: Option<String>,
    #[serde(default)]
    data_text: Option<String>,
    hmac: String,
}

#[derive(Deserialize)]
struct HmacVectors {
    case: Vec<HmacCase>,
}

fn unhex(s: &str) -> Vec<u8> {
    (0..s.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(&s[i..i + 2], 16).unwrap())
        .collect()
}

#[test]
fn rfc4231_hmac_sha256_vectors() {
    use hmac::{KeyInit, Mac};
    let v: HmacVectors = toml::from_str(&common::vectors("rfc4231-hmac-sha256.toml")).unwrap();
    let ids: Vec<u32> = v.case.iter().map(|c| c.id).collect();
    assert_eq!(ids, [1, 2, 3, 4, 6, 7]);
    for c in v.case {
        let key = match (&c.key, &c.key_repeat) {
            (Some(k), _) => unhex(k),
            (None, Some(r)) => vec![unhex(&r.byte)[0]; r.times],
            _ => panic!("case {} has no key", c.id),
        };
        let data = match (&c.data, &c.data_text) {
            (Some(d), _) => unhex(d),
            (None, Some(t)) => t.as_bytes().to_vec(),
            _ => panic!("case {} has no data", c.id),
        };
        let mut m = <HmacSha256 as KeyInit>::new_from_slice(&key).unwrap();
        m.update(&data);
        let out: [u8; 32] = m.finalize().into_bytes().into();
        assert_eq!(unhex(&c.hmac), out, "RFC 4231 case {}", c.id);
    }
}

#[test]
fn pseudonyms_are_domain_separated_hmacs() {
    use hmac::Mac;
    let key = Key::from_bytes([7u8; 32], "test");
    let p = Pseudonymiser::new(&key, "quillmere");
    // The pseudonym is HMAC-SHA256(key, label ‖ 0x1f ‖ id), computed independently here.
    let mut m = key.mac();
    m.update(b"sluice:patient:nhs:v1\x1f9434765919");
    let want: [u8; 32] = m.finalize().into_bytes().into();
    assert_eq!(p.full(Kind::Patient, "9434765919"), want);
    // The same string as a specimen number or a local number gets another pseudonym.
    let a = p.once(Kind::Patient, "9434765919");
    assert_ne!(a, p.once(Kind::Specimen, "9434765919"));
    assert_ne!(a, p.once(Kind::LocalPatient, "9434765919"));
    // Another key, another pseudonym.
    let other = Pseudonymiser::new(&Key::from_bytes([8u8; 32], "x"), "quillmere");
    assert_ne!(a, other.once(Kind::Patient, "9434765919"));
}

#[test]
fn key_files_are_private_and_checked() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("k");
    let key = Key::generate("site-a").unwrap();
    key.save(&path).unwrap();
    let mode = std::fs::metadata(&path).unwrap().permissions().mode() & 0o777;
    assert_eq!(mode, 0o600);
    assert!(
        key.save(&path).is_err(),
        "an existing key is never overwritten"
    );
    let loaded = Key::load(&path).unwrap();
    assert_eq!(loaded.fingerprint(), key.fingerprint());
    // The fingerprint and the debug form never show the key.
    let text = std::fs::read_to_string(&path).unwrap();
    let hexkey = text
        .lines()
        .find(|l| l.starts_with("key"))
        .unwrap()
        .split('"')
        .nth(1)
        .unwrap()
        .to_string();
    assert!(!key.fingerprint().contains(&hexkey[..16]));
    assert!(!format!("{key:?}").contains(&hexkey[..8]));
    assert!(format!("{key:?}").contains("redacted"));

    std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o644)).unwrap();
    let e = Key::load(&path).unwrap_err().to_string();
    assert!(
        e.contains("readable by group or others") && e.contains("chmod 600"),
        "{e}"
    );

    let short = dir.path().join("short");
    std::fs::write(&short, "format = \"sluice-key-1\"\nkey = \"abcd\"\n").unwrap();
    std::fs::set_permissions(&short, std::fs::Permissions::from_mode(0o600)).unwrap();
    let e = Key::load(&short).unwrap_err().to_string();
    assert!(e.contains("line 2") && e.contains("64 hex digits"), "{e}");
}

#[test]
fn tags_catch_spellings_and_abbreviations() {
    let mut t = TagDictionary::load(&common::policies().join("tags/dmard.toml")).unwrap();
    let names = t.names().iter().map(|s| s.to_string()).collect::<Vec<_>>();
    let has =
        |mask: u64, name: &str| mask & (1 << names.iter().position(|n| n == name).unwrap()) != 0;
    for (text, want) in [
        (
            "DMARD monitoring - methotrexate 15mg weekly",
            vec!["monitoring", "methotrexate"],
        ),
        (
            "MTX bloods - routine monitering",
            vec!["monitoring", "methotrexate"],
        ),
        ("on metotrexate", vec!["methotrexate"]),
        (
            "methatrexate + sulphasalazine monitoring",
            vec!["monitoring", "methotrexate", "sulfasalazine"],
        ),
        ("leflunamide and mtx", vec!["methotrexate", "leflunomide"]),
        ("hydroxychloroquin", vec!["hydroxychloroquine"]),
        ("BP check, on amlodipine", vec![]),
        ("mtxa", vec![]),
    ] {
        let m = t.tags(text);
        for n in &names {
            assert_eq!(has(m, n), want.contains(&n.as_str()), "{text:?}: tag {n}");
        }
    }
}

pub struct Linked {
    pub dir: tempfile::TempDir,
    pub summary: sluice_synth::Summary,
    pub store: PathBuf,
    pub quarantine: PathBuf,
    pub key: Key,
}

pub fn files(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir.join("extracts"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    v.sort();
    v
}

fn run_link(
    l: &Linked,
    profile: &str,
    files: &[PathBuf],
    keep_area: bool,
) -> Result<sluice_link::Report, sluice_link::LinkError> {
    let prof = common::profile(profile);
    let analytes = common::analytes();
    let tags = TagDictionary::load(&common::policies().join("tags/dmard.toml")).unwrap();
    let geo = sluice_link::geo::Geo::load(
        &l.dir.path().join("reference/postcodes.csv"),
        &l.dir.path().join("reference/practices.csv"),
    )
    .unwrap();
    let inputs = sluice_link::Inputs {
        profile: &prof,
        analytes: &analytes,
        tags: &tags,
        key: &l.key,
        geo: Some(&geo),
    };
    let opts = sluice_link::Options {
        store: l.store.clone(),
        quarantine: l.quarantine.clone(),
        keep_area,
    };
    sluice_link::link(&inputs, &opts, files, |_| {})
}

pub fn synth_and_link(profile: &str, seed: u64) -> Linked {
    let dir = tempfile::tempdir().unwrap();
    let summary = common::small_synth(dir.path(), profile, seed);
    let l = Linked {
        store: dir.path().join("store"),
        quarantine: dir.path().join("quarantine"),
        key: Key::from_bytes([seed as u8; 32], "test"),
        summary,
        dir,
    };
    run_link(&l, profile, &files(l.dir.path()), false).unwrap();
    l
}

fn check_accounting(l: &Linked) {
    let m = sluice_link::store::Manifest::load(&l.store)
        .unwrap()
        .unwrap();
    assert_eq!(m.ledger.len(), l.summary.files.len());
    for (entry, truth) in m.ledger.iter().zip(&l.summary.files) {
        assert_eq!(entry.file, truth.file);
        let a = &entry.accounting;
        let q: u64 = truth.quarantined.values().sum();
        assert_eq!(
            (
                a.rows,
                a.quarantined,
                a.duplicate,
                a.cancelled,
                a.superseded
            ),
            (
                truth.rows,
                q,
                truth.duplicate,
                truth.cancelled,
                truth.superseded
            ),
            "{}",
            truth.file
        );
    }
    let t = &m.totals;
    assert_eq!(
        t.rows,
        m.current_rows + t.superseded + t.quarantined + t.duplicate + t.cancelled
    );
    assert_eq!(m.current_rows, l.summary.expected_stored);
}

#[test]
fn accounting_matches_planted_truth_in_three_layouts() {
    for (profile, seed) in [("quillmere", 21), ("brackenholt", 22), ("saltreach", 23)] {
        let l = synth_and_link(profile, seed);
        check_accounting(&l);
    }
}

#[test]
fn quarantine_names_line_field_reason_and_keeps_the_raw_line() {
    let l = synth_and_link("quillmere", 24);
    let mut reasons = HashSet::new();
    for e in std::fs::read_dir(&l.quarantine).unwrap() {
        let path = e.unwrap().path();
        let mut r = csv::Reader::from_path(&path).unwrap();
        for rec in r.records() {
            let rec = rec.unwrap();
            let line: u64 = rec[1].parse().unwrap();
            assert!(line >= 2);
            assert!(!rec[4].is_empty(), "raw line kept");
            reasons.insert((
                rec[2].to_string(),
                rec[3].split(' ').take(2).collect::<Vec<_>>().join(" "),
            ));
        }
    }
    let fields: HashSet<&str> = reasons.iter().map(|(f, _)| f.as_str()).collect();
    for f in [
        "patient_id",
        "collected_at",
        "analyte",
        "setting",
        "unit",
        "",
    ] {
        assert!(
            fields.contains(f),
            "no quarantine entry for field {f:?}: {reasons:?}"
        );
    }
}

#[test]
fn relinking_changes_nothing_and_months_add_incrementally() {
    let l = synth_and_link("quillmere", 25);
    let before = std::fs::read(l.store.join("manifest.json")).unwrap();
    let r = run_link(&l, "quillmere", &files(l.dir.path()), false).unwrap();
    assert!(r.files.iter().all(|f| f.skipped));
    assert_eq!(
        std::fs::read(l.store.join("manifest.json")).unwrap(),
        before
    );

    // The same history linked month by month ends in the same state as linked at once.
    let inc = Linked {
        store: l.dir.path().join("store2"),
        quarantine: l.dir.path().join("q2"),
        key: Key::from_bytes([25u8; 32], "test"),
        summary: common::small_synth(&l.dir.path().join("again"), "quillmere", 25),
        dir: tempfile::tempdir().unwrap(),
    };
    let all = files(l.dir.path());
    let (first, rest) = all.split_at(all.len() - 3);
    let inc = Linked { dir: l.dir, ..inc };
    run_link(&inc, "quillmere", first, false).unwrap();
    for f in rest {
        run_link(&inc, "quillmere", std::slice::from_ref(f), false).unwrap();
    }
    let a = sluice_link::store::Manifest::load(&inc.store)
        .unwrap()
        .unwrap();
    let b = sluice_link::store::Manifest::load(&inc.dir.path().join("store"))
        .unwrap()
        .unwrap();
    assert_eq!(a.totals, b.totals);
    assert_eq!(a.current_rows, b.current_rows);
    let accs = |m: &sluice_link::store::Manifest| {
        m.ledger
            .iter()
            .map(|e| e.accounting.clone())
            .collect::<Vec<_>>()
    };
    assert_eq!(accs(&a), accs(&b));

    // An overlapping re-export (same rows, other bytes: CRLF line endings) adds only duplicates.
    let last = rest.last().unwrap();
    let text = std::fs::read_to_string(last).unwrap().replace('\n', "\r\n");
    let resent = inc.dir.path().join("resent.csv");
    std::fs::write(&resent, text).unwrap();
    let r = run_link(&inc, "quillmere", &[resent], false).unwrap();
    let acc = &r.files[0].accounting;
    assert!(!r.files[0].skipped);
    assert_eq!(acc.stored, 0);
    assert_eq!(acc.duplicate + acc.quarantined, acc.rows);
    assert_eq!(r.current_rows, b.current_rows);
}

/// Every identifier and free-text fragment of the input, in the forms it appears there.
fn identifiers(dir: &Path) -> Vec<String> {
    let mut out = HashSet::new();
    let mut r = csv::Reader::from_path(dir.join("truth/patients.csv")).unwrap();
    for rec in r.records() {
        let rec = rec.unwrap();
        let n = rec[0].to_string();
        out.insert(format!("{} {} {}", &n[..3], &n[3..6], &n[6..]));
        out.insert(n);
        out.insert(rec[1].to_string()); // local hospital number
        out.insert(rec[4].to_string()); // birth date, ISO
        let d = &rec[4];
        out.insert(format!("{}/{}/{}", &d[8..10], &d[5..7], &d[..4]));
        out.insert(rec[5].to_string()); // postcode
        out.insert(rec[5].replace(' ', ""));
    }
    for f in files(dir) {
        let mut r = csv::Reader::from_path(&f).unwrap();
        for rec in r.records().flatten() {
            if let Some(s) = rec.get(6) {
                out.insert(s.to_string()); // specimen number
            }
        }
    }
    // (Text results such as "HAEMOLYSED" are result categories, kept by design, not notes.)
    for fragment in [
        "monitoring",
        "methotrexate",
        "rheumatology",
        "weekly",
        "sepsis",
    ] {
        out.insert(fragment.to_string());
    }
    out.into_iter().filter(|s| s.len() >= 4).collect()
}

#[test]
fn no_identifier_or_free_text_reaches_the_store() {
    use polars::prelude::*;
    let l = synth_and_link("quillmere", 26);
    let ids = identifiers(l.dir.path());
    assert!(ids.len() > 1000);
    // Every byte of every store file (manifest included), as stored.
    let mut blobs = Vec::new();
    for e in walk(&l.store) {
        blobs.push((e.clone(), std::fs::read(&e).unwrap()));
    }
    // And every decoded value of every Parquet column, since the files are compressed.
    let mut decoded = String::new();
    for (path, _) in blobs
        .iter()
        .filter(|(p, _)| p.extension().is_some_and(|e| e == "parquet"))
    {
        let df = ParquetReader::new(std::fs::File::open(path).unwrap())
            .finish()
            .unwrap();
        for c in df.columns() {
            let s = c.cast(&DataType::String).unwrap();
            for v in s.str().unwrap().iter().flatten() {
                decoded.push_str(v);
                decoded.push('\n');
            }
        }
    }
    // Notes words that are also tag names appear as column names; test values only.
    let blob_text: Vec<(PathBuf, String)> = blobs
        .iter()
        .map(|(p, b)| (p.clone(), String::from_utf8_lossy(b).to_string()))
        .collect();
    for id in &ids {
        assert!(
            !decoded.contains(id.as_str()),
            "{id:?} found in a stored value"
        );
        let is_word = id.chars().all(|c| c.is_ascii_alphabetic());
        if !is_word {
            for (p, t) in &blob_text {
                assert!(
                    !t.contains(id.as_str()),
                    "{id:?} found in the bytes of {}",
                    p.display()
                );
            }
        }
    }
    // Only the documented columns exist.
    let allowed: HashSet<&str> = [
        "patient",
        "specimen",
        "collected_at",
        "reported_at",
        "setting",
        "analyte",
        "value",
        "qualifier",
        "text_value",
        "status",
        "current",
        "age_years",
        "sex",
        "distance_km",
        "practice_code",
        "source_file",
        "source_line",
    ]
    .into_iter()
    .collect();
    let (path, _) = blobs
        .iter()
        .find(|(p, _)| p.extension().is_some_and(|e| e == "parquet"))
        .unwrap();
    let df = ParquetReader::new(std::fs::File::open(path).unwrap())
        .finish()
        .unwrap();
    for n in df.get_column_names() {
        assert!(
            allowed.contains(n.as_str()) || n.starts_with("tag_"),
            "unexpected column {n}"
        );
    }
}

fn walk(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            out.extend(walk(&p));
        } else {
            out.push(p);
        }
    }
    out
}

#[test]
fn bad_files_and_keys_are_refused_with_file_line_and_field() {
    let l = synth_and_link("quillmere", 27);
    let all = files(l.dir.path());
    let text = std::fs::read_to_string(&all[0]).unwrap();

    // A column the profile names is missing.
    let missing = l.dir.path().join("missing.csv");
    std::fs::write(&missing, text.replacen("TEST_CODE", "TESTCODE", 1)).unwrap();
    let e = run_link(&l, "quillmere", &[missing], false)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("missing.csv")
            && e.contains("line 1")
            && e.contains("TEST_CODE")
            && e.contains("analyte"),
        "{e}"
    );

    // A file in the wrong encoding.
    let latin = l.dir.path().join("latin.csv");
    let mut bytes = text.clone().into_bytes();
    let at = bytes.iter().position(|&b| b == b'\n').unwrap() + 5;
    bytes.insert(at, 0xB5);
    std::fs::write(&latin, bytes).unwrap();
    let e = run_link(&l, "quillmere", &[latin], false)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("latin.csv") && e.contains("line 2") && e.contains("UTF-8"),
        "{e}"
    );

    // A truncated file: the cut last row is quarantined, nothing is lost.
    let cut = l.dir.path().join("cut.csv");
    let mut t = text.clone();
    t.truncate(t.len() - 25);
    std::fs::write(&cut, &t).unwrap();
    let r = run_link(&l, "quillmere", &[cut], false).unwrap();
    let a = &r.files[0].accounting;
    // Every complete row repeats the first month; the cut one is quarantined.
    assert_eq!(a.duplicate + a.quarantined, a.rows);
    assert!(a.quarantined >= 1);

    // A store made with another key.
    let other = Linked {
        key: Key::from_bytes([99u8; 32], "other"),
        dir: l.dir,
        summary: l.summary,
        store: l.store,
        quarantine: l.quarantine,
    };
    let e = run_link(&other, "quillmere", &all[..1], false)
        .unwrap_err()
        .to_string();
    assert!(e.contains("fingerprint") && e.contains("store"), "{e}");
}

#[test]
fn units_are_converted_or_the_row_quarantined() {
    use polars::prelude::*;
    let dir = tempfile::tempdir().unwrap();
    // The demo profile, plus a site that reports creatinine in mg/dL.
    let text = std::fs::read_to_string(common::policies().join("profiles/quillmere.toml"))
        .unwrap()
        .replace(
            "\"umol/L\" = \"umol/L\"",
            "\"umol/L\" = \"umol/L\"\n\"mg/dL\" = \"mg/dL\"",
        );
    let profile_path = dir.path().join("mgdl.toml");
    std::fs::write(&profile_path, text).unwrap();
    let profile = sluice_policy::Profile::load(&profile_path).unwrap();
    let header = "NHS_NUMBER,HOSP_NO,DOB,SEX,POSTCODE,GP_CODE,SPECIMEN_NO,COLLECTED,LOCATION,CLINICAL_DETAILS,TEST_CODE,RESULT,UNITS,RESULT_STATUS,REPORTED";
    let row = |spec: &str, code: &str, value: &str, unit: &str| {
        format!(
            "9434765919,QM1,1960-05-01,F,QV1 1AA,QP001,{spec},2024-03-01 09:00,GPR,,{code},{value},{unit},F,2024-03-01 12:00"
        )
    };
    let csv = [
        header.to_string(),
        row("S1", "CREA", "1.00", "mg/dL"), // 88.42 µmol/L
        row("S1", "NA", "140", "mg/dL"),    // sodium does not accept mg/dL
        row("S2", "CREA", "<20", "umol/L"), // a qualified bound
    ]
    .join("\n");
    let f = dir.path().join("x.csv");
    std::fs::write(&f, csv + "\n").unwrap();
    let analytes = common::analytes();
    let tags = TagDictionary::load(&common::policies().join("tags/dmard.toml")).unwrap();
    let key = Key::from_bytes([3u8; 32], "t");
    let store = dir.path().join("store");
    let r = sluice_link::link(
        &sluice_link::Inputs {
            profile: &profile,
            analytes: &analytes,
            tags: &tags,
            key: &key,
            geo: None,
        },
        &sluice_link::Options {
            store: store.clone(),
            quarantine: dir.path().join("q"),
            keep_area: false,
        },
        &[f],
        |_| {},
    )
    .unwrap();
    let a = &r.files[0].accounting;
    assert_eq!((a.rows, a.stored, a.quarantined), (3, 2, 1));
    let q = std::fs::read_to_string(walk(&dir.path().join("q"))[0].clone()).unwrap();
    assert!(
        q.contains("unit") && q.contains("not accepted for sodium"),
        "{q}"
    );
    let part = walk(&store.join("results"))[0].clone();
    let df = ParquetReader::new(std::fs::File::open(part).unwrap())
        .finish()
        .unwrap();
    let mut values: Vec<(f64, Option<String>)> = df
        .column("value")
        .unwrap()
        .f64()
        .unwrap()
        .iter()
        .zip(df.column("qualifier").unwrap().str().unwrap().iter())
        .map(|(v, q)| (v.unwrap(), q.map(str::to_string)))
        .collect();
    values.sort_by(|a, b| a.0.total_cmp(&b.0));
    // 1 mg/dL creatinine = 88.42 µmol/L (molar mass 113.12 g/mol).
    assert_eq!(values[0], (20.0, Some("<".to_string())));
    assert!((values[1].0 - 88.42).abs() < 1e-9 && values[1].1.is_none());
}

#[test]
fn only_the_outward_postcode_is_kept_and_only_when_asked() {
    use polars::prelude::*;
    let dir = tempfile::tempdir().unwrap();
    let summary = common::small_synth(dir.path(), "quillmere", 28);
    let l = Linked {
        store: dir.path().join("store"),
        quarantine: dir.path().join("q"),
        key: Key::from_bytes([28u8; 32], "test"),
        summary,
        dir,
    };
    run_link(&l, "quillmere", &files(l.dir.path()), true).unwrap();
    let part = walk(&l.store.join("results"))[5].clone();
    let df = ParquetReader::new(std::fs::File::open(part).unwrap())
        .finish()
        .unwrap();
    let areas = df.column("home_area").unwrap().str().unwrap().clone();
    let mut n = 0;
    for a in areas.iter().flatten() {
        // An outward code ("QV9", "QV17"), never a full postcode.
        assert!(
            a.starts_with("QV") && a.len() <= 4 && !a.contains(' '),
            "{a}"
        );
        n += 1;
    }
    assert!(n > 0);
    let d = df.column("distance_km").unwrap().f32().unwrap().clone();
    assert!(d.iter().flatten().all(|x| (0.0..200.0).contains(&x)));
    // The same store cannot later be extended without the area.
    let e = run_link(&l, "quillmere", &files(l.dir.path())[..1], false)
        .unwrap_err()
        .to_string();
    assert!(e.contains("keep_area"), "{e}");
}
