//! `quality_bench`: the evidence-of-quality benchmark of issue 4.
//!
//! For each seed and fault scale it generates the demo shift, writes the
//! historian export, runs `tagwright run --pipeline pipelines/demo.yaml` on
//! it, and scores the pipeline's output and the rule-of-thumb baseline
//! against the truth side by side; then it pools all cases and writes every
//! figure to a JSON file. The metrics and targets are explained in
//! `docs/quality.md`; `core/benches/quality_vs_truth.sh` builds and runs it.
//!
//! ```text
//! quality_bench [--seeds 1,2,3,4,5] [--fault-scales 0.7,1.0,1.5] [--hours 8]
//!               [--bin PATH] [--pipeline FILE] [--json FILE] [--keep DIR]
//!               [--hampel-k K] [--hampel-t T] [--flatline-n N] [--details]
//! ```

#![deny(clippy::unwrap_used, clippy::expect_used, clippy::panic)]

use std::path::{Path, PathBuf};
use std::process::{Command, ExitCode};
use std::time::Instant;

use serde_json::json;
use tagwright::demo::{generate, write_export, DemoOptions};
use tagwright_tests::quality::{baseline, comparison_table, read_run, score, BaselineParams, Scores, Targets};

const USAGE: &str = "usage: quality_bench [--seeds 1,2,3,4,5] [--fault-scales 0.7,1.0,1.5] [--hours 8] \
[--bin PATH] [--pipeline FILE] [--json FILE] [--keep DIR] [--hampel-k K] [--hampel-t T] [--flatline-n N] [--details]";

struct Args {
    seeds: Vec<u64>,
    scales: Vec<f64>,
    hours: f64,
    bin: Option<PathBuf>,
    pipeline: PathBuf,
    json: Option<PathBuf>,
    keep: Option<PathBuf>,
    params: BaselineParams,
    details: bool,
}

fn list<T: std::str::FromStr>(flag: &str, v: &str) -> Result<Vec<T>, String> {
    let out: Result<Vec<T>, String> = v
        .split(',')
        .filter(|s| !s.trim().is_empty())
        .map(|s| s.trim().parse::<T>().map_err(|_| format!("{flag}: {s:?} is not a valid value")))
        .collect();
    let out = out?;
    if out.is_empty() {
        return Err(format!("{flag}: empty list"));
    }
    Ok(out)
}

fn one<T: std::str::FromStr>(flag: &str, v: &str) -> Result<T, String> {
    v.trim().parse::<T>().map_err(|_| format!("{flag}: {v:?} is not a valid value"))
}

fn parse_args() -> Result<Args, String> {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR")).parent().map(Path::to_path_buf).unwrap_or_default();
    let mut a = Args {
        seeds: vec![1, 2, 3, 4, 5],
        scales: vec![0.7, 1.0, 1.5],
        hours: 8.0,
        bin: None,
        pipeline: repo.join("pipelines").join("demo.yaml"),
        json: None,
        keep: None,
        params: BaselineParams::default(),
        details: false,
    };
    let mut it = std::env::args().skip(1);
    while let Some(flag) = it.next() {
        if flag == "--help" || flag == "-h" {
            return Err(USAGE.to_string());
        }
        if flag == "--details" {
            a.details = true;
            continue;
        }
        let v = it.next().ok_or_else(|| format!("{flag} needs a value\n{USAGE}"))?;
        match flag.as_str() {
            "--seeds" => a.seeds = list("--seeds", &v)?,
            "--fault-scales" => a.scales = list("--fault-scales", &v)?,
            "--hours" => a.hours = one("--hours", &v)?,
            "--bin" => a.bin = Some(PathBuf::from(v)),
            "--pipeline" => a.pipeline = PathBuf::from(v),
            "--json" => a.json = Some(PathBuf::from(v)),
            "--keep" => a.keep = Some(PathBuf::from(v)),
            "--hampel-k" => a.params.hampel_k = one("--hampel-k", &v)?,
            "--hampel-t" => a.params.hampel_t = one("--hampel-t", &v)?,
            "--flatline-n" => a.params.flatline_n = one("--flatline-n", &v)?,
            other => return Err(format!("unknown argument {other:?}\n{USAGE}")),
        }
    }
    if !(1.0..=168.0).contains(&a.hours) {
        return Err(format!("--hours: {} is outside 1..=168", a.hours));
    }
    Ok(a)
}

/// The directory of this executable (the cargo target profile directory).
fn exe_dir() -> Result<PathBuf, String> {
    let exe = std::env::current_exe().map_err(|e| format!("cannot find this program's path: {e}"))?;
    exe.parent().map(Path::to_path_buf).ok_or_else(|| format!("{} has no parent directory", exe.display()))
}

fn tagwright_bin(args: &Args) -> Result<PathBuf, String> {
    let bin = match &args.bin {
        Some(b) => b.clone(),
        None => exe_dir()?.join(format!("tagwright{}", std::env::consts::EXE_SUFFIX)),
    };
    if bin.is_file() {
        Ok(bin)
    } else {
        Err(format!(
            "{}: no tagwright binary there; build it with `cargo build --release -p tagwright-cli --bin tagwright` \
             or pass --bin PATH",
            bin.display()
        ))
    }
}

