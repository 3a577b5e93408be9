//! Content a careless or dishonest analyst could put in a release, each refused by check with a
//! message naming file, row or rule. Crafted cases; NHS number 943 476 5919 is the NHS Data
//! Dictionary's worked example of a valid number.

use crate::common::{policy, provenance, read_manifest, release, rewrite, rules, write_manifest};
use parquet::file::metadata::KeyValue;
use sluice_aggregate::{Role, Table, Value, col, dim};
use sluice_disclose::control_all;
use sluice_release::{Verdict, check, write_release};

fn fails_with(v: &Verdict, rule: &str, text: &str) {
    assert!(
        v.problems
            .iter()
            .any(|p| p.rule == rule && p.to_string().contains(text)),
        "no {rule} problem mentioning {text:?} in:\n{v}"
    );
}

fn one_table(t: Table, extra: &[(String, Vec<u8>)]) -> (tempfile::TempDir, Verdict) {
    let dir = tempfile::tempdir().unwrap();
    let r = rules();
    let out = dir.path().join("rel");
    let checked = control_all(&[t], &r).unwrap();
    write_release(&out, &provenance("quillmere"), &r, &checked, extra).unwrap();
    let v = check(&out, &policy());
    (dir, v)
}

fn groups(values: &[&str]) -> Table {
    let mut t = Table::new(
        "groups",
        "t",
        "",
        vec![dim("group", ""), col("n_patients", Role::Patients, "")],
    );
    for g in values {
        t.push(vec![(*g).into(), Value::Int(20)]);
    }
    t
}

#[test]
fn identifiers_and_written_dates_in_dimension_values_are_refused() {
    let (_d, v) = one_table(
        groups(&[
            "943 476 5919",
            "9434765919",
            "QV1 2AB",
            "04/03/1957",
            "19570304",
            "4 March 1957",
        ]),
        &[],
    );
    for (row, rule) in [
        (0, "identifier"),
        (1, "identifier"),
        (2, "identifier"),
        (3, "date"),
        (4, "date"),
        (5, "date"),
    ] {
        fails_with(&v, rule, &format!("groups.parquet, row {row}: {rule}"));
    }
}

#[test]
fn an_nhs_number_in_a_numeric_dimension_is_refused() {
    let mut t = Table::new(
        "bins",
        "t",
        "",
        vec![dim("bin_lower", ""), col("n_patients", Role::Patients, "")],
    );
    t.push(vec![Value::Float(9434765919.0), Value::Int(20)]);
    let (_d, v) = one_table(t, &[]);
    fails_with(&v, "identifier", "reads as an NHS number");
}

#[test]
fn identifiers_in_table_descriptions_are_refused() {
    let mut t = groups(&["a"]);
    t.description = "see patient 943 476 5919".into();
    let (_d, v) = one_table(t, &[]);
    fails_with(
        &v,
        "identifier",
        "metadata sluice.description holds NHS number",
    );
}

#[test]
fn an_extra_file_is_refused_and_the_report_is_scanned() {
    let extra = vec![("notes.txt".to_string(), b"anything".to_vec())];
    let (_d, v) = one_table(groups(&["a"]), &extra);
    fails_with(&v, "files", "an extra file is unverified content");
    let report = vec![(
        "report.html".to_string(),
        b"<p>patient 943-476-5919</p>".to_vec(),
    )];
    let (_d, v) = one_table(groups(&["a"]), &report);
    fails_with(
        &v,
        "identifier",
        "report.html: identifier: holds NHS number",
    );
}

