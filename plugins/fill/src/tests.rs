#![allow(clippy::needless_range_loop)]

use std::sync::Arc;

use tagwright::plugin::{Registry, StepContext, TagSettings, TagWork};
use tagwright::rng::Rng;
use tagwright::series::{Fault, Quality, ReadCounts, Sampling, Status, TagSeries, TagTable};

use super::*;

const PERIOD: i64 = 5_000_000;

fn work(ts: Vec<i64>, values: Vec<f64>, sampling: Sampling, model: &str) -> TagWork {
    let n = values.len();
    let s = TagSeries {
        tag: "TT-1.PV".into(),
        ts_us: ts,
        values,
        quality: vec![Quality::Good; n],
        counts: ReadCounts::default(),
    };
    TagWork {
        table: TagTable::from_series(&s, PERIOD, sampling),
        settings: Arc::new(TagSettings { model: Some(model.parse().unwrap()), ..Default::default() }),
        report: Default::default(),
        state: Default::default(),
    }
}

fn fill(w: &mut TagWork, params: serde_json::Value) {
    let mut reg = Registry::new();
    register(&mut reg);
    let step = reg.make("fill", &params).unwrap();
    step.apply(std::slice::from_mut(w), &StepContext::new(3)).unwrap();
    w.table.check().unwrap();
}

/// A random walk plus noise, with its truth.
fn simulate(seed: u64, n: usize) -> (Vec<f64>, Vec<f64>) {
    let mut rng = Rng::new(seed);
    let mut x = 50.0;
    let mut truth = Vec::with_capacity(n);
    let mut y = Vec::with_capacity(n);
    for _ in 0..n {
        x += 0.05 * rng.normal();
        truth.push(x);
        y.push(x + 0.1 * rng.normal());
    }
    (truth, y)
}

#[test]
fn gaps_get_rows_on_the_period_with_honest_intervals() {
    // 200 shifts' worth of 2-minute gaps: coverage of the 95 % interval
    // measured inside the gaps only.
    let (mut inside, mut covered) = (0usize, 0usize);
    for seed in 0..40u64 {
        let (truth, y) = simulate(seed, 2000);
        let keep: Vec<usize> = (0..2000).filter(|i| !(500..524).contains(i) && !(1500..1524).contains(i)).collect();
        let ts: Vec<i64> = keep.iter().map(|&i| i as i64 * PERIOD).collect();
        let vals: Vec<f64> = keep.iter().map(|&i| y[i]).collect();
        let mut w = work(ts, vals, Sampling::Regular, "local-level");
        fill(&mut w, serde_json::Value::Null);
        let t = &w.table;
        assert_eq!(t.len(), 2000, "rows inserted on the period");
        for i in 0..2000 {
            assert_eq!(t.ts_us[i], i as i64 * PERIOD);
            if t.status[i] == Status::Filled {
                assert!(t.raw[i].is_nan() && t.fault[i].is_none() && t.decided_by[i] == 3);
                inside += 1;
                if (t.value[i] - truth[i]).abs() <= 1.959_964 * t.std[i] {
                    covered += 1;
                }
            }
        }
    }
    assert_eq!(inside, 40 * 48);
    let c = covered as f64 / inside as f64;
    // Binomial sd at 1920 rows is 0.5 %, but rows of one gap are correlated:
    // a generous band still catches a std that is too small or too large.
    assert!((0.91..=0.985).contains(&c), "coverage inside gaps {c}");
}

