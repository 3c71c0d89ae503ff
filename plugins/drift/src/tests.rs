//! Simulated groups with a known truth.

use std::sync::Arc;

use serde_json::json;
use tagwright::plugin::{Registry, StepContext, TagSettings, TagWork};
use tagwright::rng::Rng;
use tagwright::series::{Fault, Quality, ReadCounts, Sampling, Status, TagSeries, TagTable};

use crate::jumps::detect;

const PERIOD_US: i64 = 5_000_000;
const T0: i64 = 1_767_250_800_000_000; // 2026-01-01 07:00 UTC
const PER_HOUR: f64 = 720.0; // 5-second samples

/// One simulated transmitter: noise sd and bias as a function of the sample index.
struct Member {
    name: &'static str,
    noise: f64,
    bias: Box<dyn Fn(usize) -> f64>,
}

fn member(name: &'static str, noise: f64, bias: impl Fn(usize) -> f64 + 'static) -> Member {
    Member { name, noise, bias: Box::new(bias) }
}

fn drift_from(start: usize, rate_per_hour: f64) -> impl Fn(usize) -> f64 {
    move |k| if k >= start { rate_per_hour * (k - start) as f64 / PER_HOUR } else { 0.0 }
}

/// A process: random walk (sd 0.01 per sample) plus AR(1) (sd 0.1, phi 0.95)
/// around 50, plus `step` from sample `at`.
fn process(rng: &mut Rng, n: usize, step: Option<(usize, f64)>) -> Vec<f64> {
    let (mut w, mut a) = (0.0, 0.0);
    let phi: f64 = 0.95;
    (0..n)
        .map(|k| {
            w += 0.01 * rng.normal();
            a = phi * a + 0.1 * (1.0 - phi * phi).sqrt() * rng.normal();
            let s = step.map_or(0.0, |(at, size)| if k >= at { size } else { 0.0 });
            50.0 + w + a + s
        })
        .collect()
}

struct Group {
    works: Vec<TagWork>,
    truth: Vec<f64>,
}

fn group(seed: u64, n: usize, members: &[Member], trusted: Option<&str>, step: Option<(usize, f64)>) -> Group {
    let mut rng = Rng::new(seed);
    let truth = process(&mut rng, n, step);
    group_on(&mut rng, 0, &truth, members, trusted)
}

/// Readings of the members on `truth`, with the first sample at index `k0`
/// (for windows after the first).
fn group_on(rng: &mut Rng, k0: usize, truth: &[f64], members: &[Member], trusted: Option<&str>) -> Group {
    let n = truth.len();
    let works = members
        .iter()
        .map(|mb| {
            let values: Vec<f64> = (0..n).map(|k| truth[k] + (mb.bias)(k0 + k) + mb.noise * rng.normal()).collect();
            let s = TagSeries {
                tag: mb.name.into(),
                ts_us: (0..n as i64).map(|k| T0 + (k0 as i64 + k) * PERIOD_US).collect(),
                values,
                quality: vec![Quality::Good; n],
                counts: ReadCounts::default(),
            };
            TagWork {
                table: TagTable::from_series(&s, PERIOD_US, Sampling::Regular),
                settings: Arc::new(TagSettings {
                    units: Some("degC".into()),
                    range: Some((0.0, 150.0)),
                    group: Some("G".into()),
                    group_trusted: trusted.map(str::to_string),
                    ..Default::default()
                }),
                report: Default::default(),
                state: Default::default(),
            }
        })
        .collect();
    Group { works, truth: truth.to_vec() }
}

fn run(works: &mut [TagWork], params: serde_json::Value) {
    let mut reg = Registry::new();
    crate::register(&mut reg);
    let step = reg.make("drift", &params).unwrap();
    step.apply(works, &StepContext::new(2)).unwrap();
    for w in works.iter() {
        w.table.check().unwrap();
    }
}

fn extra(w: &TagWork) -> &serde_json::Value {
    &w.report.extra["drift"]
}

fn faults(w: &TagWork, f: Fault) -> usize {
    w.table.fault.iter().filter(|x| **x == Some(f)).count()
}

