//! bandwatch's trend statistics (`bandwatch::dsp::trend`) against the
//! reference libraries, on the same numbers.
//!
//! Source of every expected value: tests/reference/fixtures/trend_stats.json,
//! written by tests/reference/make_fixtures.py with scipy and pymannkendall
//! from PyPI (versions pinned in tests/reference/requirements.txt and
//! recorded in the file; `bash tests/external/fixtures_regenerate.sh`
//! checks the committed file is what they produce):
//!
//! - `scipy.stats.theilslopes(y, x, 0.95)`: slope, intercept (method
//!   "separate": median(y) − slope·median(x)), and Sen's 95 % interval of
//!   the slope, on the values and, where all are positive, on ln(values);
//! - `pymannkendall.original_test(y)`: the Mann–Kendall S, Var(S) with the
//!   tie correction, Z with the continuity correction, the two-sided p and
//!   Kendall's τ;
//! - `scipy.stats.kendalltau(index, y, method="asymptotic")`: τ-b and its p
//!   value, which uses no continuity correction: with the time index
//!   (no ties) as one variable its variance is the Mann–Kendall Var(S), so
//!   τ-b = S / √((n(n−1)/2)·(n(n−1)/2 − Σ t(t−1)/2)) and p = erfc(|S|/σ/√2).
//!
//! The inputs are the fixture's numbers (10 significant digits) and both
//! sides compute in f64 the same way: the tolerance is 1e-9 relative, the
//! fixture's rounding. Tie handling: values equal as f64 are ties (no
//! tolerance), as in both references.
//!
//! Time to a limit: the fixture's synthetic series are made from known
//! lines (linear growth, exponential growth, a fall), so the time the line
//! reaches a limit is known exactly; the projection must land within 10 %
//! of it and its interval contain it.

#[path = "reference/support.rs"]
mod support;

use bandwatch::dsp::trend::{
    mann_kendall, normal_two_sided, project, theil_sen, Growth, Reach, MIN_POINTS,
};
use serde_json::Value;
use support::f64s;

fn num(v: &Value, key: &str) -> f64 {
    v[key].as_f64().unwrap_or_else(|| panic!("{key}: {v}"))
}

#[track_caller]
fn close(what: &str, ours: f64, theirs: f64) {
    let tol = 1e-9 * theirs.abs().max(1e-300) + 1e-300;
    assert!(
        (ours - theirs).abs() <= tol,
        "{what}: ours {ours:e}, reference {theirs:e}"
    );
}

#[test]
fn theil_sen_matches_scipy_theilslopes() {
    let doc = support::fixture("trend_stats.json");
    let cases = doc["cases"].as_array().expect("cases");
    assert!(cases.len() >= 7, "{} cases", cases.len());
    for c in cases {
        let name = c["name"].as_str().expect("name");
        let (x, y) = (f64s(&c["x"]), f64s(&c["y"]));
        let mut series = vec![("values", y.clone(), &c["theilslopes"])];
        if c.get("theilslopes_log").is_some() {
            series.push((
                "ln(values)",
                y.iter().map(|v| v.ln()).collect(),
                &c["theilslopes_log"],
            ));
        }
        for (on, y, r) in series {
            let ts = theil_sen(&x, &y, 0.95).unwrap_or_else(|e| panic!("{name}: {e}"));
            let w = |k: &str| format!("{name} on {on}: {k}");
            close(&w("slope"), ts.slope, num(r, "slope"));
            close(&w("intercept"), ts.intercept, num(r, "intercept"));
            close(&w("low_slope"), ts.low_slope, num(r, "low_slope"));
            close(&w("high_slope"), ts.high_slope, num(r, "high_slope"));
        }
    }
}