#[test]
fn rejected_readings_are_replaced_and_long_gaps_get_null_rows() {
    let (_, mut y) = simulate(3, 1000);
    y[300] = 999.0;
    let ts: Vec<i64> = (0..1000).filter(|i| !(600..800).contains(i)).map(|i| i * PERIOD).collect();
    let vals: Vec<f64> = (0..1000).filter(|i| !(600..800).contains(i)).map(|i| y[i as usize]).collect();
    let mut w = work(ts, vals, Sampling::Regular, "local-level");
    w.table.decide(300, Status::Rejected, Some(Fault::Spike), 2, 40.0, 4.5);
    w.table.value[300] = f64::NAN;
    fill(&mut w, serde_json::json!({"max_gap": "10m"}));
    let t = &w.table;
    assert_eq!(t.status[300], Status::Replaced);
    assert_eq!((t.fault[300], t.decided_by[300], t.stat[300]), (Some(Fault::Spike), 2, 40.0));
    assert!((t.value[300] - y[299]).abs() < 1.0 && t.std[300] > 0.0);
    // The 200-row gap (16.7 minutes) is longer than max_gap: null values.
    let gap: Vec<usize> = (0..t.len()).filter(|&i| t.status[i] == Status::Filled).collect();
    assert_eq!(gap.len(), 200);
    assert!(gap.iter().all(|&i| t.value[i].is_nan() && t.std[i].is_nan()));
    assert_eq!(w.report.extra["fill"]["no_estimate"], 200);
}

/// Each hole (a gap, a run of rejected readings, or both side by side) is
/// judged on its own length against `max_gap`.
#[test]
fn each_hole_is_judged_on_its_own_length() {
    let (_, y) = simulate(11, 1200);
    // Gaps: 3 rows (15 s) at 200, 150 rows (12.5 min) at 500.
    let missing = |i: &i64| (200..203).contains(i) || (500..650).contains(i);
    let ts: Vec<i64> = (0..1200).filter(|i| !missing(i)).map(|i| i * PERIOD).collect();
    let vals: Vec<f64> = (0..1200).filter(|i| !missing(i)).map(|i| y[i as usize]).collect();
    let mut w = work(ts.clone(), vals, Sampling::Regular, "local-level");
    let row_at = |i: i64| ts.iter().position(|&t| t == i * PERIOD).unwrap();
    // Rejected: a run of 4 (20 s) at 300, a run of 130 (10.8 min) at 900,
    // and one reading right after the short gap (the hole grows to 4 rows).
    let rejected: Vec<usize> = (300..304).chain(900..1030).chain([203]).map(row_at).collect();
    for &r in &rejected {
        w.table.decide(r, Status::Rejected, Some(Fault::Spike), 2, 40.0, 4.5);
        w.table.value[r] = f64::NAN;
    }
    fill(&mut w, serde_json::json!({"max_gap": "10m"}));
    let t = &w.table;
    let at = |i: i64| t.ts_us.iter().position(|&x| x == i * PERIOD).unwrap();
    // Short holes get estimates.
    assert!((200..203).all(|i| t.status[at(i)] == Status::Filled && t.value[at(i)].is_finite()));
    assert!([203, 300, 301, 302, 303].iter().all(|&i| t.status[at(i)] == Status::Replaced));
    // Long ones do not: null rows in the gap, the rejected run stays rejected.
    assert!((500..650).all(|i| t.status[at(i)] == Status::Filled && t.value[at(i)].is_nan()));
    assert!((900..1030).all(|i| t.status[at(i)] == Status::Rejected && t.std[at(i)].is_nan()));
    // Every other row has its std; observed rows keep their values.
    assert!((0..1200).filter(|i| !(500..650).contains(i) && !(900..1030).contains(i)).all(|i| t.std[at(i)] > 0.0));
    assert_eq!(t.value[at(100)], y[100]);
    assert_eq!(w.report.extra["fill"]["filled"], 3);
    assert_eq!(w.report.extra["fill"]["replaced"], 5);
    assert_eq!(w.report.extra["fill"]["no_estimate"], 150);
}

