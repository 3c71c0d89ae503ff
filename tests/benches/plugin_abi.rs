//! What crossing the C ABI costs: the example `hampel` plugin loaded from its
//! shared library against the same code (`tagwright-hampel`) linked in as a
//! built-in step, on 1,000 tags x 43,200 samples (12 h at 1 s).
//!
//! Each tag is timed as the engine runs it: make the step from its
//! parameters (the engine makes one per tag), apply it to the tag's table,
//! drop it. Copying the input table into the work table is not timed. The
//! target is the plugin within 10% of the built-in step.
//!
//!     cargo bench -p tagwright-tests --bench plugin_abi
//!
//! Criterion reports each variant; the last lines print the ratio from
//! interleaved passes of the same run, and the cost of the crossing alone
//! (a test plugin that changes one row per tag). Run it on a quiet machine;
//! `cargo bench -p tagwright-tests --bench plugin_abi -- none` skips the
//! criterion part (no benchmark is named `none`) and prints only those lines.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::sync::Arc;
use std::time::{Duration, Instant};

use criterion::{criterion_group, Criterion, SamplingMode};
use tagwright::plugin::{external, Step, StepContext, TagSettings, TagWork};
use tagwright::rng::Rng;
use tagwright::series::{Quality, ReadCounts, Sampling, TagSeries, TagTable};

const TAGS: usize = 1000;
const SAMPLES: usize = 43_200;
/// Distinct input tables; tag i uses table i % BASES.
const BASES: usize = 16;

fn params() -> serde_json::Value {
    serde_json::json!({"window": 7, "k": 3.0, "action": "reject"})
}

/// A level wandering as a random walk, measurement noise, and spikes at about
/// one reading in 500.
fn base_tables() -> Vec<TagTable> {
    (0..BASES)
        .map(|b| {
            let mut rng = Rng::new(1000 + b as u64);
            let mut level = 50.0;
            let mut values = Vec::with_capacity(SAMPLES);
            for _ in 0..SAMPLES {
                level += 0.05 * rng.normal();
                let spike = if rng.below(500) == 0 { 8.0 } else { 0.0 };
                values.push(level + 0.2 * rng.normal() + spike);
            }
            let s = TagSeries {
                tag: format!("FT-{:04}.PV", 3100 + b),
                ts_us: (0..SAMPLES as i64).map(|i| i * 1_000_000).collect(),
                values,
                quality: vec![Quality::Good; SAMPLES],
                counts: ReadCounts::default(),
            };
            TagTable::from_series(&s, 1_000_000, Sampling::Regular)
        })
        .collect()
}

type Make = dyn Fn() -> Arc<dyn Step>;

/// One pass over all tags; returns the time spent making and applying
/// steps, and keeps each tag's fastest time in `best`.
fn pass_tags(make: &Make, bases: &[TagTable], work: &mut TagWork, best: &mut [f64]) -> Duration {
    let ctx = StepContext::new(0);
    let mut total = Duration::ZERO;
    for (i, best) in best.iter_mut().enumerate() {
        work.table.clone_from(&bases[i % BASES]);
        let t0 = Instant::now();
        let step = make();
        step.apply(std::slice::from_mut(work), &ctx).unwrap();
        drop(step);
        let dt = t0.elapsed();
        *best = best.min(dt.as_secs_f64());
        total += dt;
    }
    total
}

fn pass(make: &Make, bases: &[TagTable], work: &mut TagWork) -> Duration {
    pass_tags(make, bases, work, &mut vec![f64::INFINITY; TAGS])
}

struct Setup {
    bases: Vec<TagTable>,
    builtin: Box<Make>,
    plugin: Box<Make>,
    /// A plugin that flags one row per tag: the cost of the crossing alone.
    crossing: Box<Make>,
    _dir: tempfile::TempDir,
}

