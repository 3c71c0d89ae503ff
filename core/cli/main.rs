//! The `tagwright` command line.
//!
//! `main` maps the outcome to an exit code, `run` parses the arguments and
//! picks the mode, and each mode is one function.
//!
//! Exit codes: 0 success; 1 usage or configuration error (bad flags, a model
//! spec that does not parse, a tag that is not in the file, a file name of
//! unknown format); 2 the work finished but a tag failed (for `fit`: the
//! series is too short, constant or all missing); 3 input unreadable
//! (missing or damaged file, bad CSV row, wrong column type, duplicate times).

use std::fmt::Write as _;
use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::anyhow;
use clap::{Args, Parser, Subcommand};
use serde_json::{json, Map, Value};

// The steps allocate and free per-tag buffers of megabytes; the system
// allocator hands such blocks back to the kernel each time (page faults
// took a third of a run's time), mimalloc keeps them for reuse.
// mimalloc also hands freed pages back to the kernel after a delay, and
// the next tag's buffers then fault fresh (zeroed) pages in again: on a
// 200-tag file this cost a third of the main thread's time. A run is short
// and its working set small and steady, so purging is switched off.
#[global_allocator]
static ALLOC: mimalloc::MiMalloc = mimalloc::MiMalloc;

extern "C" {
    // From the mimalloc library linked by the `mimalloc` crate.
    fn mi_option_set(option: std::ffi::c_int, value: std::ffi::c_long);
}
/// `mi_option_purge_delay` in mimalloc's option enum (include/mimalloc.h).
const MI_OPTION_PURGE_DELAY: std::ffi::c_int = 15;

fn keep_freed_memory() {
    // SAFETY: sets one integer option; mimalloc reads options at each use.
    unsafe { mi_option_set(MI_OPTION_PURGE_DELAY, -1) }
}

mod pipeline_cmds;

use tagwright::io::{infer_period_us, read_tag, ColumnMap, IoError, TagSamples};
use tagwright::ssm::{fit, FitOptions, FitResult, ModelSpec, Observations, SsmError};

/// Cleans process-historian tag data with linear Gaussian state-space models.
#[derive(Debug, Parser)]
#[command(name = "tagwright", version)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Clean historian exports with a pipeline: writes cleaned.parquet and provenance.jsonl.
    Run(pipeline_cmds::RunArgs),
    /// Validate a pipeline; with --input, show which tags each rule selects.
    Check(pipeline_cmds::CheckArgs),
    /// Write the built-in demo scenario's data, run its pipeline, print the summary.
    Demo(pipeline_cmds::DemoArgs),
    /// Fit one tag's state-space model by maximum likelihood.
    Fit(FitArgs),
}

#[derive(Debug, Args)]
struct FitArgs {
    /// Long-format input file (.csv, .parquet or .pq) with columns tag, ts, value.
    #[arg(long, value_name = "FILE")]
    input: PathBuf,
    /// The tag to fit.
    #[arg(long)]
    tag: String,
    /// Model spec: local-level, local-trend, arma(p,q), const, noise, or a
    /// sum such as local-level+arma(1,0).
    #[arg(long, value_name = "SPEC")]
    model: String,
    /// Print one JSON object instead of a table.
    #[arg(long)]
    json: bool,
    /// Nominal sampling period in seconds (default: the median spacing of the
    /// tag's samples). Variances are per period.
    #[arg(long, value_name = "SECONDS", value_parser = parse_period, allow_negative_numbers = true)]
    period: Option<f64>,
}

/// Exit codes other than success.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Exit {
    /// Usage or configuration error.
    Usage = 1,
    /// The tag could not be processed.
    TagFailed = 2,
    /// The input cannot be read.
    Input = 3,
}

/// Why a command failed, and with which exit code.
#[derive(Debug)]
enum Failure {
    /// Bad command line: clap prints its own message (or help, or version).
    Clap(clap::Error),
    /// Any other failure; printed as `error: {message}`.
    Other { exit: Exit, error: anyhow::Error },
    /// The command already reported what happened (a run summary); only the exit code remains.
    Quiet(Exit),
}

