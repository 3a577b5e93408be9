//! The BCG vaccine trials (Colditz et al. 1994) as 13 site releases, one trial each, pooled
//! through the full path: the log risk ratios go in as site estimates, the pooled release's
//! `pooled_estimates` must match the published values (to printed precision).

use crate::common::{estimates, get, policy, provenance, read, release, rules};
use sluice_aggregate::Value;

const TRIALS: [(f64, f64, f64, f64); 13] = [
    (4., 119., 11., 128.),
    (6., 300., 29., 274.),
    (3., 228., 11., 209.),
    (62., 13536., 248., 12619.),
    (33., 5036., 47., 5761.),
    (180., 1361., 372., 1079.),
    (8., 2537., 10., 619.),
    (505., 87886., 499., 87892.),
    (29., 7470., 45., 7232.),
    (17., 1699., 65., 1600.),
    (186., 50448., 141., 27197.),
    (5., 2493., 3., 2338.),
    (27., 16886., 29., 17825.),
];

#[test]
fn bcg_trials_pool_to_the_published_values() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let mut sites = Vec::new();
    for (i, &(tp, tn, cp, cn)) in TRIALS.iter().enumerate() {
        let y = ((tp / (tp + tn)) / (cp / (cp + cn))).ln();
        let v = 1.0 / tp - 1.0 / (tp + tn) + 1.0 / cp - 1.0 / (cp + cn);
        let n = (((tp + tn + cp + cn) / 5.0).round() * 5.0) as i64;
        let t = estimates(&[("bcg", "log_risk_ratio", y, v.sqrt(), n)]);
        let prov = provenance(&format!("trial{:02}", i + 1), "bcg", &"a".repeat(64));
        sites.push(release(d.path(), &prov, &r, &[t], true));
    }
    let out = d.path().join("pooled");
    let rep = sluice_pool::pool(&sites, &out, &r, &policy()).unwrap();
    assert!(rep.verdict.passed(), "{}", rep.verdict);
    let (names, rows) = read(&out, "pooled_estimates");
    assert_eq!(rows.len(), 1);
    let f = |c: &str| match get(&names, &rows[0], c) {
        Value::Float(x) => *x,
        v => panic!("{c} = {v:?}"),
    };
    let close = |c: &str, got: f64, want: f64, tol: f64| {
        assert!((got - want).abs() <= tol, "{c}: {got} vs {want}");
    };
    close("fixed", f("fixed_estimate"), -0.4303, 5e-5);
    close("fixed_lower", f("fixed_lower"), -0.5097, 5e-5);
    close("fixed_upper", f("fixed_upper"), -0.3509, 5e-5);
    close("random", f("random_estimate"), -0.7141, 5e-5);
    close("random_se", f("random_se"), 0.1787, 5e-5);
    close("random_lower", f("random_lower"), -1.0644, 5e-5);
    close("random_upper", f("random_upper"), -0.3638, 5e-5);
    close("tau2", f("tau2"), 0.3088, 5e-5);
    close("i2 %", f("i2") * 100.0, 92.1173, 5e-5);
    close("q", f("q"), 152.2330, 5e-5);
    close("q_df", f("q_df"), 12.0, 0.0);
    close("n_sites", f("n_sites"), 13.0, 0.0);
    close("RR", f("random_estimate").exp(), 0.4896, 5e-5);
    let (_, site_rows) = read(&out, "site_estimates");
    assert_eq!(site_rows.len(), 13);
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("Forest plots (1)") && html.contains("<svg"));
}

#[test]
fn a_withheld_site_estimate_pools_over_the_rest() {
    use sluice_pool::{EstimateInput, pool_rows};
    let e = |s: &str, y: f64, se: f64| EstimateInput {
        site: s.into(),
        estimate: y,
        se,
        lower: None,
        upper: None,
        n_patients: 20,
    };
    let p = pool_rows(&[e("a", 0.1, 0.1), e("b", 0.3, 0.2), e("c", f64::NAN, 0.1)]).unwrap();
    assert_eq!((p.n_sites, p.n_patients), (2, 40));
    assert!(pool_rows(&[e("a", 0.1, 0.1), e("c", f64::NAN, 0.1)]).is_none());
}
