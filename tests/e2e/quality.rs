//! The evidence-of-quality regression (issue 4): one small seeded demo case
//! run through the real binary with `pipelines/demo.yaml`, scored against the
//! generator's truth with looser thresholds than the benchmark's targets
//! ([`Targets::regression`]), so that a change that makes the cleaning worse
//! fails CI. The full benchmark is `core/benches/quality_vs_truth.sh`; the
//! metrics are explained in `docs/quality.md`. The scorer's own tests are in
//! `tests/quality/tests.rs`.

use tagwright::demo::{generate, write_export, DemoOptions};
use tagwright_tests::quality::{read_run, score, Targets};
use tagwright_tests::{repo_root, tagwright, Sandbox};

#[test]
fn demo_pipeline_holds_the_regression_thresholds_on_seed_7() {
    let data = generate(&DemoOptions { seed: 7, fault_scale: 1.0, hours: 8.0, ..DemoOptions::default() });
    let sb = Sandbox::new();
    let export = sb.path().join("historian_export.parquet");
    write_export(&data, &export).unwrap();
    let out = sb.path().join("run");
    let pipeline = repo_root().join("pipelines").join("demo.yaml");
    let (p, e, o) = (pipeline.to_str().unwrap(), export.to_str().unwrap(), out.to_str().unwrap());
    let r = tagwright(["run", "--pipeline", p, "--input", e, "--out", o]);
    r.assert_code(0);

    let s = score("pipeline", &read_run(&out).unwrap(), &data);
    // The scorer must have had something to score: the demo's fault plan.
    assert!(s.recall.of >= 20, "counted fault events: {:?}\n{s}", s.recall);
    assert!(s.process.of >= 50, "process change pairs: {:?}\n{s}", s.process);

    let checks = Targets::regression().check(&s, None);
    let failed: Vec<String> = checks
        .iter()
        .filter(|c| !c.passed())
        .map(|c| format!("  {}: {} (target {}, {})", c.name, c.value, c.target, c.verdict))
        .collect();
    assert!(
        failed.is_empty(),
        "seed 7, fault scale 1, 8 h: below the regression thresholds:\n{}\n\n{s}",
        failed.join("\n")
    );
}
