//! Every file of `tests/corpus/` against its lines of `tests/corpus/expect.txt`
//! (`tagwright fit`), and every pipeline of `tests/corpus/run/` against
//! `tests/corpus/run/expect.txt` (`tagwright run`).

use std::collections::BTreeSet;

use tagwright_tests::{corpus_dir, fit, tagwright, Sandbox};

const MANIFEST: &str = "expect.txt";

/// One manifest line.
#[derive(Debug)]
struct Case {
    line: usize,
    file: String,
    tag: String,
    model: String,
    exit: i32,
    fragment: String,
}

fn manifest() -> Vec<Case> {
    let path = corpus_dir().join(MANIFEST);
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    text.lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty() && !l.trim_start().starts_with('#'))
        .map(|(i, l)| {
            let f: Vec<&str> = l.splitn(5, '|').map(str::trim).collect();
            assert_eq!(f.len(), 5, "{MANIFEST} line {}: expected 5 fields separated by `|`: {l}", i + 1);
            Case {
                line: i + 1,
                file: f[0].to_string(),
                tag: f[1].to_string(),
                model: f[2].to_string(),
                exit: f[3].parse().unwrap_or_else(|_| panic!("{MANIFEST} line {}: bad exit code {}", i + 1, f[3])),
                fragment: f[4].to_string(),
            }
        })
        .collect()
}

#[test]
fn manifest_and_directory_agree() {
    let in_dir: BTreeSet<String> = std::fs::read_dir(corpus_dir())
        .unwrap()
        .map(|e| e.unwrap())
        .filter(|e| e.file_type().unwrap().is_file())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|name| name != MANIFEST)
        .collect();
    let in_manifest: BTreeSet<String> = manifest().into_iter().map(|c| c.file).collect();
    let untested: Vec<_> = in_dir.difference(&in_manifest).collect();
    let missing: Vec<_> = in_manifest.difference(&in_dir).collect();
    assert!(untested.is_empty(), "files in tests/corpus/ without a line in {MANIFEST}: {untested:?}");
    assert!(missing.is_empty(), "{MANIFEST} names files that are not in tests/corpus/: {missing:?}");
}

#[test]
fn every_case_gives_its_exit_code_and_message() {
    let mut failures = Vec::new();
    for case in manifest() {
        let run = fit(&corpus_dir().join(&case.file), &case.tag, &case.model, &[]);
        // A failure's message is on an `error:` line of stderr (notes may come before it).
        let found = if case.exit == 0 {
            run.stdout.contains(&case.fragment)
        } else {
            run.stderr.lines().any(|l| l.starts_with("error: ") && l.contains(&case.fragment))
        };
        if run.code != case.exit || !found {
            failures.push(format!("{MANIFEST} line {} ({case:?}):\n{run}", case.line));
        }
    }
    assert!(failures.is_empty(), "{} case(s) failed:\n\n{}", failures.len(), failures.join("\n"));
}

/// One line of `tests/corpus/run/expect.txt`.
#[derive(Debug)]
struct RunCase {
    line: usize,
    pipeline: String,
    input: String,
    exit: i32,
    fragment: String,
}

fn run_manifest() -> Vec<RunCase> {
    let path = corpus_dir().join("run").join(MANIFEST);
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    text.lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty() && !l.trim_start().starts_with('#'))
        .map(|(i, l)| {
            let f: Vec<&str> = l.splitn(4, '|').map(str::trim).collect();
            assert_eq!(f.len(), 4, "run/{MANIFEST} line {}: expected 4 fields separated by `|`: {l}", i + 1);
            RunCase {
                line: i + 1,
                pipeline: f[0].to_string(),
                input: f[1].to_string(),
                exit: f[2].parse().unwrap_or_else(|_| panic!("run/{MANIFEST} line {}: bad exit code {}", i + 1, f[2])),
                fragment: f[3].to_string(),
            }
        })
        .collect()
}

#[test]
fn every_run_case_gives_its_exit_code_and_writes_nothing_on_failure() {
    let dir = corpus_dir().join("run");
    let cases = run_manifest();
    let named: BTreeSet<String> = cases.iter().map(|c| c.pipeline.clone()).collect();
    let present: BTreeSet<String> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n != MANIFEST)
        .collect();
    assert_eq!(named, present, "run/{MANIFEST} and tests/corpus/run/ disagree");
    let mut failures = Vec::new();
    for case in cases {
        let sb = Sandbox::new();
        let out = sb.path().join("out");
        let run = tagwright([
            "run",
            "--pipeline",
            dir.join(&case.pipeline).to_str().unwrap(),
            "--input",
            corpus_dir().join(&case.input).to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ]);
        let found = if case.exit == 0 {
            run.stdout.contains(&case.fragment)
        } else {
            run.stderr.lines().any(|l| l.starts_with("error: ") && l.contains(&case.fragment))
        };
        let written = out.exists() && std::fs::read_dir(&out).map(|d| d.count()).unwrap_or(0) > 0;
        let wrote_ok = if case.exit == 0 { out.join("cleaned.parquet").is_file() } else { !written };
        if run.code != case.exit || !found || !wrote_ok {
            failures.push(format!("run/{MANIFEST} line {} ({case:?}), outputs written: {written}:\n{run}", case.line));
        }
    }
    assert!(failures.is_empty(), "{} case(s) failed:\n\n{}", failures.len(), failures.join("\n"));
}
