//! Shared helpers for the end-to-end and reference tests.
//!
//! - [`tagwright_bin`] builds the `tagwright` binary once per test process
//!   and returns its path; [`tagwright`] runs it and captures a [`Run`].
//! - [`Sandbox`] gives each test its own temporary directory.
//! - [`simulate_local_level`], [`write_csv`] and [`write_parquet`] make input files.
//! - [`corpus_dir`] is the directory of small bad inputs, with its manifest.
//! - [`repo_root`] is the repository; [`python`] is the Python of its `.venv`
//!   with the pinned packages of `tests/python-requirements.txt`.
//! - [`quality`]: the evidence-of-quality benchmark (scorer against the demo's
//!   truth, rule-of-thumb baseline), used by `quality_bench` and `e2e/quality.rs`.
//! - [`plugin_library`] finds a plugin's shared library built beside the
//!   test binary; [`install_plugin`] copies it where a pipeline may load it.
//! - [`hampel_builtin`]: the example plugin's code linked as a built-in step,
//!   for the equivalence test and the boundary-cost benchmark.

// Test support: a failed setup step should stop the test with its message.
#![allow(clippy::unwrap_used, clippy::expect_used, clippy::panic)]

pub mod hampel_builtin;

use std::ffi::OsStr;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::{Arc, OnceLock};

use arrow_array::cast::AsArray;
use arrow_array::types::{Float64Type, Int32Type};
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_schema::DataType;
use parquet::arrow::ArrowWriter;
use tagwright::rng::Rng;

pub mod quality;

/// 2026-03-01T06:00:00Z in microseconds, the start of the test series.
pub const T0_US: i64 = 1_772_344_800_000_000;

/// Builds the `tagwright` binary (once per process) and returns its path.
///
/// Runs `$CARGO build -p tagwright-cli --bin tagwright` (`cargo` when `CARGO` is
/// not set) into the target directory and profile of the running test binary,
/// which lives at `<target>/<profile>/deps/e2e-<hash>`; the binary is then
/// `<target>/<profile>/tagwright`.
pub fn tagwright_bin() -> &'static Path {
    static BIN: OnceLock<PathBuf> = OnceLock::new();
    BIN.get_or_init(|| {
        let exe = std::env::current_exe().expect("path of the test binary");
        let profile_dir =
            exe.parent().and_then(Path::parent).expect("test binary under <target>/<profile>/deps").to_path_buf();
        let target_dir = profile_dir.parent().expect("target directory");
        let profile = profile_dir.file_name().and_then(OsStr::to_str).expect("profile directory name");
        let cargo = std::env::var_os("CARGO").unwrap_or_else(|| "cargo".into());
        let mut cmd = Command::new(cargo);
        cmd.current_dir(env!("CARGO_MANIFEST_DIR"))
            .args(["build", "--quiet", "-p", "tagwright-cli", "--bin", "tagwright", "--target-dir"])
            .arg(target_dir);
        match profile {
            "debug" => {}
            "release" => {
                cmd.arg("--release");
            }
            other => {
                cmd.args(["--profile", other]);
            }
        }
        let status = cmd.status().expect("run cargo build");
        assert!(status.success(), "cargo build of tagwright failed: {status}");
        let bin = profile_dir.join(format!("tagwright{}", std::env::consts::EXE_SUFFIX));
        assert!(bin.is_file(), "{} was not built", bin.display());
        bin
    })
}

/// The outcome of one run of the binary.
#[derive(Debug)]
pub struct Run {
    /// Exit code (-1 if killed by a signal).
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

impl Run {
    /// Stdout parsed as one JSON value.
    pub fn json(&self) -> serde_json::Value {
        serde_json::from_str(&self.stdout)
            .unwrap_or_else(|e| panic!("stdout is not JSON ({e}):\n{}\nstderr:\n{}", self.stdout, self.stderr))
    }

    /// Panics with the whole run unless the exit code is `code`.
    #[track_caller]
    pub fn assert_code(&self, code: i32) -> &Self {
        assert_eq!(self.code, code, "exit code\n{self}");
        self
    }

