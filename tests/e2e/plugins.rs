//! External plugins end to end: the example Hampel plugin in a real run, the
//! test plugins under `plugins/testing/` that break the rules (each refused
//! or contained with its stated error while the other tags run), and the
//! plugin against the same code linked as a built-in step.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::cast::AsArray;
use arrow_array::types::TimestampMicrosecondType;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use serde_json::Value;
use tagwright::plugin::{external, StepContext, TagSettings, TagWork};
use tagwright::series::{Quality, ReadCounts, Sampling, Status, TagSeries, TagTable};
use tagwright_tests::{column_floats, column_strings, install_plugin, rfc3339, tagwright, Sandbox, T0_US};

const HAMPEL: &str = "tagwright-hampel-plugin";
const MISBEHAVE: &str = "tagwright-test-plugin-misbehave";

/// A reading of tag `k` at row `i`: a ramp with a small bounded wobble, so
/// that no reading but the planted spikes lies 3 robust standard
/// deviations from its window's median.
fn reading(k: usize, i: usize) -> f64 {
    20.0 + 5.0 * k as f64 + 0.05 * i as f64 + 0.01 * (1.7 * i as f64).sin()
}

/// `tags` with 300 readings 5 s apart, plus `spikes` (tag, row, offset).
fn input(sb: &Sandbox, tags: &[&str], spikes: &[(&str, usize, f64)]) -> PathBuf {
    let mut text = String::from("tag,ts,value\n");
    for (k, tag) in tags.iter().enumerate() {
        for i in 0..300 {
            let extra: f64 = spikes.iter().filter(|s| s.0 == *tag && s.1 == i).map(|s| s.2).sum();
            text += &format!("{tag},{},{}\n", rfc3339(T0_US + i as i64 * 5_000_000), reading(k, i) + extra);
        }
    }
    sb.write("export.csv", text)
}

/// `plugin: {...}` in flow style.
fn plugin_step(path: &str, sha: &str, params: &str) -> String {
    format!("plugin: {{path: \"{path}\", sha256: \"{sha}\", params: {params}}}")
}

fn run(sb: &Sandbox, pipeline: &Path, input: &Path, out: &str) -> tagwright_tests::Run {
    let out = sb.path().join(out);
    tagwright([
        "run",
        "--pipeline",
        pipeline.to_str().unwrap(),
        "--input",
        input.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ])
}

/// The rows of cleaned.parquet: (tag, ts) -> (raw, value, status, fault).
type Rows = BTreeMap<(String, i64), (Option<f64>, Option<f64>, String, Option<String>)>;

fn read_rows(path: &Path) -> Rows {
    let reader = ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(path).unwrap()).unwrap().build().unwrap();
    let mut rows = Rows::new();
    for batch in reader {
        let b = batch.unwrap();
        let tag = column_strings(b.column(0));
        let ts = b.column(1).as_primitive::<TimestampMicrosecondType>().values().to_vec();
        let (raw, value) = (column_floats(b.column(2)), column_floats(b.column(3)));
        let (status, fault) = (column_strings(b.column(5)), column_strings(b.column(6)));
        for i in 0..b.num_rows() {
            rows.insert(
                (tag[i].clone().unwrap(), ts[i]),
                (raw[i], value[i], status[i].clone().unwrap(), fault[i].clone()),
            );
        }
    }
    rows
}

fn provenance(path: &Path) -> Vec<Value> {
    std::fs::read_to_string(path).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect()
}

fn ts(i: usize) -> i64 {
    T0_US + i as i64 * 5_000_000
}