fn any_fault(w: &TagWork) -> usize {
    w.table.fault.iter().filter(|x| x.is_some()).count()
}

fn triple_with_drift(seed: u64, n: usize) -> Group {
    group(
        seed,
        n,
        &[member("TT-1A", 0.05, |_| 0.0), member("TT-1B", 0.05, drift_from(720, 0.3)), member("TT-1C", 0.05, |_| 0.0)],
        None,
        None,
    )
}

#[test]
fn triple_drift_is_attributed_and_corrected() {
    let n = 8 * 720;
    let mut g = triple_with_drift(11, n);
    run(&mut g.works, json!({"tolerance": 0.5}));
    let (a, b, c) = (&g.works[0], &g.works[1], &g.works[2]);
    // Healthy members: nothing flagged, held unbiased.
    assert_eq!((any_fault(a), any_fault(c)), (0, 0));
    assert_eq!(extra(a)["verdict"], "within tolerance");
    assert_eq!(extra(a)["bias_state"], false);
    // The drifting member is identified, labelled drift and corrected.
    let e = extra(b);
    assert_eq!(e["verdict"], "drifting");
    assert_eq!(e["attributed"], true);
    assert_eq!(e["corrected"], true);
    assert_eq!(e["members"], json!(["TT-1A", "TT-1B", "TT-1C"]));
    let truth_end = 0.3 * (n - 1 - 720) as f64 / PER_HOUR;
    let est = e["bias_end"].as_f64().unwrap();
    assert!((est - truth_end).abs() <= 0.05 * truth_end, "bias_end {est} vs {truth_end}");
    assert!(e["bias_end_std"].as_f64().unwrap() < 0.05);
    // Rows beyond the tolerance: the true bias passes 0.5 at 1 h + 100 min.
    let first_true = 720 + (0.5 / 0.3 * PER_HOUR) as usize;
    let flagged: Vec<usize> = (0..n).filter(|&k| b.table.fault[k] == Some(Fault::Drift)).collect();
    assert!(faults(b, Fault::Step) == 0);
    let first = flagged[0];
    assert!(first.abs_diff(first_true) < 200, "first flagged row {first}, truth {first_true}");
    // Every row well past the crossing is flagged (near it the estimate hovers at the tolerance).
    assert!((first_true + 200..n).all(|k| b.table.fault[k] == Some(Fault::Drift)));
    assert!(flagged.iter().all(|&k| b.table.status[k] == Status::Replaced && b.table.decided_by[k] == 2));
    assert!(flagged.iter().all(|&k| b.table.threshold[k] == 0.5 && b.table.stat[k] > 0.5));
    // Corrected values estimate the process; their std is honest.
    let (mut sq, mut covered) = (0.0, 0);
    for &k in &flagged {
        let err = b.table.value[k] - g.truth[k];
        sq += err * err;
        covered += usize::from(err.abs() <= 1.96 * b.table.std[k]);
    }
    let rmse = (sq / flagged.len() as f64).sqrt();
    let coverage = covered as f64 / flagged.len() as f64;
    assert!(rmse < 0.07, "rmse {rmse}");
    assert!((0.90..=0.99).contains(&coverage), "95% coverage {coverage}");
    // Carried state and model report.
    assert!(b.state["drift"]["bias_end"].as_f64().is_some());
    assert!(b.report.model.as_deref().unwrap_or("").starts_with("drift"));
    assert!(b.report.notes.iter().any(|n| n.contains("recalibrate")));
}

#[test]
fn drift_error_at_the_end_is_small_over_seeds() {
    // The benchmark's target, on a few seeds and a faster drift over 4 hours:
    // |error| <= 5 % of the drift.
    for seed in [1, 2, 3] {
        let n = 4 * 720;
        let mut g = group(
            seed,
            n,
            &[
                member("TT-1A", 0.05, |_| 0.0),
                member("TT-1B", 0.05, drift_from(360, 0.5)),
                member("TT-1C", 0.05, |_| 0.0),
            ],
            None,
            None,
        );
        run(&mut g.works, json!({"tolerance": 0.5}));
        let truth_end = 0.5 * (n - 1 - 360) as f64 / PER_HOUR;
        let est = extra(&g.works[1])["bias_end"].as_f64().unwrap();
        assert!((est - truth_end).abs() <= 0.05 * truth_end, "seed {seed}: {est} vs {truth_end}");
        assert_eq!(any_fault(&g.works[0]) + any_fault(&g.works[2]), 0, "seed {seed}");
    }
}