fn setup() -> Setup {
    let dir = tempfile::tempdir().unwrap();
    let plugins = dir.path().join("plugins");
    let (lib, sha) = tagwright_tests::install_plugin(&plugins, "tagwright-hampel-plugin");
    let loaded = external::load(&lib, &sha, std::slice::from_ref(&plugins)).unwrap();
    let (lib, sha) = tagwright_tests::install_plugin(&plugins, "tagwright-test-plugin-misbehave");
    let crossing = external::load(&lib, &sha, &[plugins]).unwrap();
    let p = params();
    let p2 = p.clone();
    Setup {
        bases: base_tables(),
        builtin: Box::new(move || tagwright_tests::hampel_builtin::make(&p).unwrap()),
        plugin: Box::new(move || loaded.step(&p2).unwrap()),
        crossing: Box::new(move || crossing.step(&serde_json::Value::Null).unwrap()),
        _dir: dir,
    }
}

fn empty_work(bases: &[TagTable]) -> TagWork {
    TagWork {
        table: bases[0].clone(),
        settings: Arc::new(TagSettings::default()),
        report: Default::default(),
        state: Default::default(),
    }
}

fn bench(c: &mut Criterion) {
    let s = setup();
    let mut work = empty_work(&s.bases);
    let mut g = c.benchmark_group(format!("hampel_{TAGS}_tags_x_{SAMPLES}"));
    g.sampling_mode(SamplingMode::Flat).sample_size(10).measurement_time(Duration::from_secs(30));
    g.bench_function("builtin_step", |b| {
        b.iter_custom(|iters| (0..iters).map(|_| pass(&*s.builtin, &s.bases, &mut work)).sum())
    });
    g.bench_function("plugin_c_abi", |b| {
        b.iter_custom(|iters| (0..iters).map(|_| pass(&*s.plugin, &s.bases, &mut work)).sum())
    });
    g.finish();
}

/// Interleaved passes, so that drift in the machine's speed hits both alike.
/// Two summaries: the median pass, and the sum over tags of each tag's
/// fastest time (robust to a busy machine taking the core away now and then).
fn ratio() {
    let s = setup();
    let mut work = empty_work(&s.bases);
    let (mut b, mut p, mut x) = (Vec::new(), Vec::new(), Vec::new());
    let (mut bb, mut bp, mut bx) = (vec![f64::INFINITY; TAGS], vec![f64::INFINITY; TAGS], vec![f64::INFINITY; TAGS]);
    for _ in 0..5 {
        b.push(pass_tags(&*s.builtin, &s.bases, &mut work, &mut bb).as_secs_f64());
        p.push(pass_tags(&*s.plugin, &s.bases, &mut work, &mut bp).as_secs_f64());
        x.push(pass_tags(&*s.crossing, &s.bases, &mut work, &mut bx).as_secs_f64());
    }
    let (sb, sp, sx): (f64, f64, f64) = (bb.iter().sum(), bp.iter().sum(), bx.iter().sum());
    let median = |v: &mut Vec<f64>| {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    let (mb, mp, mx) = (median(&mut b), median(&mut p), median(&mut x));
    println!("interleaved, 5 passes each, median per pass of {TAGS} tags x {SAMPLES} samples:");
    println!("  built-in step   {mb:.3} s  ({:.1} ns per sample)", mb * 1e9 / (TAGS * SAMPLES) as f64);
    println!("  plugin (C ABI)  {mp:.3} s  ({:.1} ns per sample)", mp * 1e9 / (TAGS * SAMPLES) as f64);
    println!("  crossing alone  {mx:.3} s  ({:.0} us per tag: a plugin that changes one row)", mx * 1e6 / TAGS as f64);
    println!("  plugin / built-in = {:.3} (target <= 1.10)", mp / mb);
    println!("sum over tags of each tag's fastest of the 5 passes:");
    println!("  built-in step {sb:.3} s, plugin (C ABI) {sp:.3} s, crossing alone {sx:.3} s");
    println!("  plugin / built-in = {:.3} (target <= 1.10)", sp / sb);
}

criterion_group!(benches, bench);

fn main() {
    benches();
    Criterion::default().configure_from_args().final_summary();
    ratio();
}