#[test]
fn the_hampel_plugin_cleans_a_run() {
    let sb = Sandbox::new();
    let (lib, sha) = install_plugin(&sb.path().join("plugins"), HAMPEL);
    let file = lib.file_name().unwrap().to_str().unwrap();
    let rel = format!("plugins/{file}");
    let pipeline = sb.write(
        "p.yaml",
        format!(
            "version: 1\nplugins: {{allow: [plugins]}}\nrules:\n  - tags: \"FT-*.PV\"\n    steps: [quality, {}]\n  \
             - tags: \"TT-*.PV\"\n    steps:\n      - {}\n",
            plugin_step(&rel, &sha, "{window: 7, k: 3.5}"),
            plugin_step(&rel, &sha.to_uppercase(), "{action: flag}"),
        ),
    );
    let tags = ["FT-3101.PV", "FT-3113.PV", "TT-3102.PV"];
    let spikes =
        [("FT-3101.PV", 100, 30.0), ("FT-3101.PV", 101, 25.0), ("FT-3113.PV", 0, 10.0), ("TT-3102.PV", 50, -8.0)];
    let input = input(&sb, &tags, &spikes);

    // `check` loads the plugin and names it.
    let r = tagwright(["check", "--pipeline", pipeline.to_str().unwrap()]);
    r.assert_code(0);
    assert!(
        r.stdout.contains(&format!("plugin hampel {}", env!("CARGO_PKG_VERSION"))) && r.stdout.contains(&sha),
        "{r}"
    );

    let r = run(&sb, &pipeline, &input, "out");
    r.assert_code(0);
    assert!(r.stdout.contains("3 processed, 0 failed"), "{r}");
    assert!(r.stdout.contains("plugin    hampel"), "{r}");

    // Exactly the spikes are caught (two in a row too): rejected on FT (value
    // null), flagged on TT (value kept).
    let rows = read_rows(&sb.path().join("out/cleaned.parquet"));
    assert_eq!(rows.len(), 900);
    let mut changed: Vec<(String, i64, String, Option<String>)> = rows
        .iter()
        .filter(|(_, v)| v.2 != "ok" || v.3.is_some())
        .map(|((t, s), v)| (t.clone(), *s, v.2.clone(), v.3.clone()))
        .collect();
    changed.sort();
    let spike = Some("spike".to_string());
    assert_eq!(
        changed,
        [
            ("FT-3101.PV".to_string(), ts(100), "rejected".to_string(), spike.clone()),
            ("FT-3101.PV".to_string(), ts(101), "rejected".to_string(), spike.clone()),
            ("FT-3113.PV".to_string(), ts(0), "rejected".to_string(), spike.clone()),
            ("TT-3102.PV".to_string(), ts(50), "ok".to_string(), spike.clone()),
        ]
    );
    let ft = &rows[&("FT-3101.PV".to_string(), ts(100))];
    assert_eq!((ft.0, ft.1), (Some(reading(0, 100) + 30.0), None));
    let tt = &rows[&("TT-3102.PV".to_string(), ts(50))];
    assert_eq!((tt.0, tt.1), (Some(reading(2, 50) - 8.0), Some(reading(2, 50) - 8.0)));
    // Provenance: the plugin in the run record, its step in tags and events.
    let p = provenance(&sb.path().join("out/provenance.jsonl"));
    let plugins = p[0]["plugins"].as_array().unwrap();
    assert_eq!(plugins.len(), 1, "one plugin, named twice: {plugins:?}");
    assert_eq!(plugins[0]["name"], "hampel");
    assert_eq!(plugins[0]["version"], env!("CARGO_PKG_VERSION"));
    assert_eq!(plugins[0]["sha256"], sha.as_str());
    assert_eq!(plugins[0]["path"].as_str().unwrap(), lib.canonicalize().unwrap().to_str().unwrap());
    let ft_rec = p.iter().find(|r| r["record"] == "tag" && r["tag"] == "FT-3101.PV").unwrap();
    assert_eq!(ft_rec["steps"], serde_json::json!(["quality", "plugin:hampel"]));
    let ev = p.iter().find(|r| r["record"] == "event" && r["tag"] == "FT-3101.PV").unwrap();
    assert_eq!(
        (ev["step"].as_str(), ev["action"].as_str(), ev["rows"].as_u64()),
        (Some("plugin:hampel"), Some("rejected"), Some(2))
    );
    assert_eq!(ev["threshold"].as_f64(), Some(3.5));
    assert!(ev["statistic"].as_f64().unwrap() > 3.5, "{ev}");
    let ev = p.iter().find(|r| r["record"] == "event" && r["tag"] == "TT-3102.PV").unwrap();
    assert_eq!((ev["action"].as_str(), ev["threshold"].as_f64()), (Some("flagged"), Some(3.0)));
    assert!(ev["statistic"].as_f64().unwrap() < -3.0, "{ev}");
}

/// The line (1-based) of the first line of `text` holding `needle`.
fn line_of(text: &str, needle: &str) -> usize {
    text.lines().position(|l| l.contains(needle)).map(|i| i + 1).unwrap_or_else(|| panic!("{needle} not in\n{text}"))
}