#[test]
fn common_step_of_all_members_is_the_process() {
    let n = 4 * 720;
    for trusted in [None, Some("TT-1A")] {
        let mut g = group(
            5,
            n,
            &[member("TT-1A", 0.05, |_| 0.0), member("TT-1B", 0.05, |_| 0.0), member("TT-1C", 0.08, |_| 0.0)],
            trusted,
            Some((1500, 4.0)),
        );
        run(&mut g.works, json!({"tolerance": 0.3}));
        for w in &g.works {
            assert_eq!(any_fault(w), 0, "{}: process step flagged", w.table.tag);
            assert_eq!(extra(w)["steps"], json!([]), "{}", w.table.tag);
            let v = extra(w)["verdict"].as_str().unwrap();
            assert!(v == "within tolerance" || v == "reference", "{v}");
        }
    }
}

#[test]
fn pair_without_trusted_is_flagged_diverging_and_never_corrected() {
    let n = 8 * 720;
    let mut g =
        group(21, n, &[member("FT-1A", 0.08, |_| 0.0), member("FT-1B", 0.12, drift_from(720, 0.3))], None, None);
    let raw: Vec<Vec<f64>> = g.works.iter().map(|w| w.table.raw.clone()).collect();
    run(&mut g.works, json!({"tolerance": 0.5}));
    for (w, raw) in g.works.iter().zip(&raw) {
        let e = extra(w);
        assert_eq!(e["verdict"], "diverging pair (cannot attribute)", "{}", w.table.tag);
        assert_eq!((e["attributed"].clone(), e["corrected"].clone()), (json!(false), json!(false)));
        assert!(e["bias_end"].is_null());
        assert!(faults(w, Fault::Drift) > 1000);
        // Never corrected: every status stays ok and every value is the reading.
        assert!(w.table.status.iter().all(|s| *s == Status::Ok));
        assert_eq!(&w.table.value, raw);
    }
    // Both members flag the same rows, with opposite statistics.
    let (a, b) = (&g.works[0], &g.works[1]);
    assert_eq!(a.table.fault, b.table.fault);
    let k = n - 1;
    assert!((a.table.stat[k] + b.table.stat[k]).abs() < 1e-12 && b.table.stat[k] > 0.5);
    let truth_end = 0.3 * (n - 1 - 720) as f64 / PER_HOUR;
    let d = extra(b)["difference_end"].as_f64().unwrap();
    assert!((d - truth_end).abs() < 0.1 * truth_end, "difference {d} vs {truth_end}");
    assert_eq!(extra(a)["difference_end"].as_f64().unwrap(), -d);
}

/// Sample at which the trusted pair's check meter steps.
const STEP_AT: usize = 1200;

fn trusted_pair_with_step(seed: u64) -> Group {
    group(
        seed,
        4 * 720,
        &[member("FT-1A", 0.08, |_| 0.0), member("FT-1B", 0.12, |k| if k >= STEP_AT { 0.6 } else { 0.0 })],
        Some("FT-1A"),
        Some((1000, 2.5)),
    )
}