impl Failure {
    fn new(exit: Exit, error: anyhow::Error) -> Self {
        Failure::Other { exit, error }
    }

    fn quiet(exit: Exit) -> Self {
        Failure::Quiet(exit)
    }
}

impl From<IoError> for Failure {
    fn from(e: IoError) -> Self {
        let exit = if e.is_usage() { Exit::Usage } else { Exit::Input };
        Failure::new(exit, e.into())
    }
}

fn main() -> ExitCode {
    keep_freed_memory();
    match run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(Failure::Clap(e)) => {
            // Help and version go to stdout and are a success; the rest is a usage error.
            let code = if e.use_stderr() { Exit::Usage as u8 } else { 0 };
            let _ = e.print();
            ExitCode::from(code)
        }
        Err(Failure::Quiet(exit)) => ExitCode::from(exit as u8),
        Err(Failure::Other { exit, error }) => {
            // Our error messages carry their causes; print only the outermost.
            eprintln!("error: {error}");
            ExitCode::from(exit as u8)
        }
    }
}

fn run() -> Result<(), Failure> {
    let cli = Cli::try_parse().map_err(Failure::Clap)?;
    match cli.command {
        Command::Run(args) => pipeline_cmds::run(&args),
        Command::Check(args) => pipeline_cmds::check(&args),
        Command::Demo(args) => pipeline_cmds::demo(&args),
        Command::Fit(args) => fit_tag(&args),
    }
}

/// `tagwright fit`: reads one tag, fits the model, prints the estimates.
fn fit_tag(args: &FitArgs) -> Result<(), Failure> {
    // Configuration first, so a bad spec never waits for a large file.
    let spec: ModelSpec =
        args.model.parse().map_err(|e: SsmError| Failure::new(Exit::Usage, anyhow!("--model: {e}")))?;
    let samples = read_tag(&args.input, &args.tag, &ColumnMap::default())?;
    for note in read_notes(&samples) {
        eprintln!("note: {}: {note}", args.input.display());
    }

    let (period_us, period_source) = match args.period {
        Some(secs) => (Some(period_secs_to_us(secs)), "given with --period"),
        None => (infer_period_us(&samples.ts_us), "median spacing"),
    };
    // dt[t] = (ts[t+1] - ts[t]) / period; the last entry is not used.
    let dt: Option<Vec<f64>> = period_us.map(|p| {
        let mut dt: Vec<f64> =
            samples.ts_us.windows(2).map(|w| (i128::from(w[1]) - i128::from(w[0])) as f64 / p as f64).collect();
        dt.push(1.0);
        dt
    });
    let obs = Observations { y: &samples.values, p: 1, dt: dt.as_deref(), h_scale: None };
    let res = fit(&spec, &obs, &FitOptions::default()).map_err(|e| {
        let exit = match e {
            SsmError::NotFittable { .. } | SsmError::BadSpec { .. } => Exit::Usage,
            _ => Exit::TagFailed,
        };
        Failure::new(exit, anyhow!("{}: tag `{}`: cannot fit {spec}: {e}", args.input.display(), args.tag))
    })?;

    let period_s = period_us.map(|p| p as f64 / 1e6);
    let text = if args.json {
        fit_json(&res, period_s) + "\n"
    } else {
        fit_table(args, &samples, &res, period_s, period_source)
    };
    print_stdout(&text)
}

/// Notes on the reader's stated rules that changed the data.
fn read_notes(s: &TagSamples) -> Vec<String> {
    let mut notes = Vec::new();
    if s.stats.n_out_of_order > 0 {
        notes.push(format!(
            "{} row(s) of tag `{}` were out of time order; the samples were sorted by time",
            s.stats.n_out_of_order, s.tag
        ));
    }
    if s.stats.n_non_finite > 0 {
        notes.push(format!(
            "{} value(s) of tag `{}` were NaN or infinite and are treated as missing",
            s.stats.n_non_finite, s.tag
        ));
    }
    notes
}