#[test]
fn exception_tags_are_filled_within_the_deadband() {
    let mut rng = Rng::new(4);
    let (mut x, mut last) = (50.0, f64::NAN);
    let (mut ts, mut vals, mut truth) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..2000i64 {
        x += 0.03 * rng.normal();
        truth.push(x);
        if last.is_nan() || (x - last).abs() > 0.5 {
            ts.push(i * PERIOD);
            vals.push(x);
            last = x;
        }
    }
    let stored = ts.len();
    let (first, last_ts) = (ts[0], ts[stored - 1]);
    let mut w = work(ts, vals, Sampling::Exception { deadband: 0.5 }, "local-level");
    fill(&mut w, serde_json::Value::Null);
    let t = &w.table;
    // Every scan from the first to the last stored reading has a row (the
    // window's edges are not extrapolated).
    assert_eq!(t.len(), ((last_ts - first) / PERIOD + 1) as usize);
    let filled: Vec<usize> = (0..t.len()).filter(|&i| t.status[i] == Status::Filled).collect();
    assert_eq!(filled.len(), t.len() - stored);
    // The estimates stay near the truth: the deadband bounds them.
    let worst = filled.iter().map(|&i| (t.value[i] - truth[(t.ts_us[i] / PERIOD) as usize]).abs()).fold(0.0, f64::max);
    assert!(worst < 1.0, "worst fill error {worst} with a deadband of 0.5");
}

#[test]
fn a_model_fitted_by_an_earlier_step_is_reused() {
    let (_, y) = simulate(5, 500);
    let mut w = work((0..500).map(|i| i * PERIOD).collect(), y, Sampling::Regular, "local-level");
    w.report.model = Some("local-level".into());
    w.report.params = [("sigma2.obs".to_string(), 0.01), ("sigma2.level".to_string(), 0.0025)].into();
    fill(&mut w, serde_json::Value::Null);
    assert_eq!(w.report.params["sigma2.obs"], 0.01);
    // Every row gets the smoothed standard deviation of the process value,
    // below the measurement noise.
    assert!(w.table.std.iter().all(|&s| s > 0.0 && s < 0.1));
    assert!(Registry::new().make("fill", &serde_json::Value::Null).is_err());
    let mut reg = Registry::new();
    register(&mut reg);
    assert!(reg.make("fill", &serde_json::json!({"max_gap": "0s"})).err().unwrap().contains("max_gap"));
    assert!(reg.make("fill", &serde_json::json!({"gap": "1m"})).err().unwrap().contains("unknown field"));
}

/// A tag with no gap and no rejected reading (the usual tag) keeps every
/// value and status, and every row gets the smoother's standard deviation:
/// the same numbers as the smoother run directly on its readings.
#[test]
fn a_tag_with_nothing_to_fill_gets_its_std_on_every_row() {
    let (_, y) = simulate(21, 800);
    let ts: Vec<i64> = (0..800).map(|i| i * PERIOD).collect();
    let mut w = work(ts, y.clone(), Sampling::Regular, "local-level");
    let params = serde_json::json!({"params": {"sigma2.obs": 0.01, "sigma2.level": 0.0025}});
    fill(&mut w, params);
    let t = &w.table;
    assert_eq!(t.len(), 800);
    assert!(t.status.iter().all(|&s| s == Status::Ok) && t.fault.iter().all(|f| f.is_none()));
    assert!(t.value.iter().zip(&y).all(|(a, b)| a.to_bits() == b.to_bits()), "values unchanged");
    let fill = &w.report.extra["fill"];
    assert_eq!(
        (fill["rows_inserted"].as_u64(), fill["filled"].as_u64(), fill["replaced"].as_u64()),
        (Some(0), Some(0), Some(0))
    );

    let spec: tagwright::ssm::ModelSpec = "local-level".parse().unwrap();
    let given = [("sigma2.obs".to_string(), 0.01), ("sigma2.level".to_string(), 0.0025)].into_iter().collect();
    let f = Fitted::given(&spec, &given).unwrap();
    let mut obs = TagObs::build(t, 1.0, |_| true, 0);
    obs.set_noise(f.obs_noise());
    let direct = f.smooth(&obs, false).unwrap();
    assert!(t.std.iter().zip(&direct.sd).all(|(a, b)| a.to_bits() == b.to_bits()), "std is the smoother's");
    assert!(t.std.iter().all(|&s| s > 0.0 && s < 0.1));
}
