//! Every file of `tests/corpus/` against its lines of `tests/corpus/expect.txt`.

use std::collections::BTreeSet;

use tagwright_tests::{corpus_dir, fit};

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
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
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
