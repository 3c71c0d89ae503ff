//! `tagwright fit` on simulated local level series.

use std::sync::Arc;

use arrow_array::{
    ArrayRef, Float32Array, Int64Array, TimestampMicrosecondArray, TimestampMillisecondArray, TimestampNanosecondArray,
    TimestampSecondArray,
};
use serde_json::Value;
use tagwright_tests::{
    fit, floats, long_rows, rfc3339, shuffle, simulate_local_level, strings, write_csv, write_parquet, Sandbox, Series,
};

const PERIOD_US: i64 = 5_000_000;
const SIGMA2_OBS: f64 = 1.0;
const SIGMA2_LEVEL: f64 = 0.1;
const TAG: &str = "FT-101.PV";

fn regular(tag: &str, seed: u64, n: usize) -> Series {
    simulate_local_level(tag, seed, n, SIGMA2_OBS, SIGMA2_LEVEL, PERIOD_US, |_, _| PERIOD_US)
}

fn param(j: &Value, name: &str) -> f64 {
    j["params"][name].as_f64().unwrap_or_else(|| panic!("no parameter {name} in {j}"))
}

/// Converged, and each variance within 4 standard errors and 30% of the truth.
#[track_caller]
fn assert_near_truth(j: &Value, sigma2_obs: f64, sigma2_level: f64) {
    assert_eq!(j["converged"], true, "{j}");
    for (name, truth) in [("sigma2.obs", sigma2_obs), ("sigma2.level", sigma2_level)] {
        let est = param(j, name);
        let se = j["std_errors"][name].as_f64().unwrap_or_else(|| panic!("no std error for {name}: {j}"));
        assert!((est - truth).abs() < 4.0 * se, "{name}: estimate {est}, truth {truth}, s.e. {se}");
        assert!((est / truth - 1.0).abs() < 0.3, "{name}: estimate {est}, truth {truth}");
    }
}

#[test]
fn csv_shuffled_with_other_tags_and_missing_values() {
    let sb = Sandbox::new();
    let mut a = regular(TAG, 11, 2000);
    // Missing values: empty cells, and NaN / infinite values, which are counted.
    for t in (50..2000).step_by(97) {
        a.values[t] = f64::NAN;
    }
    a.values[10] = f64::INFINITY;
    a.values[20] = f64::NEG_INFINITY;
    let b = regular("TT-204.PV", 12, 2000);
    let mut rows = long_rows(&[&a, &b]);
    shuffle(&mut rows, 5);
    let path = sb.path().join("shift.csv");
    write_csv(&path, &rows);

    let run = fit(&path, TAG, "local-level", &["--json"]);
    run.assert_code(0)
        .assert_stderr_has("were out of time order; the samples were sorted by time")
        .assert_stderr_has("2 value(s) of tag `FT-101.PV` were NaN or infinite");
    let j = run.json();
    assert_eq!(j["n"], 2000);
    assert_eq!(j["n_missing"], 21 + 2);
    assert_eq!(j["period_s"], 5.0);
    assert_near_truth(&j, SIGMA2_OBS, SIGMA2_LEVEL);
}

#[test]
fn parquet_timestamp_us_utc() {
    let sb = Sandbox::new();
    let a = regular(TAG, 21, 2000);
    let rows = long_rows(&[&a, &regular("PT-310.PV", 22, 2000)]);
    let path = sb.path().join("shift.parquet");
    write_parquet(
        &path,
        vec![
            ("tag", strings(rows.iter().map(|r| r.0.as_str()))),
            (
                "ts",
                Arc::new(TimestampMicrosecondArray::from_iter_values(rows.iter().map(|r| r.1)).with_timezone("UTC")),
            ),
            ("value", floats(rows.iter().map(|r| r.2))),
        ],
    );
    let run = fit(&path, TAG, "local-level", &["--json"]);
    run.assert_code(0);
    let j = run.json();
    assert_eq!(j["n"], 2000);
    assert_eq!(j["n_missing"], 0);
    assert_near_truth(&j, SIGMA2_OBS, SIGMA2_LEVEL);
}