#[test]
fn mann_kendall_matches_pymannkendall_and_kendalltau() {
    let doc = support::fixture("trend_stats.json");
    let mut tied = 0;
    for c in doc["cases"].as_array().expect("cases") {
        let name = c["name"].as_str().expect("name");
        let y = f64s(&c["y"]);
        let mk = mann_kendall(&y).unwrap_or_else(|e| panic!("{name}: {e}"));
        let r = &c["mann_kendall"];
        assert_eq!(mk.s as f64, num(r, "s"), "{name}: S");
        close(&format!("{name}: Var(S)"), mk.var_s, num(r, "var_s"));
        close(&format!("{name}: Z"), mk.z, num(r, "z"));
        // pymannkendall writes p as 2(1 − Φ(|Z|)): 1 − Φ near 1 loses
        // what lies below f64's spacing there (2.2e-16, twice that for
        // the two sides); ours is erfc(|Z|/√2), exact in the tail.
        let tol = 1e-9 * num(r, "p") + 4.5e-16;
        assert!(
            (mk.p - num(r, "p")).abs() <= tol,
            "{name}: p ours {:e}, pymannkendall {:e}",
            mk.p,
            num(r, "p")
        );
        close(&format!("{name}: tau"), mk.tau, num(r, "tau"));

        // kendalltau on the time index: τ-b and the uncorrected p.
        let n = y.len() as f64;
        let n0 = n * (n - 1.0) / 2.0;
        let mut sorted = y.clone();
        sorted.sort_by(f64::total_cmp);
        let mut n2 = 0.0;
        let mut i = 0;
        while i < sorted.len() {
            let j = i + sorted[i..].iter().take_while(|&&v| v == sorted[i]).count();
            let t = (j - i) as f64;
            n2 += t * (t - 1.0) / 2.0;
            i = j;
        }
        if n2 > 0.0 {
            tied += 1;
        }
        let k = &c["kendalltau"];
        close(
            &format!("{name}: tau-b"),
            mk.s as f64 / (n0 * (n0 - n2)).sqrt(),
            num(k, "tau_b"),
        );
        let p = normal_two_sided(mk.s as f64 / mk.var_s.sqrt());
        close(&format!("{name}: uncorrected p"), p, num(k, "p"));
    }
    assert!(
        tied >= 1,
        "the fixture has a case with tied values ({tied})"
    );
}

#[test]
fn projections_find_the_known_crossing_times() {
    let doc = support::fixture("trend_stats.json");
    let cases = doc["cases"].as_array().expect("cases");
    let crossings = doc["crossings"].as_array().expect("crossings");
    assert_eq!(crossings.len(), 3);
    for k in crossings {
        let name = k["case"].as_str().expect("case");
        let c = cases
            .iter()
            .find(|c| c["name"] == name)
            .unwrap_or_else(|| panic!("no case {name}"));
        let (x, y) = (f64s(&c["x"]), f64s(&c["y"]));
        let growth = match k["growth"].as_str() {
            Some("linear") => Growth::Linear,
            Some("exponential") => Growth::Exponential,
            g => panic!("growth {g:?}"),
        };
        let truth = num(k, "true_crossing_s");
        let now = x[x.len() - 1];
        let (p, reach) = project(
            &x,
            &y,
            growth,
            num(k, "limit"),
            k["rising"].as_bool().expect("rising"),
            0.05,
            now,
        )
        .unwrap_or_else(|e| panic!("{name}: {e}"));
        assert!(p.test.p < 1e-6, "{name}: the trend is significant ({p:?})");
        let Reach::At {
            at,
            earliest,
            latest,
        } = reach
        else {
            panic!("{name}: no crossing ({reach:?})")
        };
        assert!(
            (at - truth).abs() <= 0.10 * (truth - x[0]),
            "{name}: crossing at {at} s, truth {truth} s"
        );
        let latest = latest.unwrap_or(f64::INFINITY);
        assert!(
            earliest <= truth && truth <= latest,
            "{name}: interval {earliest}..{latest} s misses {truth} s"
        );
        assert!(earliest <= at && at <= latest);
    }
}

#[test]
fn no_significant_trend_gives_no_time() {
    let doc = support::fixture("trend_stats.json");
    let c = doc["cases"]
        .as_array()
        .expect("cases")
        .iter()
        .find(|c| c["name"] == "flat")
        .expect("flat case");
    let (x, y) = (f64s(&c["x"]), f64s(&c["y"]));
    assert!(x.len() >= MIN_POINTS);
    let (p, reach) = project(&x, &y, Growth::Linear, 4.0, true, 0.05, x[x.len() - 1]).expect("fit");
    assert!(
        num(&c["mann_kendall"], "p") >= 0.05,
        "the reference finds no trend"
    );
    assert_eq!(reach, Reach::NoSignificantTrend, "{p:?}");
}