#[test]
fn trusted_pair_zero_step_is_labelled_step() {
    let mut g = trusted_pair_with_step(31);
    run(&mut g.works, json!({"tolerance": 0.3}));
    let (a, b) = (&g.works[0], &g.works[1]);
    assert_eq!(extra(a)["verdict"], "reference");
    assert_eq!((extra(a)["attributed"].clone(), extra(b)["attributed"].clone()), (json!(false), json!(true)));
    assert_eq!(any_fault(a), 0);
    let e = extra(b);
    assert_eq!(e["verdict"], "step");
    let steps = e["steps"].as_array().unwrap();
    assert_eq!(steps.len(), 1, "{steps:?}");
    assert!((steps[0]["size"].as_f64().unwrap() - 0.6).abs() < 0.06, "{steps:?}");
    // Every row from the step on is a corrected `step`; none before; no `drift`.
    assert_eq!(faults(b, Fault::Drift), 0);
    assert!((0..STEP_AT).all(|k| b.table.fault[k].is_none() && b.table.status[k] == Status::Ok));
    assert!((STEP_AT..b.table.len()).all(|k| b.table.fault[k] == Some(Fault::Step)));
    assert!((STEP_AT..b.table.len()).all(|k| b.table.status[k] == Status::Replaced));
    let est = e["bias_end"].as_f64().unwrap();
    assert!((est - 0.6).abs() < 0.03, "bias_end {est}");
    // The corrected values are unbiased for the process.
    let mean_err: f64 =
        (STEP_AT..b.table.len()).map(|k| b.table.value[k] - g.truth[k]).sum::<f64>() / (b.table.len() - STEP_AT) as f64;
    assert!(mean_err.abs() < 0.03, "mean error {mean_err}");
}

#[test]
fn readings_an_earlier_step_judged_step_measure_the_bias() {
    // An earlier single-tag step (index 1) flagged B's readings after the zero
    // step as `step`: its decisions stand, and the readings size the bias.
    let mut g = trusted_pair_with_step(33);
    let n = g.works[1].table.len();
    for k in STEP_AT..n {
        g.works[1].table.decide(k, Status::Ok, Some(Fault::Step), 1, 5.0, 4.0);
    }
    run(&mut g.works, json!({"tolerance": 0.3}));
    let b = &g.works[1];
    assert!((STEP_AT..n).all(|k| b.table.decided_by[k] == 1 && b.table.status[k] == Status::Ok));
    let e = extra(b);
    assert_eq!(e["level_faults_used"], n - STEP_AT);
    assert_eq!(e["verdict"], "step");
    assert!((e["bias_end"].as_f64().unwrap() - 0.6).abs() < 0.06, "{e}");

    // In a triple, a drift an earlier step already flagged is still attributed and sized.
    let n3 = 4 * 720;
    let mut g3 = group(
        35,
        n3,
        &[member("TT-1A", 0.05, |_| 0.0), member("TT-1B", 0.05, drift_from(0, 0.6)), member("TT-1C", 0.05, |_| 0.0)],
        None,
        None,
    );
    for k in 50..n3 {
        g3.works[1].table.decide(k, Status::Replaced, Some(Fault::Drift), 1, 1.0, 0.5);
    }
    run(&mut g3.works, json!({"tolerance": 0.5}));
    let e = extra(&g3.works[1]);
    assert_eq!((e["verdict"].as_str(), e["level_faults_used"].as_u64()), (Some("drifting"), Some((n3 - 50) as u64)));
    let truth_end = 0.6 * (n3 - 1) as f64 / PER_HOUR;
    assert!((e["bias_end"].as_f64().unwrap() - truth_end).abs() < 0.05 * truth_end, "{e}");
    assert!((50..n3).all(|k| g3.works[1].table.decided_by[k] == 1));

    // Readings rejected as something else (here spikes) are missing: the bias
    // at the end is then unknown, and the record says so.
    let mut g = trusted_pair_with_step(33);
    for k in STEP_AT..n {
        g.works[1].table.decide(k, Status::Rejected, Some(Fault::Spike), 1, 5.0, 4.0);
    }
    run(&mut g.works, json!({"tolerance": 0.3, "fill_rejected": false}));
    let e = extra(&g.works[1]);
    assert_eq!(e["verdict"], "not assessed (too few usable readings at the end of the window)", "{e}");
    assert_eq!(e["level_faults_used"], 0);
    assert!(g.works[1].table.status[STEP_AT..].iter().all(|s| *s == Status::Rejected));
}