#[test]
fn parquet_timestamp_ms_without_time_zone_and_float32_values() {
    let sb = Sandbox::new();
    let a = regular(TAG, 31, 2000);
    let path = sb.path().join("shift.pq");
    write_parquet(
        &path,
        vec![
            ("value", Arc::new(Float32Array::from_iter_values(a.values.iter().map(|&v| v as f32))) as ArrayRef),
            ("tag", strings(a.ts_us.iter().map(|_| TAG))),
            ("ts", Arc::new(TimestampMillisecondArray::from_iter_values(a.ts_us.iter().map(|t| t / 1000)))),
        ],
    );
    let run = fit(&path, TAG, "local-level", &["--json"]);
    run.assert_code(0);
    assert_near_truth(&run.json(), SIGMA2_OBS, SIGMA2_LEVEL);
}

/// Irregular sampling: mostly every 5 s, with gaps of 7.5 s to 60 s. The
/// median spacing (5 s) is the period; the level moves with variance
/// sigma2.level per 5 s whatever the gap, and the fit recovers it.
#[test]
fn irregular_timestamps() {
    let sb = Sandbox::new();
    let a = simulate_local_level(TAG, 41, 2000, SIGMA2_OBS, SIGMA2_LEVEL, PERIOD_US, |_, rng| match rng.below(10) {
        0 => 7_500_000,
        1 => 15_000_000,
        2 => 5_000_000 * (2 + rng.below(11) as i64),
        _ => PERIOD_US,
    });
    let path = sb.path().join("irregular.csv");
    write_csv(&path, &long_rows(&[&a]));

    let run = fit(&path, TAG, "local-level", &["--json"]);
    run.assert_code(0);
    let j = run.json();
    assert_eq!(j["period_s"], 5.0);
    assert_near_truth(&j, SIGMA2_OBS, SIGMA2_LEVEL);

    // With a 10 s period the same model has twice the level variance per
    // period, the same observation variance and the same likelihood.
    let run10 = fit(&path, TAG, "local-level", &["--json", "--period", "10"]);
    run10.assert_code(0);
    let j10 = run10.json();
    assert_eq!(j10["period_s"], 10.0);
    let rel = |a: f64, b: f64| (a - b).abs() / b.abs();
    assert!(rel(param(&j10, "sigma2.level"), 2.0 * param(&j, "sigma2.level")) < 1e-3, "{j}\n{j10}");
    assert!(rel(param(&j10, "sigma2.obs"), param(&j, "sigma2.obs")) < 1e-3, "{j}\n{j10}");
    let (ll, ll10) = (j["loglik"].as_f64().unwrap(), j10["loglik"].as_f64().unwrap());
    assert!((ll - ll10).abs() < 1e-6 * ll.abs(), "loglik {ll} vs {ll10}");
}