/// The `--json` object: the contract keys first, then `std_errors` and `period_s`.
fn fit_json(res: &FitResult, period_s: Option<f64>) -> String {
    let mut params = Map::new();
    let mut std_errors = Map::new();
    for ((name, value), se) in res.param_names.iter().zip(&res.params).zip(&res.std_errors) {
        params.insert(name.clone(), json!(value));
        std_errors.insert(name.clone(), se.map_or(Value::Null, |v| json!(v)));
    }
    json!({
        "model": res.model,
        "params": params,
        "loglik": res.loglik,
        "aic": res.aic,
        "n": res.n,
        "n_missing": res.n_missing,
        "converged": res.converged,
        "iterations": res.iterations,
        "std_errors": std_errors,
        "period_s": period_s,
    })
    .to_string()
}

/// The readable report of a fit.
fn fit_table(
    args: &FitArgs,
    samples: &TagSamples,
    res: &FitResult,
    period_s: Option<f64>,
    period_source: &str,
) -> String {
    let mut out = String::new();
    let mut line = |key: &str, value: String| {
        let _ = writeln!(out, "{key:<16}{value}");
    };
    line("tag", samples.tag.clone());
    line("input", args.input.display().to_string());
    line("model", res.model.clone());
    line(
        "period",
        match period_s {
            Some(p) => format!("{p} s ({period_source})"),
            None => "none (a single sample)".to_string(),
        },
    );
    line(
        "samples",
        format!("n = {} ({} missing), from {} rows in the file", res.n, res.n_missing, samples.stats.rows_read),
    );
    line(
        "converged",
        if res.converged {
            format!("yes ({} iterations)", res.iterations)
        } else {
            format!(
                "NO after {} iterations: the largest gradient per observation is {:.2e}; treat the estimates with care",
                res.iterations, res.max_gradient
            )
        },
    );
    let _ = writeln!(out);
    let _ = writeln!(out, "{:<16}{:>14}  {:>14}", "parameter", "estimate", "std. error");
    for ((name, v), se) in res.param_names.iter().zip(&res.params).zip(&res.std_errors) {
        let se = se.map_or_else(|| "-".to_string(), sig);
        let _ = writeln!(out, "{name:<16}{:>14}  {se:>14}", sig(*v));
    }
    let _ = writeln!(out);
    let _ = writeln!(out, "{:<16}{:>14}", "log-likelihood", format!("{:.3}", res.loglik));
    let _ = writeln!(out, "{:<16}{:>14}", "AIC", format!("{:.3}", res.aic));
    if res.std_errors.iter().any(Option::is_none) {
        let _ = writeln!(
            out,
            "\n(-: no standard error; the likelihood is not curved there, as for a variance estimated at zero)"
        );
    }
    out
}

/// Six significant digits, in scientific notation when very small or large.
fn sig(v: f64) -> String {
    let a = v.abs();
    if v == 0.0 || (1e-4..1e6).contains(&a) {
        let decimals = (5 - a.log10().floor().max(-5.0) as i32).clamp(0, 10) as usize;
        format!("{v:.decimals$}")
    } else {
        format!("{v:.5e}")
    }
}

/// Writes to stdout; a closed pipe (`| head`) ends the program quietly.
fn print_stdout(text: &str) -> Result<(), Failure> {
    let mut out = std::io::stdout().lock();
    match out.write_all(text.as_bytes()).and_then(|()| out.flush()) {
        Ok(()) => Ok(()),
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
        Err(e) => Err(Failure::new(Exit::Usage, anyhow!("cannot write to standard output: {e}"))),
    }
}

/// `--period`: a positive number of seconds, at least one microsecond.
fn parse_period(s: &str) -> Result<f64, String> {
    let v: f64 = s.trim().parse().map_err(|_| format!("`{s}` is not a number of seconds"))?;
    if !(1e-6..=1e9).contains(&v) {
        return Err(format!("{s} s is not a usable period; give a number of seconds between 0.000001 and 1e9"));
    }
    Ok(v)
}

fn period_secs_to_us(secs: f64) -> i64 {
    // parse_period bounds secs to [1e-6, 1e9], so this is in 1..=1e15.
    (secs * 1e6).round().max(1.0) as i64
}