    /// Panics unless stderr holds `fragment`.
    #[track_caller]
    pub fn assert_stderr_has(&self, fragment: &str) -> &Self {
        assert!(self.stderr.contains(fragment), "stderr lacks {fragment:?}\n{self}");
        self
    }
}

impl std::fmt::Display for Run {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "exit {}\n--- stdout\n{}--- stderr\n{}", self.code, self.stdout, self.stderr)
    }
}

/// Runs `tagwright` with `args`.
pub fn tagwright<I, S>(args: I) -> Run
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    let out = Command::new(tagwright_bin()).args(args).output().expect("run tagwright");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// Runs `tagwright fit --input FILE --tag TAG --model MODEL` plus `extra`.
pub fn fit(input: &Path, tag: &str, model: &str, extra: &[&str]) -> Run {
    let mut args: Vec<&OsStr> = vec![OsStr::new("fit"), OsStr::new("--input"), input.as_os_str()];
    args.extend(["--tag", tag, "--model", model].into_iter().map(OsStr::new));
    args.extend(extra.iter().map(OsStr::new));
    tagwright(args)
}

/// A temporary directory of one test, removed when dropped.
pub struct Sandbox {
    dir: tempfile::TempDir,
}

impl Sandbox {
    pub fn new() -> Self {
        Sandbox { dir: tempfile::Builder::new().prefix("tagwright-e2e-").tempdir().expect("temp dir") }
    }

    pub fn path(&self) -> &Path {
        self.dir.path()
    }

    /// Writes `bytes` to `name` in the sandbox and returns its path.
    pub fn write(&self, name: &str, bytes: impl AsRef<[u8]>) -> PathBuf {
        let p = self.dir.path().join(name);
        std::fs::write(&p, bytes).unwrap();
        p
    }
}

impl Default for Sandbox {
    fn default() -> Self {
        Self::new()
    }
}

/// One tag's samples.
#[derive(Debug, Clone)]
pub struct Series {
    pub tag: String,
    pub ts_us: Vec<i64>,
    pub values: Vec<f64>,
}

/// A local level series, y_t = mu_t + e_t, mu_{t+1} = mu_t + eta_t with
/// Var(e) = `sigma2_obs` and Var(eta) = `sigma2_level` per period, sampled
/// at `n` times from [`T0_US`]; `step(t, rng)` gives the time from sample t
/// to t+1 in whole microseconds. Over a step of dt periods the level moves
/// with variance `sigma2_level * dt`.
pub fn simulate_local_level(
    tag: &str,
    seed: u64,
    n: usize,
    sigma2_obs: f64,
    sigma2_level: f64,
    period_us: i64,
    mut step: impl FnMut(usize, &mut Rng) -> i64,
) -> Series {
    let mut rng = Rng::new(seed);
    let (mut ts, mut mu) = (T0_US, 50.0);
    let mut out = Series { tag: tag.to_string(), ts_us: Vec::with_capacity(n), values: Vec::with_capacity(n) };
    for t in 0..n {
        out.ts_us.push(ts);
        out.values.push(mu + sigma2_obs.sqrt() * rng.normal());
        let d = step(t, &mut rng);
        assert!(d > 0, "steps must be positive");
        mu += (sigma2_level * d as f64 / period_us as f64).sqrt() * rng.normal();
        ts += d;
    }
    out
}

/// Shuffles rows in place (Fisher-Yates with a seeded generator).
pub fn shuffle<T>(rows: &mut [T], seed: u64) {
    let mut rng = Rng::new(seed);
    for i in (1..rows.len()).rev() {
        rows.swap(i, rng.below(i + 1));
    }
}

/// A time as RFC 3339 text (`2026-03-01T06:00:05Z`).
pub fn rfc3339(us: i64) -> String {
    tagwright::io::format_ts_us(us)
}

