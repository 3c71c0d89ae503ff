//! `tagwright run`, `check` and `demo`.

use std::io::IsTerminal as _;
use std::path::{Path, PathBuf};

use anyhow::anyhow;
use clap::Args;

use tagwright::calendar;
use tagwright::engine::{self, EngineError, RunOptions, RunOutcome, CAUTION};
use tagwright::io::{InputOptions, InputSet};
use tagwright::pipeline::PipelineSpec;
use tagwright::plugin::Registry;

use crate::{Exit, Failure};

/// The demo's pipeline, built into the binary.
const DEMO_PIPELINE: &str = include_str!("../../pipelines/demo.yaml");

#[derive(Debug, Args)]
pub struct RunArgs {
    /// Pipeline file (YAML).
    #[arg(long, value_name = "FILE")]
    pipeline: PathBuf,
    /// Input files: historian exports in the layout the pipeline describes.
    #[arg(long, value_name = "FILE", num_args = 1.., required = true)]
    input: Vec<PathBuf>,
    /// Output directory (created if missing; earlier outputs are replaced only when the run succeeds).
    #[arg(long, value_name = "DIR")]
    out: PathBuf,
    /// Start of the window: RFC 3339, or local time in the site's time zone.
    #[arg(long, value_name = "TIME", requires = "to", conflicts_with = "shift")]
    from: Option<String>,
    /// End of the window (exclusive).
    #[arg(long, value_name = "TIME", requires = "from")]
    to: Option<String>,
    /// A shift of the pipeline's calendar: DATE/NAME (2026-03-02/early), NAME (its latest ended one) or `last`.
    #[arg(long, value_name = "SPEC")]
    shift: Option<String>,
    /// Directory of the state carried from one run to the next.
    #[arg(long, value_name = "DIR")]
    state: Option<PathBuf>,
    /// Worker threads (default: all cores).
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
}

#[derive(Debug, Args)]
pub struct CheckArgs {
    /// Pipeline file (YAML).
    #[arg(long, value_name = "FILE")]
    pipeline: PathBuf,
    /// Input files: show which tags each rule selects.
    #[arg(long, value_name = "FILE", num_args = 1..)]
    input: Vec<PathBuf>,
}

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Output directory for the demo's input, truth and outputs.
    #[arg(long, value_name = "DIR", default_value = "demo-out")]
    out: PathBuf,
    /// Seed of the demo scenario.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Worker threads (default: all cores).
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
}

/// The registry of every step this binary knows.
pub fn registry() -> Registry {
    let mut reg = Registry::with_builtins();
    tagwright_faults::register(&mut reg);
    tagwright_drift::register(&mut reg);
    tagwright_fill::register(&mut reg);
    reg
}

fn load(path: &Path, registry: &Registry) -> Result<PipelineSpec, Failure> {
    PipelineSpec::load(path, registry).map_err(|e| Failure::new(Exit::Usage, anyhow!("{e}")))
}

fn engine_failure(e: EngineError) -> Failure {
    match e {
        EngineError::Config(_) => Failure::new(Exit::Usage, anyhow!("{e}")),
        EngineError::Input(io) if io.is_usage() => Failure::new(Exit::Usage, anyhow!("{io}")),
        _ => Failure::new(Exit::Input, anyhow!("{e}")),
    }
}

/// `tagwright run`.
pub fn run(args: &RunArgs) -> Result<(), Failure> {
    let registry = registry();
    let spec = load(&args.pipeline, &registry)?;
    let tz = spec.site.timezone;
    let window = match (&args.from, &args.to, &args.shift) {
        (Some(f), Some(t), _) => {
            let a = calendar::parse_time(f, tz).map_err(|e| Failure::new(Exit::Usage, anyhow!("--from: {e}")))?;
            let b = calendar::parse_time(t, tz).map_err(|e| Failure::new(Exit::Usage, anyhow!("--to: {e}")))?;
            if b <= a {
                return Err(Failure::new(Exit::Usage, anyhow!("--to ({t}) must be after --from ({f})")));
            }
            Some((a, b, format!("{f} .. {t}")))
        }
        (_, _, Some(s)) => Some(
            calendar::shift_window(&spec.shifts, s, tz, chrono::Utc::now())
                .map_err(|e| Failure::new(Exit::Usage, anyhow!("--shift: {e}")))?,
        ),
        _ => None,
    };
    let opts = RunOptions {
        inputs: args.input.clone(),
        out_dir: args.out.clone(),
        window: window.as_ref().map(|w| (w.0, w.1)),
        window_label: window.map(|w| w.2),
        state_dir: args.state.clone(),
        threads: args.threads,
        command_line: std::env::args().collect(),
        chunk_units: None,
    };
    execute(&spec, &registry, &opts)
}