/// One case: generate, export, run, score both.
fn run_case(args: &Args, bin: &Path, work: &Path, seed: u64, scale: f64) -> Result<(Scores, Scores), String> {
    let opts = DemoOptions { seed, fault_scale: scale, hours: args.hours, ..DemoOptions::default() };
    let data = generate(&opts);
    let dir = work.join(format!("seed{seed}_scale{scale}"));
    std::fs::create_dir_all(&dir).map_err(|e| format!("{}: cannot create: {e}", dir.display()))?;
    let export = dir.join("historian_export.parquet");
    write_export(&data, &export).map_err(|e| e.to_string())?;
    let out = dir.join("run");
    if out.exists() {
        std::fs::remove_dir_all(&out).map_err(|e| format!("{}: cannot remove the old run: {e}", out.display()))?;
    }
    let t0 = Instant::now();
    let run = Command::new(bin)
        .arg("run")
        .arg("--pipeline")
        .arg(&args.pipeline)
        .arg("--input")
        .arg(&export)
        .arg("--out")
        .arg(&out)
        .output()
        .map_err(|e| format!("cannot run {}: {e}", bin.display()))?;
    let code = run.status.code().unwrap_or(-1);
    if code != 0 && code != 2 {
        return Err(format!(
            "tagwright run exited with {code} on seed {seed}, fault scale {scale}:\n{}{}",
            String::from_utf8_lossy(&run.stdout),
            String::from_utf8_lossy(&run.stderr)
        ));
    }
    if code == 2 {
        eprintln!("note: some tags failed in seed {seed}, fault scale {scale} (exit 2); they are scored as written");
    }
    let secs = t0.elapsed().as_secs_f64();
    let pipeline = read_run(&out).map_err(|e| e.to_string())?;
    let base = baseline(&data.rows, &data.tags, &args.params);
    eprintln!(
        "seed {seed}, fault scale {scale}: {} export rows, pipeline {} rows in {secs:.1} s, baseline {} rows",
        data.rows.len(),
        pipeline.len(),
        base.len()
    );
    Ok((score("pipeline", &pipeline, &data), score("baseline", &base, &data)))
}

fn run() -> Result<(), String> {
    let args = parse_args()?;
    let bin = tagwright_bin(&args)?;
    if !args.pipeline.is_file() {
        return Err(format!("{}: pipeline file not found (pass --pipeline FILE)", args.pipeline.display()));
    }
    let temp;
    let work = match &args.keep {
        Some(d) => d.clone(),
        None => {
            temp = tempfile::Builder::new()
                .prefix("tagwright-quality-")
                .tempdir()
                .map_err(|e| format!("cannot create a temporary directory: {e}"))?;
            temp.path().to_path_buf()
        }
    };
    let targets = Targets::issue();
    let mut pooled_p = Scores { label: "pipeline".into(), ..Scores::default() };
    let mut pooled_b = Scores { label: "baseline".into(), ..Scores::default() };
    let mut cases = Vec::new();
    for &seed in &args.seeds {
        for &scale in &args.scales {
            let (p, b) = run_case(&args, &bin, &work, seed, scale)?;
            let title = format!("== {}", p.cases.first().cloned().unwrap_or_default());
            println!("{}", comparison_table(&title, &p, &b, &targets));
            if args.details {
                println!("{p}\n{b}");
            }
            cases.push(json!({
                "seed": seed,
                "fault_scale": scale,
                "hours": args.hours,
                "pipeline": p.to_json(),
                "baseline": b.to_json(),
                "checks": {"pipeline": targets.check(&p, Some(&b)), "baseline": targets.check(&b, None)},
            }));
            pooled_p.merge(&p);
            pooled_b.merge(&b);
        }
    }
    let title =
        format!("== pooled over {} cases (seeds {:?}, fault scales {:?})", cases.len(), args.seeds, args.scales);
    println!("{}", comparison_table(&title, &pooled_p, &pooled_b, &targets));
    println!("{pooled_p}\n{pooled_b}");

    let doc = json!({
        "benchmark": "tagwright evidence of quality (issue 4), Demo Dairy Unit 3 (fictional)",
        "pipeline_file": args.pipeline.display().to_string(),
        "hours": args.hours,
        "seeds": args.seeds,
        "fault_scales": args.scales,
        "targets": targets,
        "baseline_params": {
            "hampel_k": args.params.hampel_k,
            "hampel_t": args.params.hampel_t,
            "flatline_n": args.params.flatline_n,
        },
        "cases": cases,
        "pooled": {
            "pipeline": pooled_p.to_json(),
            "baseline": pooled_b.to_json(),
            "checks": {"pipeline": targets.check(&pooled_p, Some(&pooled_b)), "baseline": targets.check(&pooled_b, None)},
        },
    });
    let json_path = match &args.json {
        Some(p) => p.clone(),
        None => {
            exe_dir()?.parent().map_or_else(|| PathBuf::from("quality"), |t| t.join("quality")).join("quality.json")
        }
    };
    if let Some(parent) = json_path.parent().filter(|p| !p.as_os_str().is_empty()) {
        std::fs::create_dir_all(parent).map_err(|e| format!("{}: cannot create: {e}", parent.display()))?;
    }
    let text = serde_json::to_string_pretty(&doc).map_err(|e| format!("cannot encode the results: {e}"))?;
    std::fs::write(&json_path, text + "\n").map_err(|e| format!("{}: cannot write: {e}", json_path.display()))?;
    println!("wrote {}", json_path.display());
    Ok(())
}

fn main() -> ExitCode {
    match run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("quality_bench: {e}");
            ExitCode::FAILURE
        }
    }
}