#[test]
fn missing_readings_and_rejected_rows() {
    let n = 6 * 720;
    let mut g = triple_with_drift(41, n);
    // Member C misses half an hour; B has rejected rows (earlier step 0) and uncertain ones.
    {
        let c = &mut g.works[2].table;
        let keep: Vec<usize> = (0..c.len()).filter(|k| !(2000..2360).contains(k)).collect();
        let s = TagSeries {
            tag: c.tag.clone(),
            ts_us: keep.iter().map(|&k| c.ts_us[k]).collect(),
            values: keep.iter().map(|&k| c.raw[k]).collect(),
            quality: vec![Quality::Good; keep.len()],
            counts: ReadCounts::default(),
        };
        *c = TagTable::from_series(&s, PERIOD_US, Sampling::Regular);
    }
    {
        let b = &mut g.works[1].table;
        for k in 3000..3010 {
            b.decide(k, Status::Rejected, Some(Fault::Range), 0, 999.0, 150.0);
            b.value[k] = f64::NAN;
            b.raw[k] = 999.0;
        }
        for k in 3500..3600 {
            b.quality[k] = Quality::Uncertain;
        }
    }
    run(&mut g.works, json!({"tolerance": 0.5}));
    let b = &g.works[1];
    assert_eq!(extra(b)["verdict"], "drifting");
    assert_eq!(any_fault(&g.works[0]) + any_fault(&g.works[2]), 0);
    for k in 3000..3010 {
        // Filled from the group: the earlier decision (fault, step, statistic) stays.
        assert_eq!(b.table.status[k], Status::Replaced);
        assert_eq!((b.table.fault[k], b.table.decided_by[k], b.table.stat[k]), (Some(Fault::Range), 0, 999.0));
        let err = b.table.value[k] - g.truth[k];
        assert!(b.table.std[k] > 0.0 && err.abs() < 4.0 * b.table.std[k], "row {k}: error {err}");
    }
    assert_eq!(extra(b)["rows"]["filled_from_group"], 10);
    // Uncertain rows are corrected with a larger std than their good neighbours.
    assert!(b.table.std[3550] > 1.5 * b.table.std[3450]);
    // C's table keeps its own rows; none flagged.
    assert_eq!(g.works[2].table.len(), n - 360);
    let truth_end = 0.3 * (n - 1 - 720) as f64 / PER_HOUR;
    let est = extra(b)["bias_end"].as_f64().unwrap();
    assert!((est - truth_end).abs() <= 0.05 * truth_end, "{est} vs {truth_end}");
}

#[test]
fn bad_parameters_and_settings_are_refused_with_a_message() {
    let mut reg = Registry::new();
    crate::register(&mut reg);
    let err = |p: serde_json::Value| reg.make("drift", &p).err().unwrap();
    assert!(err(json!({"tolerence": 0.5})).contains("unknown field `tolerence`"));
    assert!(err(json!({"tolerance": -1})).contains("`tolerance` must be a finite number > 0"));
    assert!(err(json!({"drift_rate": 0})).contains("`drift_rate`"));
    assert!(err(json!({"step_window": "5 minutes"})).contains("`step_window`"));
    assert!(err(json!({"step_threshold": 1.0})).contains("below 3"));
    assert!(reg.make("drift", &serde_json::Value::Null).is_ok());
    // No tolerance and no range: the group fails, naming its tags.
    let step = reg.make("drift", &serde_json::Value::Null).unwrap();
    let mut g = triple_with_drift(1, 100);
    for w in &mut g.works {
        w.settings = Arc::new(TagSettings { range: None, ..(*w.settings).clone() });
    }
    let e = step.apply(&mut g.works, &StepContext::new(0)).unwrap_err().to_string();
    assert!(e.contains("TT-1A, TT-1B, TT-1C") && e.contains("no tolerance"), "{e}");
    // A tag in no group, with neither tolerance nor range.
    let mut g = triple_with_drift(1, 100);
    g.works[0].settings = Arc::new(TagSettings { group: None, range: None, ..(*g.works[0].settings).clone() });
    let e = step.apply(&mut g.works[..1], &StepContext::new(0)).unwrap_err().to_string();
    assert!(e.contains("TT-1A") && e.contains("no tolerance"), "{e}");
}