fn execute(spec: &PipelineSpec, registry: &Registry, opts: &RunOptions) -> Result<(), Failure> {
    let bar = progress_bar();
    let outcome = engine::run(spec, registry, opts, &|done, total| {
        if let Some(b) = &bar {
            b.set_length(total as u64);
            b.set_position(done as u64);
        }
    })
    .map_err(engine_failure)?;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    print_summary(spec, opts, &outcome);
    if outcome.tags_failed.is_empty() {
        Ok(())
    } else {
        Err(Failure::quiet(Exit::TagFailed))
    }
}

fn progress_bar() -> Option<indicatif::ProgressBar> {
    if !std::io::stderr().is_terminal() {
        return None;
    }
    let bar = indicatif::ProgressBar::new(0);
    if let Ok(style) = indicatif::ProgressStyle::with_template("{spinner} {pos}/{len} work units {wide_bar} {eta}") {
        bar.set_style(style);
    }
    Some(bar)
}

fn print_summary(spec: &PipelineSpec, opts: &RunOptions, o: &RunOutcome) {
    let names = engine::status_names();
    let rows: Vec<String> = names.iter().zip(o.rows_by_status).map(|(n, c)| format!("{c} {n}")).collect();
    let faults: Vec<String> = o.faults.iter().map(|(f, c)| format!("{f} {c}")).collect();
    println!("tagwright run {}", o.run_id);
    println!("pipeline  {} (sha256 {})", spec.path.display(), &spec.sha256[..spec.sha256.len().min(16)]);
    for p in &spec.plugins {
        println!(
            "plugin    {} {} ({}, sha256 {})",
            p.name,
            p.version,
            p.path.display(),
            p.sha256.get(..16).unwrap_or(&p.sha256)
        );
    }
    if let Some(l) = &opts.window_label {
        println!("window    {l} ({})", spec.site.timezone);
    }
    println!(
        "tags      {} processed, {} failed, {} not selected{}",
        o.tags_processed,
        o.tags_failed.len(),
        o.tags_not_selected,
        if o.streaming { "" } else { " (input not ordered by tag: read whole)" }
    );
    println!("rows      {}", rows.join(", "));
    println!("faults    {}", if faults.is_empty() { "none".to_string() } else { faults.join(", ") });
    println!("events    {}", o.events);
    println!("outputs   {}", o.outputs.iter().map(|p| p.display().to_string()).collect::<Vec<_>>().join(", "));
    println!("time      {:.2} s", o.seconds);
    for (tag, why) in &o.tags_failed {
        println!("FAILED    {tag}: {why}");
    }
    println!();
    println!("CAUTION: {CAUTION}");
}

/// `tagwright check`.
pub fn check(args: &CheckArgs) -> Result<(), Failure> {
    let registry = registry();
    let spec = load(&args.pipeline, &registry)?;
    println!(
        "{}: valid ({} rules, {} shifts, time zone {})",
        spec.path.display(),
        spec.rules.len(),
        spec.shifts.len(),
        spec.site.timezone
    );
    for p in &spec.plugins {
        println!("plugin {} {}: {} (sha256 {})", p.name, p.version, p.path.display(), p.sha256);
    }
    if args.input.is_empty() {
        return Ok(());
    }
    let input = InputSet::open(&args.input, InputOptions { spec: &spec.input, tz: spec.site.timezone, window: None })
        .map_err(|e| Failure::new(if e.is_usage() { Exit::Usage } else { Exit::Input }, anyhow!("{e}")))?;
    print!("{}", spec.selection_report(input.tags()));
    for (g, tags) in engine::groups(&spec, input.tags()) {
        println!("group {g}: {}", tags.into_iter().collect::<Vec<_>>().join(", "));
    }
    Ok(())
}

/// `tagwright demo`.
pub fn demo(args: &DemoArgs) -> Result<(), Failure> {
    let out = &args.out;
    let fail = |e: &dyn std::fmt::Display| Failure::new(Exit::Input, anyhow!("{}: {e}", out.display()));
    std::fs::create_dir_all(out.join("input")).map_err(|e| fail(&e))?;
    std::fs::create_dir_all(out.join("truth")).map_err(|e| fail(&e))?;
    let opts = tagwright::demo::DemoOptions { seed: args.seed, ..Default::default() };
    let data = tagwright::demo::generate(&opts);
    let export = out.join("input").join("historian_export.parquet");
    tagwright::demo::write_export(&data, &export).map_err(|e| fail(&e))?;
    tagwright::demo::write_truth(&data, &out.join("truth")).map_err(|e| fail(&e))?;
    let pipeline = out.join("demo.yaml");
    std::fs::write(&pipeline, DEMO_PIPELINE).map_err(|e| fail(&e))?;
    println!("demo scenario: Demo Dairy Unit 3 (fictional), seed {}", args.seed);
    println!("input     {}", export.display());
    println!("truth     {}", out.join("truth").display());
    println!("pipeline  {}", pipeline.display());
    println!();
    let registry = registry();
    let spec = load(&pipeline, &registry)?;
    let opts = RunOptions {
        inputs: vec![export],
        out_dir: out.join("run"),
        threads: args.threads,
        command_line: std::env::args().collect(),
        ..Default::default()
    };
    execute(&spec, &registry, &opts)
}
