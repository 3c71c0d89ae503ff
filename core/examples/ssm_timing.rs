//! Timing driver for `core/benches/vs_statsmodels.py`: runs one task of the
//! state-space core on a series read from a file (one value per line, `nan`
//! for missing) and prints `{"task", "n", "reps", "seconds"}` with the median
//! wall time of one repetition.
//!
//! ```text
//! ssm_timing ll-smooth FILE SIGMA2_EPS SIGMA2_ETA      local level filter + smoother (automatic = scalar path)
//! ssm_timing ll-fit FILE                               local level ML fit
//! ssm_timing arma-smooth FILE P Q PHI.. THETA.. SIGMA2 ARMA filter + smoother, general (dynamic) path
//! ssm_timing arma-fit FILE P Q                         ARMA ML fit, general path
//! ```
//!
//! Append `--path auto|scalar|fixed|general` to choose the path. Filter and
//! smoother outputs are reused across repetitions, as a pipeline worker
//! reuses them across tags.

use std::time::Instant;

use std::cell::RefCell;

use tagwright::ssm::{
    filter_into, fit, smooth_into, FilterOptions, FilterOutput, FitOptions, ModelSpec, Observations, Path,
    SmootherOutput,
};

fn main() {
    if let Err(e) = run() {
        eprintln!("ssm_timing: {e}");
        std::process::exit(2);
    }
}

/// Filter + smoother with outputs reused across repetitions.
fn smoothing_job<'a>(
    model: tagwright::ssm::StateSpace,
    obs: Observations<'a>,
    path: Path,
) -> Box<dyn Fn() -> Result<(), String> + 'a> {
    let bufs = RefCell::new((FilterOutput::default(), SmootherOutput::default()));
    Box::new(move || {
        let (f, s) = &mut *bufs.borrow_mut();
        filter_into(&model, &obs, &FilterOptions { path, ..Default::default() }, f).map_err(|e| e.to_string())?;
        smooth_into(&model, &obs, f, s);
        std::hint::black_box(&s.state);
        Ok(())
    })
}

/// A maximum-likelihood fit that must converge; `SSM_TIMING_VERBOSE` prints the result.
fn fitting_job<'a>(spec: ModelSpec, obs: Observations<'a>, path: Path) -> Box<dyn Fn() -> Result<(), String> + 'a> {
    Box::new(move || {
        let r = fit(&spec, &obs, &FitOptions { path, ..Default::default() }).map_err(|e| e.to_string())?;
        if !r.converged {
            return Err(format!("fit did not converge: {r:?}"));
        }
        if std::env::var_os("SSM_TIMING_VERBOSE").is_some() {
            eprintln!("{r:?}");
        }
        std::hint::black_box(r);
        Ok(())
    })
}

fn run() -> Result<(), String> {
    let mut args: Vec<String> = std::env::args().skip(1).collect();
    let mut path = None;
    if let Some(i) = args.iter().position(|a| a == "--path") {
        let p = args.get(i + 1).ok_or("--path needs a value")?.clone();
        path = Some(match p.as_str() {
            "auto" => Path::Auto,
            "scalar" => Path::Scalar,
            "fixed" => Path::Fixed,
            "general" => Path::General,
            _ => return Err(format!("unknown path {p}")),
        });
        args.drain(i..i + 2);
    }
    let task = args.first().ok_or("usage: ssm_timing TASK FILE [PARAMS...]")?.clone();
    let file = args.get(1).ok_or("missing FILE")?;
    let text = std::fs::read_to_string(file).map_err(|e| format!("{file}: {e}"))?;
    let y: Vec<f64> = text
        .lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| l.trim().parse::<f64>().map_err(|e| format!("{file}: `{l}`: {e}")))
        .collect::<Result<_, _>>()?;
    let nums = |from: usize| -> Result<Vec<f64>, String> {
        args[from..].iter().map(|a| a.parse::<f64>().map_err(|e| format!("`{a}`: {e}"))).collect()
    };
    let obs = Observations::univariate(&y);
    let job: Box<dyn Fn() -> Result<(), String> + '_> = match task.as_str() {
        "ll-smooth" => {
            let p = nums(2)?;
            let model =
                "local-level".parse::<ModelSpec>().map_err(|e| e.to_string())?.build(&p).map_err(|e| e.to_string())?;
            let path = path.unwrap_or(Path::Auto);
            smoothing_job(model, obs, path)
        }
        "ll-fit" => {
            let spec: ModelSpec = "local-level".parse().map_err(|e: tagwright::ssm::SsmError| e.to_string())?;
            let path = path.unwrap_or(Path::Auto);
            fitting_job(spec, obs, path)
        }
        "arma-smooth" | "arma-fit" => {
            let v = nums(2)?;
            let (p, q) = (*v.first().ok_or("missing P")? as usize, *v.get(1).ok_or("missing Q")? as usize);
            let spec: ModelSpec =
                format!("arma({p},{q})").parse().map_err(|e: tagwright::ssm::SsmError| e.to_string())?;
            let path = path.unwrap_or(Path::General);
            if task == "arma-smooth" {
                let model = spec.build(&v[2..]).map_err(|e| e.to_string())?;
                smoothing_job(model, obs, path)
            } else {
                fitting_job(spec, obs, path)
            }
        }
        _ => return Err(format!("unknown task {task}")),
    };
    // Warm up, then repeat until at least 1 s or 200 repetitions (minimum 5).
    job()?;
    let mut times = Vec::new();
    let start = Instant::now();
    while times.len() < 5 || (start.elapsed().as_secs_f64() < 1.0 && times.len() < 200) {
        let t0 = Instant::now();
        job()?;
        times.push(t0.elapsed().as_secs_f64());
    }
    times.sort_by(f64::total_cmp);
    let median = times[times.len() / 2];
    println!("{{\"task\": \"{task}\", \"n\": {}, \"reps\": {}, \"seconds\": {median:e}}}", y.len(), times.len());
    Ok(())
}