#[test]
fn a_lone_transmitter_reports_its_movement_and_changes_nothing() {
    // No redundant member: a drift cannot be told from the process, so the
    // step only says how far the reading moved, beyond the tolerance or not.
    let mut g = triple_with_drift(3, 720);
    let mut lone = vec![g.works.remove(0)];
    lone[0].settings = Arc::new(TagSettings { group: None, ..(*lone[0].settings).clone() });
    // A level at 10 with white noise (sd 0.05), then a drift of -1.2 units
    // over the second half of the window.
    let n = lone[0].table.len();
    let mut rng = tagwright::rng::Rng::new(17);
    for i in 0..n {
        lone[0].table.raw[i] = 10.0 + 0.05 * rng.normal();
        lone[0].table.value[i] = lone[0].table.raw[i];
    }
    let before = lone[0].table.clone();
    for i in n / 2..n {
        lone[0].table.raw[i] -= 1.2 * (i - n / 2) as f64 / (n - n / 2) as f64;
        lone[0].table.value[i] = lone[0].table.raw[i];
    }
    let drifted = lone[0].table.clone();
    run(&mut lone, json!({"tolerance": 0.5}));
    let e = extra(&lone[0]);
    assert_eq!(e["verdict"], crate::lone::MOVED, "{e}");
    assert_eq!(e["attributed"], false);
    let moved = e["moved"].as_f64().unwrap();
    // The last eighth is the last quarter of the ramp: its median sits 7/8
    // of the way down, at -1.05.
    assert!((moved + 1.05).abs() < 0.03, "{moved}");
    assert!(lone[0].report.notes.iter().any(|n| n.contains("cannot be told from a process change")));
    let t = &lone[0].table;
    assert!(t.status == drifted.status && t.fault == drifted.fault, "rows changed");
    assert!(t.value.iter().zip(&drifted.value).all(|(a, b)| a.to_bits() == b.to_bits()), "values changed");
    // Without the drift: within tolerance, no note, and still no all-clear.
    let mut steady = vec![TagWork { table: before, report: Default::default(), ..lone[0].clone() }];
    run(&mut steady, json!({"tolerance": 0.5}));
    assert_eq!(extra(&steady[0])["verdict"], crate::lone::MOVED_WITHIN, "{}", extra(&steady[0]));
    assert_eq!(extra(&steady[0])["attributed"], false);
    assert!(extra(&steady[0])["moved"].as_f64().unwrap().abs() < 0.5);
    assert!(steady[0].report.notes.is_empty());
    // Too few usable readings in the last eighth (all but 3 marked bad):
    // not assessed, and still no all-clear.
    let mut sparse = vec![TagWork { table: drifted.clone(), report: Default::default(), ..lone[0].clone() }];
    for i in n - n / 8..n - 3 {
        sparse[0].table.status[i] = Status::Rejected;
        sparse[0].table.fault[i] = Some(Fault::BadQuality);
        sparse[0].table.decided_by[i] = 0;
    }
    run(&mut sparse, json!({"tolerance": 0.5}));
    let e = extra(&sparse[0]);
    assert_eq!(e["verdict"], crate::lone::NOT_ASSESSED, "{e}");
    assert!(e["moved"].is_null(), "{e}");
}

#[test]
fn a_member_alone_is_not_assessed_and_keeps_its_state() {
    // Only one member of the group is in the data: nothing to compare.
    let mut g = triple_with_drift(5, 720);
    let mut lone = vec![g.works.remove(1)];
    let old = json!({"version": 1, "reference": "process", "bias_end": 0.4, "bias_end_std": 0.02, "ts_us": 0});
    lone[0].state.insert("drift".into(), old.clone());
    let before = lone[0].table.clone();
    run(&mut lone, json!({"tolerance": 0.5}));
    assert_eq!(extra(&lone[0])["verdict"], "not assessed (no redundant member with readings)");
    let t = &lone[0].table;
    assert!(t.status == before.status && t.fault == before.fault, "rows changed");
    assert!(t.value.iter().zip(&before.value).all(|(a, b)| a.to_bits() == b.to_bits()), "values changed");
    assert_eq!(lone[0].state["drift"], old);
}

#[test]
fn default_tolerance_comes_from_the_range() {
    let mut g = triple_with_drift(3, 720);
    run(&mut g.works, serde_json::Value::Null);
    assert_eq!(extra(&g.works[0])["tolerance"], json!(0.75));
}