#[test]
fn check_lists_every_plugin_that_cannot_be_loaded() {
    let sb = Sandbox::new();
    let dir = sb.path().join("plugins");
    let (_, sha_abi) = install_plugin(&dir, "tagwright-test-plugin-bad-abi");
    let (_, sha_magic) = install_plugin(&dir, "tagwright-test-plugin-bad-magic");
    let (_, sha_root) = install_plugin(&dir, "tagwright-test-plugin-no-root");
    let (_, sha_unwind) = install_plugin(&dir, "tagwright-test-plugin-no-unwind");
    let (_, sha_hampel) = install_plugin(&dir, HAMPEL);
    let (_, sha_mis) = install_plugin(&dir, MISBEHAVE);
    // A world-writable copy, in a directory of its own.
    let (shared, sha_shared) = install_plugin(&sb.path().join("shared"), HAMPEL);
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&shared, std::fs::Permissions::from_mode(0o666)).unwrap();
    }
    // A copy outside every allowed directory.
    let (_, sha_outside) = install_plugin(&sb.path().join("elsewhere"), HAMPEL);
    let so = |name: &str| format!("{}{name}{}", std::env::consts::DLL_PREFIX, std::env::consts::DLL_SUFFIX);
    let wrong_sha = "0".repeat(64);
    let cases: Vec<(String, &str)> = vec![
        (
            plugin_step(&format!("plugins/{}", so("tagwright_test_plugin_bad_abi")), &sha_abi, "{}"),
            "plugin ABI version 99, but this tagwright loads ABI version 1",
        ),
        (
            plugin_step(&format!("plugins/{}", so("tagwright_test_plugin_bad_magic")), &sha_magic, "{}"),
            "not a tagwright plugin: its root descriptor starts with 0x",
        ),
        (
            plugin_step(&format!("plugins/{}", so("tagwright_test_plugin_no_root")), &sha_root, "{}"),
            "not a tagwright plugin: it does not export the symbol `tagwright_plugin_root`",
        ),
        (
            plugin_step(&format!("plugins/{}", so("tagwright_test_plugin_no_unwind")), &sha_unwind, "{}"),
            "the plugin was built with panic = \"abort\", so a panic in it would end tagwright",
        ),
        (
            plugin_step(&format!("plugins/{}", so("tagwright_hampel_plugin")), &wrong_sha, "{}"),
            "but the pipeline expects 0000000000000000000000000000000000000000000000000000000000000000",
        ),
        (
            plugin_step(&format!("shared/{}", so("tagwright_hampel_plugin")), &sha_shared, "{}"),
            "the file is writable by group or others (mode 0666); refusing to load",
        ),
        (
            plugin_step(&format!("elsewhere/{}", so("tagwright_hampel_plugin")), &sha_outside, "{}"),
            "not inside a directory that plugins.allow lists",
        ),
        (
            plugin_step(&format!("plugins/{}", so("tagwright_test_plugin_misbehave")), &sha_mis, "{fail_create: true}"),
            "plugin `misbehave`: fail_create is set: refusing these parameters",
        ),
        (
            plugin_step(&format!("plugins/{}", so("tagwright_hampel_plugin")), &sha_hampel, "{window: 4}"),
            "plugin `hampel`: window: 4: write an odd number of readings",
        ),
        (plugin_step("plugins/missing.so", &sha_hampel, "{}"), "cannot find the plugin"),
        (plugin_step(&format!("plugins/{}", so("tagwright_hampel_plugin")), "abc", "{}"), "`abc` is not a SHA-256"),
    ];
    let mut text = String::from("version: 1\nplugins: {allow: [plugins, shared]}\nrules:\n");
    for (i, (step, _)) in cases.iter().enumerate() {
        text += &format!("  - tags: \"T{i}\"\n    steps:\n      - quality\n      - {step}\n");
    }
    let pipeline = sb.write("p.yaml", &text);
    let r = tagwright(["check", "--pipeline", pipeline.to_str().unwrap()]);
    r.assert_code(1);
    // One line per problem, each at its step, all reported at once.
    assert_eq!(r.stderr.lines().count(), cases.len(), "{r}");
    for (i, (_, message)) in cases.iter().enumerate() {
        let line = line_of(&text, &format!("tags: \"T{i}\"")) + 3;
        let at = format!("p.yaml:{line}:");
        let err = r.stderr.lines().find(|l| l.contains(&at)).unwrap_or_else(|| panic!("nothing at {at}\n{r}"));
        assert!(err.contains(&format!("rules[{i}].steps[1].plugin.")), "{err}");
        assert!(err.contains(message), "case {i}: want {message:?} in\n{err}");
    }
    // `run` refuses it the same way and writes nothing.
    let input = input(&sb, &["T0", "T1"], &[]);
    let r = run(&sb, &pipeline, &input, "out");
    r.assert_code(1).assert_stderr_has("plugin ABI version 99");
    assert!(!sb.path().join("out/cleaned.parquet").exists() && !sb.path().join("out/provenance.jsonl").exists());
}