/// The same samples in every accepted time encoding give the same fit, to the bit.
#[test]
fn every_time_encoding_gives_the_same_fit() {
    let sb = Sandbox::new();
    let a = simulate_local_level(TAG, 51, 300, SIGMA2_OBS, SIGMA2_LEVEL, PERIOD_US, |_, _| PERIOD_US);
    let other = simulate_local_level("LT-120.PV", 52, 300, SIGMA2_OBS, SIGMA2_LEVEL, PERIOD_US, |_, _| PERIOD_US);
    let rows = long_rows(&[&a, &other]);
    let secs: Vec<i64> = rows.iter().map(|r| r.1 / 1_000_000).collect();
    let tags = || strings(rows.iter().map(|r| r.0.as_str()));
    let values = || floats(rows.iter().map(|r| r.2));
    let mut files = Vec::new();

    let p = sb.path().join("rfc3339_z.csv");
    write_csv(&p, &rows);
    files.push(p);
    let csv = |name: &str, time: &dyn Fn(i64) -> String| {
        let mut text = String::from("tag,ts,value\n");
        for r in &rows {
            text += &format!("{},{},{}\n", r.0, time(r.1), r.2);
        }
        sb.write(name, text)
    };
    files.push(csv("epoch_seconds.csv", &|us| (us / 1_000_000).to_string()));
    files.push(csv("offset.csv", &|us| rfc3339(us + 3_600_000_000).replace('Z', "+01:00")));
    files.push(csv("naive.csv", &|us| rfc3339(us).replace('T', " ").replace('Z', "")));

    let encodings: Vec<(&str, ArrayRef)> = vec![
        ("ts_s.parquet", Arc::new(TimestampSecondArray::from(secs.clone()))),
        ("ts_ms.parquet", Arc::new(TimestampMillisecondArray::from_iter_values(secs.iter().map(|s| s * 1000)))),
        (
            "ts_us_utc.parquet",
            Arc::new(TimestampMicrosecondArray::from_iter_values(rows.iter().map(|r| r.1)).with_timezone("UTC")),
        ),
        (
            "ts_ns_zone.parquet",
            Arc::new(
                TimestampNanosecondArray::from_iter_values(rows.iter().map(|r| r.1 * 1000))
                    .with_timezone("Europe/Berlin"),
            ),
        ),
        ("epoch_int64.parquet", Arc::new(Int64Array::from(secs.clone()))),
    ];
    for (name, ts) in encodings {
        let p = sb.path().join(name);
        write_parquet(&p, vec![("tag", tags()), ("ts", ts), ("value", values())]);
        files.push(p);
    }

    let first = fit(&files[0], TAG, "local-level", &["--json"]);
    first.assert_code(0);
    assert_eq!(first.json()["n"], 300);
    for f in &files[1..] {
        let run = fit(f, TAG, "local-level", &["--json"]);
        run.assert_code(0);
        assert_eq!(run.stdout, first.stdout, "{} differs from {}", f.display(), files[0].display());
    }
}

#[test]
fn json_has_exactly_the_contract_keys_in_order() {
    let sb = Sandbox::new();
    let path = sb.path().join("a.csv");
    write_csv(&path, &long_rows(&[&regular(TAG, 61, 400)]));
    let run = fit(&path, TAG, "local-level+arma(1,0)", &["--json"]);
    run.assert_code(0);
    assert_eq!(run.stdout.lines().count(), 1, "one JSON object on one line:\n{run}");
    let j = run.json();
    let keys: Vec<&str> = j.as_object().unwrap().keys().map(String::as_str).collect();
    // The design's keys, then the two optional ones this command adds.
    assert_eq!(
        keys,
        ["model", "params", "loglik", "aic", "n", "n_missing", "converged", "iterations", "std_errors", "period_s"]
    );
    assert_eq!(j["model"], "local-level+arma(1,0)");
    // Parameter order is the model's, in the text itself.
    let names = ["sigma2.obs", "sigma2.level", "phi.1", "sigma2.arma"];
    let pos: Vec<usize> = names.iter().map(|n| run.stdout.find(&format!("\"{n}\"")).unwrap()).collect();
    assert!(pos.windows(2).all(|w| w[0] < w[1]), "order of {names:?} in {}", run.stdout);
    for n in names {
        assert!(j["params"][n].is_f64(), "{n}: {j}");
        assert!(j["std_errors"][n].is_f64() || j["std_errors"][n].is_null(), "{n}: {j}");
    }
    assert_eq!(j["params"].as_object().unwrap().len(), 4);
    assert!(j["loglik"].is_f64() && j["aic"].is_f64() && j["iterations"].is_u64());
    assert!(j["converged"].is_boolean());
}

#[test]
fn table_output() {
    let sb = Sandbox::new();
    let path = sb.path().join("a.csv");
    write_csv(&path, &long_rows(&[&regular(TAG, 71, 500)]));
    let run = fit(&path, TAG, "local-level", &[]);
    run.assert_code(0);
    for fragment in [
        "tag             FT-101.PV\n",
        "model           local-level\n",
        "period          5 s (median spacing)\n",
        "samples         n = 500 (0 missing), from 500 rows in the file\n",
        "converged       yes (",
        "parameter             estimate      std. error\n",
        "\nsigma2.obs  ",
        "\nsigma2.level  ",
        "\nlog-likelihood  ",
        "\nAIC  ",
    ] {
        assert!(run.stdout.contains(fragment), "stdout lacks {fragment:?}\n{run}");
    }
    assert!(run.stderr.is_empty(), "{run}");
}