#[test]
fn state_is_carried_to_the_next_run() {
    let (n1, n2) = (4 * 720, 2 * 720);
    let mut rng = Rng::new(61);
    let truth = process(&mut rng, n1 + n2, None);
    let members = || {
        [member("TT-1A", 0.05, |_| 0.0), member("TT-1B", 0.05, drift_from(360, 0.3)), member("TT-1C", 0.05, |_| 0.0)]
    };
    let mut first = group_on(&mut rng, 0, &truth[..n1], &members(), None);
    run(&mut first.works, json!({"tolerance": 0.5}));
    let carried = first.works[1].state["drift"].clone();
    assert_eq!(carried["reference"], "process");
    let b1 = carried["bias_end"].as_f64().unwrap();

    let second = group_on(&mut rng, n1, &truth[n1..], &members(), None);
    let mut fresh = second.works.clone();
    let mut cont = second.works;
    for (w, f) in cont.iter_mut().zip(&first.works) {
        w.state = f.state.clone();
    }
    run(&mut fresh, json!({"tolerance": 0.5}));
    run(&mut cont, json!({"tolerance": 0.5}));
    assert_eq!(extra(&cont[1])["carried"], true);
    assert_eq!(extra(&fresh[1])["carried"], false);
    // At the first row of the second window the carried bias makes the
    // corrected value's std smaller than a fresh start gives.
    let (s_cont, s_fresh) = (cont[1].table.std[0], fresh[1].table.std[0]);
    assert!(s_cont.is_finite() && s_fresh.is_finite());
    assert!(s_cont < s_fresh, "std with carried state {s_cont}, fresh {s_fresh}");
    let truth_start = 0.3 * (n1 - 360) as f64 / PER_HOUR;
    assert!((cont[1].table.stat[0] - truth_start).abs() < 0.05, "{} vs {truth_start}", cont[1].table.stat[0]);
    assert!((b1 - truth_start).abs() < 0.05);

    // A recalibrated transmitter (bias back to zero between runs) is not held to the old bias.
    let members2 = [member("TT-1A", 0.05, |_| 0.0), member("TT-1B", 0.05, |_| 0.0), member("TT-1C", 0.05, |_| 0.0)];
    let mut recal = group_on(&mut rng, n1, &truth[n1..], &members2, None).works;
    for (w, f) in recal.iter_mut().zip(&first.works) {
        w.state = f.state.clone();
    }
    run(&mut recal, json!({"tolerance": 0.5}));
    assert_eq!(any_fault(&recal[1]), 0);
    assert_eq!(extra(&recal[1])["carried"], false);
    assert!(recal[1].report.notes.iter().any(|n| n.contains("started afresh")));
}

#[test]
fn a_step_found_in_an_earlier_run_stays_a_step() {
    let n = 2 * 720;
    let mut rng = Rng::new(63);
    let truth = process(&mut rng, 2 * n, None);
    let members = || [member("FT-1A", 0.08, |_| 0.0), member("FT-1B", 0.12, |k| if k >= 900 { 0.6 } else { 0.0 })];
    let mut first = group_on(&mut rng, 0, &truth[..n], &members(), Some("FT-1A"));
    run(&mut first.works, json!({"tolerance": 0.3}));
    assert_eq!(first.works[1].state["drift"]["after_step"], true);
    let second = group_on(&mut rng, n, &truth[n..], &members(), Some("FT-1A")).works;
    let (mut cont, mut fresh) = (second.clone(), second);
    for (w, f) in cont.iter_mut().zip(&first.works) {
        w.state = f.state.clone();
    }
    run(&mut cont, json!({"tolerance": 0.3}));
    run(&mut fresh, json!({"tolerance": 0.3}));
    // No step inside the second window, but its rows are still the step's.
    assert_eq!((extra(&cont[1])["steps"].clone(), extra(&cont[1])["verdict"].clone()), (json!([]), json!("step")));
    assert_eq!(faults(&cont[1], Fault::Step), n);
    // Without the carried state, an offset present from the start is a drift.
    assert_eq!(faults(&fresh[1], Fault::Drift), n);
}