#[test]
fn non_finite_and_negative_statistics_are_refused() {
    use arrow::array::Float64Array;
    use std::sync::Arc;
    let mut t = Table::new(
        "est",
        "t",
        "",
        vec![
            dim("group", ""),
            col("n_patients", Role::Patients, ""),
            col("estimate", Role::Statistic, ""),
            col("se", Role::Statistic, ""),
            col("p_value", Role::Statistic, ""),
            col("person_years", Role::PersonTime, ""),
        ],
    );
    t.push(vec![
        "a".into(),
        Value::Int(20),
        Value::Float(1.0),
        Value::Float(1.0),
        Value::Float(0.5),
        Value::Float(20.0),
    ]);
    let dir = tempfile::tempdir().unwrap();
    let r = rules();
    let rel = dir.path().join("rel");
    let checked = control_all(&[t], &r).unwrap();
    write_release(&rel, &provenance("quillmere"), &r, &checked, &[]).unwrap();
    rewrite(&rel, "est.parquet", |cols, schema, _| {
        for (name, x) in [
            ("estimate", f64::NAN),
            ("se", -1.0),
            ("p_value", 1.5),
            ("person_years", -5.0),
        ] {
            cols[schema.index_of(name).unwrap()] = Arc::new(Float64Array::from(vec![x]));
        }
    });
    let v = check(&rel, &policy());
    fails_with(&v, "value", "estimate = NaN is not a finite number");
    fails_with(&v, "value", "se = -1 is negative");
    fails_with(&v, "value", "p_value = 1.5 is outside [0, 1]");
    fails_with(
        &v,
        "person-time",
        "person_years = -5 but released person-time",
    );
}

#[test]
fn an_unknown_metadata_key_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    rewrite(&rel, "bands.parquet", |_, _, kv| {
        kv.push(KeyValue::new("note".into(), "ward 7 bed 3".to_string()));
    });
    let v = check(&rel, &policy());
    fails_with(&v, "metadata", "key \"note\" is not one a release carries");
}

#[test]
fn emptied_constraints_do_not_hide_a_restored_cell() {
    use arrow::array::{Int64Array, StringArray};
    use std::sync::Arc;
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    // Row 0 (alt, on_time) was withheld by secondary suppression; release it again and record no
    // constraints: check rebuilds the band margin from the values and still sees (alt, late)
    // recoverable as total − on_time.
    rewrite(&rel, "bands.parquet", |cols, schema, kv| {
        for k in kv.iter_mut() {
            if k.key == "sluice.constraints" {
                k.value = Some("[]".into());
            }
        }
        let np = schema.index_of("n_patients").unwrap();
        let mut v: Vec<Option<i64>> = cols[np]
            .as_any()
            .downcast_ref::<Int64Array>()
            .unwrap()
            .iter()
            .collect();
        v[0] = Some(40);
        cols[np] = Arc::new(Int64Array::from(v));
        let dc = schema.index_of("disclosure").unwrap();
        let mut s: Vec<Option<String>> = cols[dc]
            .as_any()
            .downcast_ref::<StringArray>()
            .unwrap()
            .iter()
            .map(|x| x.map(String::from))
            .collect();
        s[0] = Some("released".into());
        cols[dc] = Arc::new(StringArray::from(s));
    });
    let mut man = read_manifest(&rel);
    for f in man["files"].as_array_mut().unwrap() {
        if f["name"] == "bands.parquet" {
            f["withheld"] = (f["withheld"].as_u64().unwrap() - 1).into();
        }
    }
    write_manifest(&rel, &man);
    let v = check(&rel, &policy());
    fails_with(
        &v,
        "secondary",
        "bands.parquet, row 1: secondary: the only withheld cell",
    );
}

#[test]
fn a_quantile_recorded_at_another_probability_is_refused() {
    // The file may not say what a quantile column is: check reads its probability from its name.
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    rewrite(&rel, "bands.parquet", |_, _, kv| {
        for k in kv.iter_mut() {
            if k.key == "sluice.columns" {
                let v = k.value.clone().unwrap();
                assert!(v.contains("\"p\":0.5"), "{v}");
                k.value = Some(v.replace("\"p\":0.5", "\"p\":0.1"));
            }
        }
    });
    let v = check(&rel, &policy());
    fails_with(
        &v,
        "quantile",
        "recorded as the quantile at p = 0.1, but its name says Some(0.5)",
    );
}