/// Long-format rows (tag, time, value) of several series, interleaved by time.
pub fn long_rows(series: &[&Series]) -> Vec<(String, i64, f64)> {
    let mut rows: Vec<(String, i64, f64)> =
        series.iter().flat_map(|s| s.ts_us.iter().zip(&s.values).map(|(&t, &v)| (s.tag.clone(), t, v))).collect();
    rows.sort_by_key(|r| r.1);
    rows
}

/// Writes a CSV file with header `tag,ts,value`, times as RFC 3339 text and
/// NaN values as empty cells.
pub fn write_csv(path: &Path, rows: &[(String, i64, f64)]) {
    let mut text = String::from("tag,ts,value\n");
    for (tag, ts, v) in rows {
        let v = if v.is_nan() { String::new() } else { format!("{v}") };
        text += &format!("{tag},{},{v}\n", rfc3339(*ts));
    }
    std::fs::write(path, text).unwrap();
}

/// Writes a Parquet file of the given named columns (one record batch).
pub fn write_parquet(path: &Path, columns: Vec<(&str, ArrayRef)>) {
    let batch = RecordBatch::try_from_iter(columns).unwrap();
    let file = std::fs::File::create(path).unwrap();
    let mut w = ArrowWriter::try_new(file, batch.schema(), None).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

/// Column of strings.
pub fn strings<'a>(values: impl IntoIterator<Item = &'a str>) -> ArrayRef {
    Arc::new(arrow_array::StringArray::from_iter_values(values))
}

/// Column of f64.
pub fn floats(values: impl IntoIterator<Item = f64>) -> ArrayRef {
    Arc::new(arrow_array::Float64Array::from_iter_values(values))
}

/// `tests/corpus/`: small bad inputs and their manifest `expect.txt`.
pub fn corpus_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("corpus")
}

/// The repository root (the parent of this package's directory).
pub fn repo_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).parent().expect("tests/ has a parent").to_path_buf()
}

/// The Python interpreter of the repository's virtual environment
/// `<repo>/.venv`, with the exact versions of `tests/python-requirements.txt`
/// installed (once per test process).
///
/// Creates the environment with `python3 -m venv` if it is missing, and runs
/// `pip install -r tests/python-requirements.txt` if any pinned package is
/// missing or at another version, or a module does not import. Panics (the
/// test fails, it is not skipped) if the environment cannot be made.
pub fn python() -> PathBuf {
    static PY: OnceLock<PathBuf> = OnceLock::new();
    PY.get_or_init(|| {
        let root = repo_root();
        let venv = root.join(".venv");
        let py = if cfg!(windows) { venv.join("Scripts").join("python.exe") } else { venv.join("bin").join("python") };
        let requirements = root.join("tests").join("python-requirements.txt");
        if !py.is_file() {
            let status = Command::new("python3")
                .arg("-m")
                .arg("venv")
                .arg(&venv)
                .status()
                .unwrap_or_else(|e| panic!("cannot run python3 to create {}: {e}", venv.display()));
            assert!(status.success(), "python3 -m venv {} failed: {status}", venv.display());
        }
        if let Err(why) = python_ready(&py, &requirements) {
            let out = Command::new(&py)
                .args(["-m", "pip", "install", "--quiet", "--disable-pip-version-check", "-r"])
                .arg(&requirements)
                .output()
                .unwrap_or_else(|e| panic!("cannot run {} -m pip: {e}", py.display()));
            assert!(
                out.status.success(),
                "pip install -r {} failed ({why}):\n{}{}",
                requirements.display(),
                String::from_utf8_lossy(&out.stdout),
                String::from_utf8_lossy(&out.stderr)
            );
            if let Err(why) = python_ready(&py, &requirements) {
                panic!("{} still lacks the pinned packages after pip install: {why}", py.display());
            }
        }
        py
    })
    .clone()
}