#[test]
fn step_test_tells_a_step_from_a_ramp() {
    let mut rng = Rng::new(71);
    let n = 3000;
    let s: Vec<f64> = (0..n).map(|k| k as f64).collect();
    // A steep ramp (3 units over the series) finds nothing.
    let ramp: Vec<f64> = (0..n).map(|k| 3.0 * k as f64 / n as f64 + 0.1 * rng.normal()).collect();
    assert!(detect(&ramp, &s, 60.0, 5.5, 0.1).is_empty());
    // A step of 0.3 (3 sd) on the same ramp is found at its place.
    let stepped: Vec<f64> = ramp.iter().enumerate().map(|(k, v)| v + if k >= 1234 { 0.3 } else { 0.0 }).collect();
    let j = detect(&stepped, &s, 60.0, 5.5, 0.1);
    assert_eq!(j.len(), 1);
    assert!(j[0].index.abs_diff(1234) <= 2 && (j[0].size - 0.3).abs() < 0.1, "{j:?}");
    // ... but not when it is smaller than min_size.
    assert!(detect(&stepped, &s, 60.0, 5.5, 0.5).is_empty());
}

#[test]
fn four_members_one_drifting() {
    let n = 4 * 720;
    let mut g = group(
        81,
        n,
        &[
            member("TT-1A", 0.05, |_| 0.0),
            member("TT-1B", 0.05, |_| 0.0),
            member("TT-1C", 0.05, |_| 0.0),
            member("TT-1D", 0.05, drift_from(0, -0.4)),
        ],
        None,
        None,
    );
    run(&mut g.works, json!({"tolerance": 0.5}));
    assert_eq!(extra(&g.works[3])["verdict"], "drifting");
    assert!((0..3).all(|j| any_fault(&g.works[j]) == 0));
    let est = extra(&g.works[3])["bias_end"].as_f64().unwrap();
    let truth = -0.4 * (n - 1) as f64 / PER_HOUR;
    assert!((est - truth).abs() < 0.05 * truth.abs(), "{est} vs {truth}");
}

#[test]
fn members_sampled_at_staggered_times() {
    // C is sampled 2 s after A and B: the union axis alternates 2 s and 3 s steps.
    let n = 6 * 720;
    let mut g = triple_with_drift(91, n);
    for t in g.works[2].table.ts_us.iter_mut() {
        *t += 2_000_000;
    }
    run(&mut g.works, json!({"tolerance": 0.5}));
    let e = extra(&g.works[1]);
    assert_eq!(e["verdict"], "drifting");
    assert_eq!(any_fault(&g.works[0]) + any_fault(&g.works[2]), 0);
    let truth_end = 0.3 * (n - 1 - 720) as f64 / PER_HOUR;
    let est = e["bias_end"].as_f64().unwrap();
    assert!((est - truth_end).abs() <= 0.05 * truth_end, "{est} vs {truth_end}");
    assert!(e["params"]["converged"].as_bool().unwrap());
}

#[test]
fn healthy_groups_raise_no_alarm() {
    // Healthy triples (with a process step), trusted and untrusted pairs on a
    // few seeds: no row flagged, no step found, every bias near zero.
    for seed in 100..103 {
        for kind in 0..3 {
            let n = 2 * 720;
            let h = |_: usize| 0.0;
            let mut g = match kind {
                0 => group(
                    seed,
                    n,
                    &[member("A", 0.05, h), member("B", 0.05, h), member("C", 0.08, h)],
                    None,
                    Some((700, 3.0)),
                ),
                1 => group(seed, n, &[member("A", 0.08, h), member("B", 0.12, h)], Some("A"), Some((700, -3.0))),
                _ => group(seed, n, &[member("A", 0.08, h), member("B", 0.12, h)], None, None),
            };
            run(&mut g.works, json!({"tolerance": 0.3}));
            for w in &g.works {
                let e = extra(w);
                assert_eq!(any_fault(w), 0, "seed {seed} kind {kind} {}: {e}", w.table.tag);
                assert_eq!(e["steps"], json!([]), "seed {seed} kind {kind}");
                let b = e["bias_end"].as_f64().or(e["difference_end"].as_f64()).unwrap_or(0.0);
                assert!(b.abs() < 0.1, "seed {seed} kind {kind}: {e}");
            }
        }
    }
}