#[test]
fn a_plugin_that_panics_or_errs_fails_only_that_tag() {
    let sb = Sandbox::new();
    let (lib, sha) = install_plugin(&sb.path().join("plugins"), MISBEHAVE);
    let file = lib.file_name().unwrap().to_str().unwrap();
    let step = plugin_step(&format!("plugins/{file}"), &sha, "{panic_on: [FT-3113.PV], error_on: [TT-3102.PV]}");
    let pipeline = sb.write(
        "p.yaml",
        format!("version: 1\nplugins: {{allow: [plugins]}}\nrules:\n  - tags: \"*\"\n    steps: [quality, {step}]\n"),
    );
    let tags = ["FT-3101.PV", "FT-3113.PV", "LT-3120.PV", "TT-3102.PV"];
    let input = input(&sb, &tags, &[]);
    let r = run(&sb, &pipeline, &input, "out");
    r.assert_code(2);
    assert!(r.stdout.contains("2 processed, 2 failed"), "{r}");
    assert!(
        r.stdout.contains(
            "FAILED    FT-3113.PV: step `plugin:misbehave`: tag FT-3113.PV: plugin `misbehave` panicked (caught in \
             the plugin): panicked at "
        ) && r.stdout.contains("index out of bounds"),
        "{r}"
    );
    assert!(
        r.stdout.contains(
            "FAILED    TT-3102.PV: step `plugin:misbehave`: tag TT-3102.PV: plugin `misbehave`: deliberate error for \
             TT-3102.PV"
        ),
        "{r}"
    );
    // The plugin's panic message is reported, not printed by the plugin.
    assert!(!r.stderr.contains("panicked"), "{r}");

    let p = provenance(&sb.path().join("out/provenance.jsonl"));
    let failed: Vec<&str> =
        p[0]["tags_failed"].as_array().unwrap().iter().map(|t| t["tag"].as_str().unwrap()).collect();
    assert_eq!(failed, ["FT-3113.PV", "TT-3102.PV"]);
    for tag in tags {
        let rec = p.iter().find(|r| r["record"] == "tag" && r["tag"] == tag).unwrap();
        let failed = tag == "FT-3113.PV" || tag == "TT-3102.PV";
        assert_eq!(rec["outcome"], if failed { "failed" } else { "ok" }, "{rec}");
    }
    // Failed tags keep their raw readings; the others show the plugin's flag.
    let rows = read_rows(&sb.path().join("out/cleaned.parquet"));
    for tag in tags {
        let mine: Vec<_> = rows.iter().filter(|((t, _), _)| t == tag).map(|(_, v)| v).collect();
        assert_eq!(mine.len(), 300);
        assert!(mine.iter().all(|v| v.0 == v.1), "{tag}: value is raw");
        let flagged = mine.iter().filter(|v| v.3.is_some()).count();
        let want = if tag == "FT-3113.PV" || tag == "TT-3102.PV" { 0 } else { 1 };
        assert_eq!(flagged, want, "{tag}");
    }
}

#[test]
fn invalid_plugin_output_fails_the_tag() {
    let sb = Sandbox::new();
    let (lib, sha) = install_plugin(&sb.path().join("plugins"), MISBEHAVE);
    let file = lib.file_name().unwrap().to_str().unwrap();
    let params = "{bad_status_on: [A], bad_fault_on: [B], fill_on: [C], keep_value_on: [D], change_value_on: [F]}";
    let step = plugin_step(&format!("plugins/{file}"), &sha, params);
    let pipeline = sb.write(
        "p.yaml",
        format!("version: 1\nplugins: {{allow: [plugins]}}\nrules:\n  - tags: \"*\"\n    steps: [{step}]\n"),
    );
    let input = input(&sb, &["A", "B", "C", "D", "E", "F"], &[]);
    let r = run(&sb, &pipeline, &input, "out");
    r.assert_code(2);
    assert!(r.stdout.contains("1 processed, 5 failed"), "{r}");
    let t0 = rfc3339(T0_US);
    for (tag, message) in [
        ("A", format!("row 0 ({t0}): status code 9 is not a status (0 ok, 1 filled, 2 replaced, 3 rejected)")),
        ("B", format!("row 0 ({t0}): fault code 42 is not a fault")),
        ("C", format!("row 0 ({t0}): status changed from ok to filled; only the host inserts rows")),
        ("D", format!("row 0 ({t0}): status rejected with a value; a rejected row has no value")),
        (
            "F",
            format!("row 0 ({t0}): status ok with a value other than the reading; a kept row's value is its reading"),
        ),
    ] {
        let want = format!("FAILED    {tag}: step `plugin:misbehave`: tag {tag}: {message}");
        assert!(r.stdout.contains(&want), "want {want:?}\n{r}");
    }
}