/// Checks that every `name==version` line of `requirements` is installed at
/// that version and that the modules the tests use import.
fn python_ready(py: &Path, requirements: &Path) -> Result<(), String> {
    const CHECK: &str = r##"
import sys, importlib, importlib.metadata as md
bad = []
for line in open(sys.argv[1], encoding="utf-8"):
    line = line.split("#", 1)[0].strip()
    if not line:
        continue
    name, _, want = line.partition("==")
    try:
        have = md.version(name.strip())
    except md.PackageNotFoundError:
        have = None
    if have != want.strip():
        bad.append(f"{name.strip()} {have or 'missing'} (want {want.strip()})")
for module in ("jsonschema", "yaml", "pyarrow", "polars"):
    try:
        importlib.import_module(module)
    except Exception as e:
        bad.append(f"import {module}: {e}")
if bad:
    print("; ".join(bad))
    sys.exit(1)
"##;
    let out = Command::new(py)
        .arg("-c")
        .arg(CHECK)
        .arg(requirements)
        .output()
        .map_err(|e| format!("cannot run {}: {e}", py.display()))?;
    if out.status.success() {
        Ok(())
    } else {
        Err(format!("{}{}", String::from_utf8_lossy(&out.stdout).trim(), String::from_utf8_lossy(&out.stderr).trim()))
    }
}

/// The shared library of the plugin crate `crate_name` (as `tagwright-hampel-plugin`).
///
/// The plugin crates are dev-dependencies of this package, so cargo builds
/// their `.so` (`.dylib`, `.dll`) into `<target>/<profile>/deps`, the
/// directory of the test and bench binaries. Panics (the test fails, it is
/// not skipped) when the library is missing.
pub fn plugin_library(crate_name: &str) -> PathBuf {
    let exe = std::env::current_exe().expect("path of the test binary");
    let deps = exe.parent().expect("directory of the test binary");
    let file =
        format!("{}{}{}", std::env::consts::DLL_PREFIX, crate_name.replace('-', "_"), std::env::consts::DLL_SUFFIX);
    let lib = deps.join(&file);
    assert!(
        lib.is_file(),
        "{} was not built: `{crate_name}` must be a dev-dependency of tagwright-tests (tests/Cargo.toml), so that \
         `cargo test --workspace` builds it beside the test binaries",
        lib.display()
    );
    lib
}

/// SHA-256 of a file, lower-case hex.
pub fn sha256_file(path: &Path) -> String {
    use sha2::Digest;
    hex::encode(sha2::Sha256::digest(std::fs::read(path).unwrap()))
}

/// Copies the plugin `crate_name` into `dir` (created, mode 0755) as
/// `<file name>` with mode 0755, and returns its path and SHA-256.
pub fn install_plugin(dir: &Path, crate_name: &str) -> (PathBuf, String) {
    let lib = plugin_library(crate_name);
    std::fs::create_dir_all(dir).unwrap();
    let to = dir.join(lib.file_name().unwrap());
    std::fs::copy(&lib, &to).unwrap();
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(dir, std::fs::Permissions::from_mode(0o755)).unwrap();
        std::fs::set_permissions(&to, std::fs::Permissions::from_mode(0o755)).unwrap();
    }
    let sha = sha256_file(&to);
    (to, sha)
}

/// A string column of a read-back batch (plain or dictionary-encoded); null as `None`.
pub fn column_strings(a: &ArrayRef) -> Vec<Option<String>> {
    match a.data_type() {
        DataType::Dictionary(_, _) => {
            let d = a.as_dictionary::<Int32Type>();
            let values = d.values().as_string::<i32>();
            (0..d.len()).map(|i| d.key(i).map(|k| values.value(k).to_string())).collect()
        }
        _ => {
            let s = a.as_string::<i32>();
            (0..s.len()).map(|i| s.is_valid(i).then(|| s.value(i).to_string())).collect()
        }
    }
}

/// A float64 column of a read-back batch; null as `None`.
pub fn column_floats(a: &ArrayRef) -> Vec<Option<f64>> {
    let f = a.as_primitive::<Float64Type>();
    (0..f.len()).map(|i| f.is_valid(i).then(|| f.value(i))).collect()
}
