//! The report's statistics against numpy / scipy: `tests/reference/report_fixture.json`,
//! made by `tests/reference/make_report_fixture.py` (its docstring says how to
//! regenerate it). Everything must agree to 1e-9 relative.

use mnemon_report::stats::{
    exact_bootstrap_ci, iqm, iqm_pooled, mean_pooled, probability_of_improvement, welch_t,
};
use serde_json::Value;

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../../tests/reference/report_fixture.json"
    );
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{path}: {e}"));
    serde_json::from_str(&text).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

#[track_caller]
fn assert_rel(got: f64, want: f64, what: &str) {
    let tol = 1e-9 * want.abs().max(1e-12);
    assert!(
        (got - want).abs() <= tol,
        "{what}: got {got}, scipy/numpy {want}"
    );
}

// scipy.stats.trim_mean(x, 0.25) (Agarwal et al. 2021's IQM), n = 1..13.
#[test]
fn iqm_matches_scipy_trim_mean() {
    let f = fixture();
    let cases = f["trim_mean"].as_array().unwrap();
    assert!(cases.len() >= 10);
    for c in cases {
        let x = floats(&c["x"]);
        assert_rel(
            iqm(&x),
            c["iqm"].as_f64().unwrap(),
            &format!("iqm of {x:?}"),
        );
    }
}

// scipy.stats.ttest_ind(x, y, equal_var=False) and the Welch-Satterthwaite df (Welch 1947).
#[test]
fn welch_matches_scipy() {
    let f = fixture();
    for c in f["welch"].as_array().unwrap() {
        let (x, y) = (floats(&c["x"]), floats(&c["y"]));
        let w = welch_t(&x, &y).unwrap();
        let what = format!("welch {x:?} vs {y:?}");
        assert_rel(w.t, c["t"].as_f64().unwrap(), &format!("{what}: t"));
        assert_rel(w.df, c["df"].as_f64().unwrap(), &format!("{what}: df"));
        assert_rel(w.p, c["p"].as_f64().unwrap(), &format!("{what}: p"));
    }
}

// numpy mean over all pairs of (x > y) + 0.5 (x == y) (Agarwal et al. 2021).
#[test]
fn probability_of_improvement_matches_numpy() {
    let f = fixture();
    for c in f["improvement"].as_array().unwrap() {
        let (x, y) = (floats(&c["x"]), floats(&c["y"]));
        assert_rel(
            probability_of_improvement(&x, &y),
            c["p"].as_f64().unwrap(),
            &format!("P({x:?} > {y:?})"),
        );
    }
}

// Every ordered stratified resample enumerated in Python, numpy.percentile (linear) of
// the pooled mean and pooled trim_mean(., 0.25).
#[test]
fn exact_bootstrap_matches_numpy_enumeration() {
    let f = fixture();
    let e = &f["exact_bootstrap"];
    let strata: Vec<Vec<f64>> = e["strata"].as_array().unwrap().iter().map(floats).collect();
    for c in e["intervals"].as_array().unwrap() {
        let level = c["level"].as_f64().unwrap();
        assert_eq!(c["resamples"].as_u64(), Some(4u64.pow(4) * 3u64.pow(3)));
        let m = exact_bootstrap_ci(&strata, &mean_pooled, level).unwrap();
        let want = floats(&c["mean"]);
        assert_rel(m.low, want[0], &format!("mean CI low at {level}"));
        assert_rel(m.high, want[1], &format!("mean CI high at {level}"));
        let q = exact_bootstrap_ci(&strata, &iqm_pooled, level).unwrap();
        let want = floats(&c["iqm"]);
        assert_rel(q.low, want[0], &format!("IQM CI low at {level}"));
        assert_rel(q.high, want[1], &format!("IQM CI high at {level}"));
    }
}