/// A tag as the engine gives it to its chain: 2,000 readings with spikes,
/// a few bad-quality readings and a non-finite one, after the `quality` step.
fn work(tag: &str, seed: u64) -> TagWork {
    let mut rng = tagwright::rng::Rng::new(seed);
    let n = 2000;
    let mut values: Vec<f64> = (0..n).map(|i| 50.0 + (i as f64 / 80.0).sin() * 5.0 + 0.3 * rng.normal()).collect();
    let mut quality = vec![Quality::Good; n];
    for _ in 0..20 {
        let i = rng.below(n);
        values[i] += if rng.below(2) == 0 { 6.0 } else { -6.0 };
    }
    for _ in 0..5 {
        quality[rng.below(n)] = Quality::Bad;
    }
    values[rng.below(n)] = f64::NAN;
    let s = TagSeries {
        tag: tag.to_string(),
        ts_us: (0..n as i64).map(|i| T0_US + i * 1_000_000).collect(),
        values,
        quality,
        counts: ReadCounts::default(),
    };
    let mut w = TagWork {
        table: TagTable::from_series(&s, 1_000_000, Sampling::Regular),
        settings: Arc::new(TagSettings::default()),
        report: Default::default(),
        state: Default::default(),
    };
    let quality_step = tagwright::plugin::Registry::with_builtins().make("quality", &Value::Null).unwrap();
    quality_step.apply(std::slice::from_mut(&mut w), &StepContext::new(0)).unwrap();
    w
}

/// Bit-exact comparison of two tables (NaN equals NaN of the same bits).
fn assert_same_table(a: &TagTable, b: &TagTable) {
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!((&a.tag, &a.ts_us, &a.quality), (&b.tag, &b.ts_us, &b.quality));
    assert_eq!(bits(&a.raw), bits(&b.raw));
    assert_eq!(bits(&a.value), bits(&b.value), "value of {}", a.tag);
    assert_eq!(bits(&a.std), bits(&b.std));
    assert_eq!(a.status, b.status, "status of {}", a.tag);
    assert_eq!(a.fault, b.fault, "fault of {}", a.tag);
    assert_eq!(a.decided_by, b.decided_by, "decided_by of {}", a.tag);
    assert_eq!(bits(&a.stat), bits(&b.stat), "stat of {}", a.tag);
    assert_eq!(bits(&a.threshold), bits(&b.threshold));
}

/// Through the C ABI, the plugin changes a table exactly as the same code
/// linked in as a built-in step does.
#[test]
fn the_plugin_gives_what_the_same_code_built_in_gives() {
    let sb = Sandbox::new();
    let dir = sb.path().join("plugins");
    let (lib, sha) = install_plugin(&dir, HAMPEL);
    let plugin = external::load(&lib, &sha, &[dir]).unwrap();
    assert_eq!(plugin.info().name, "hampel");
    for params in [serde_json::json!(null), serde_json::json!({"window": 11, "k": 2.5, "action": "flag"})] {
        let external = plugin.step(&params).unwrap();
        let builtin = tagwright_tests::hampel_builtin::make(&params).unwrap();
        assert_eq!(external.name(), "plugin:hampel");
        let ctx = StepContext::new(1);
        let mut decided = 0;
        for seed in 1..=4 {
            let mut a = [work(&format!("FT-31{seed:02}.PV"), seed)];
            let mut b = a.clone();
            external.apply(&mut a, &ctx).unwrap();
            builtin.apply(&mut b, &ctx).unwrap();
            assert_same_table(&a[0].table, &b[0].table);
            a[0].table.check().unwrap();
            decided += a[0].table.decided_by.iter().filter(|&&d| d == 1).count();
            assert!(a[0].table.status.contains(&Status::Rejected));
        }
        assert!(decided >= 40, "the plugin decided {decided} rows of 4 tags with 20 spikes each");
    }
}
