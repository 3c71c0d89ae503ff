//! `tagwright run` and `check` end to end: the output contract, provenance,
//! determinism, exit codes and atomic outputs.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use arrow_array::cast::AsArray;
use arrow_array::types::TimestampMicrosecondType;
use arrow_schema::{DataType, TimeUnit};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use serde_json::Value;
use tagwright_tests::{column_floats, column_strings, rfc3339, tagwright, Sandbox, T0_US};

const PIPELINE: &str = r#"version: 1
site: {timezone: UTC}
input: {format: long, columns: {tag: tag, time: ts, value: value, quality: quality}, quality: opc}
shifts: [{name: early, start: "06:00", hours: 8}]
rules:
  - tags: ["FT-*.PV", "LT-201.PV"]
    range: [0, 100]
    steps: [quality, range]
  - tags: "LT-201.PV"
    range: [0, 50]
  - tags: "TT-*"
    steps: [quality, {range: {action: flag}}]
    range: [0, 200]
"#;

/// Four tags, 5 s apart, with bad quality, non-finite and out-of-range
/// readings at known rows; XX-999 is selected by no rule.
fn input(sb: &Sandbox) -> PathBuf {
    let mut text = String::from("tag,ts,value,quality\n");
    for tag in ["FT-101.PV", "FT-102.PV", "LT-201.PV", "TT-301.PV", "XX-999"] {
        for i in 0..60i64 {
            let ts = rfc3339(T0_US + i * 5_000_000);
            let (v, q) = match (tag, i) {
                ("FT-101.PV", 10) => ("120.5".to_string(), 192), // above range
                ("FT-101.PV", 11) => ("130".to_string(), 192),
                ("FT-101.PV", 20) => ("40".to_string(), 0), // bad quality
                ("FT-102.PV", 30) => ("NaN".to_string(), 192),
                ("LT-201.PV", 5) => ("60".to_string(), 192), // above the later rule's 50
                ("TT-301.PV", 40) => ("250".to_string(), 192), // flagged only
                _ => (format!("{}", 20.0 + (i % 7) as f64), 192),
            };
            text += &format!("{tag},{ts},{v},{q}\n");
        }
    }
    sb.write("export.csv", text)
}

struct Cleaned {
    tag: Vec<String>,
    ts: Vec<i64>,
    raw: Vec<Option<f64>>,
    value: Vec<Option<f64>>,
    std: Vec<Option<f64>>,
    status: Vec<String>,
    fault: Vec<Option<String>>,
    schema: Vec<(String, DataType, bool)>,
    metadata: BTreeMap<String, String>,
}

fn read_cleaned(path: &Path) -> Cleaned {
    let file = std::fs::File::open(path).unwrap();
    let builder = ParquetRecordBatchReaderBuilder::try_new(file).unwrap();
    let metadata = builder
        .metadata()
        .file_metadata()
        .key_value_metadata()
        .map(|kv| kv.iter().map(|k| (k.key.clone(), k.value.clone().unwrap_or_default())).collect())
        .unwrap_or_default();
    let schema =
        builder.schema().fields().iter().map(|f| (f.name().clone(), f.data_type().clone(), f.is_nullable())).collect();
    let mut c = Cleaned {
        tag: vec![],
        ts: vec![],
        raw: vec![],
        value: vec![],
        std: vec![],
        status: vec![],
        fault: vec![],
        schema,
        metadata,
    };
    for batch in builder.build().unwrap() {
        let b = batch.unwrap();
        c.tag.extend(column_strings(b.column(0)).into_iter().map(|s| s.unwrap()));
        let ts = b.column(1).as_primitive::<TimestampMicrosecondType>();
        c.ts.extend(ts.values().iter());
        c.raw.extend(column_floats(b.column(2)));
        c.value.extend(column_floats(b.column(3)));
        c.std.extend(column_floats(b.column(4)));
        c.status.extend(column_strings(b.column(5)).into_iter().map(|s| s.unwrap()));
        c.fault.extend(column_strings(b.column(6)));
    }
    c
}

fn provenance(path: &Path) -> Vec<Value> {
    std::fs::read_to_string(path).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect()
}

fn run(sb: &Sandbox, pipeline: &Path, input: &Path, out: &str, extra: &[&str]) -> tagwright_tests::Run {
    let out = sb.path().join(out);
    let mut args = vec!["run", "--pipeline", pipeline.to_str().unwrap(), "--input", input.to_str().unwrap()];
    args.extend(["--out", out.to_str().unwrap()]);
    args.extend(extra);
    tagwright(args)
}

#[test]
fn run_writes_the_contract_and_every_change_has_one_event() {
    let sb = Sandbox::new();
    let pipeline = sb.write("p.yaml", PIPELINE);
    let input = input(&sb);
    let r = run(&sb, &pipeline, &input, "out", &[]);
    r.assert_code(0);
    assert!(r.stdout.contains("4 processed, 0 failed, 1 not selected"), "{r}");
    assert!(r.stdout.contains("IEC 61511"), "the summary carries the caution\n{r}");
    let c = read_cleaned(&sb.path().join("out/cleaned.parquet"));

    // Schema exactly as the contract says.
    let names: Vec<&str> = c.schema.iter().map(|(n, _, _)| n.as_str()).collect();
    assert_eq!(names, ["tag", "ts", "raw", "value", "std", "status", "fault"]);
    assert_eq!(c.schema[1].1, DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into())));
    for i in [2, 3, 4] {
        assert_eq!(c.schema[i].1, DataType::Float64);
    }
    assert!(matches!(c.schema[0].1, DataType::Dictionary(_, _)), "tag is dictionary-encoded");
    assert!(c.metadata.contains_key("tagwright.run_id"));

    // Sorted by tag then time; the unselected tag is not written.
    let mut sorted: Vec<(String, i64)> = c.tag.iter().cloned().zip(c.ts.iter().cloned()).collect();
    sorted.sort();
    assert_eq!(sorted, c.tag.iter().cloned().zip(c.ts.iter().cloned()).collect::<Vec<_>>());
    assert!(!c.tag.iter().any(|t| t == "XX-999"));
    assert_eq!(c.tag.len(), 4 * 60);

    let row =
        |tag: &str, i: i64| (0..c.tag.len()).find(|&r| c.tag[r] == tag && c.ts[r] == T0_US + i * 5_000_000).unwrap();
    let r1 = row("FT-101.PV", 10);
    assert_eq!((c.status[r1].as_str(), c.fault[r1].as_deref(), c.value[r1]), ("rejected", Some("range"), None));
    assert_eq!(c.raw[r1], Some(120.5));
    let r2 = row("FT-101.PV", 20);
    assert_eq!((c.status[r2].as_str(), c.fault[r2].as_deref()), ("rejected", Some("bad_quality")));
    let r3 = row("FT-102.PV", 30);
    assert_eq!((c.status[r3].as_str(), c.fault[r3].as_deref()), ("rejected", Some("bad_quality")));
    // The later rule narrows LT-201's range to [0, 50] and keeps the chain of the first.
    let r4 = row("LT-201.PV", 5);
    assert_eq!((c.status[r4].as_str(), c.fault[r4].as_deref()), ("rejected", Some("range")));
    // A flag-only range keeps the reading.
    let r5 = row("TT-301.PV", 40);
    assert_eq!((c.status[r5].as_str(), c.fault[r5].as_deref(), c.value[r5]), ("ok", Some("range"), Some(250.0)));
    let ok = row("FT-102.PV", 3);
    assert_eq!((c.status[ok].as_str(), c.value[ok], c.raw[ok]), ("ok", c.raw[ok], Some(23.0)));

    // Provenance: run record first, then tag records each followed by its events.
    let p = provenance(&sb.path().join("out/provenance.jsonl"));
    assert_eq!(p[0]["record"], "run");
    assert_eq!(p[0]["run_id"].as_str().unwrap(), c.metadata["tagwright.run_id"]);
    assert_eq!(p[0]["inputs"][0]["rows"], 300);
    assert!(p[0]["caution"].as_str().unwrap().contains("IEC 61511"));
    let tags: Vec<&str> = p.iter().filter(|r| r["record"] == "tag").map(|r| r["tag"].as_str().unwrap()).collect();
    assert_eq!(tags, ["FT-101.PV", "FT-102.PV", "LT-201.PV", "TT-301.PV"]);
    // Every changed or flagged row lies in exactly one event of its tag.
    let events: Vec<&Value> = p.iter().filter(|r| r["record"] == "event").collect();
    for r in 0..c.tag.len() {
        let changed = c.status[r] != "ok" || c.fault[r].is_some();
        let ts = rfc3339(c.ts[r]);
        let n = events
            .iter()
            .filter(|e| {
                e["tag"] == c.tag[r].as_str()
                    && e["from"].as_str().unwrap() <= ts.as_str()
                    && ts.as_str() <= e["to"].as_str().unwrap()
            })
            .count();
        assert_eq!(n, usize::from(changed), "row {r} ({} {ts}) is in {n} events", c.tag[r]);
    }
    let rows_in_events: u64 = events.iter().map(|e| e["rows"].as_u64().unwrap()).sum();
    let changed_rows = (0..c.tag.len()).filter(|&r| c.status[r] != "ok" || c.fault[r].is_some()).count() as u64;
    assert_eq!(rows_in_events, changed_rows);
    let range_event = events.iter().find(|e| e["tag"] == "FT-101.PV" && e["fault"] == "range").unwrap();
    assert_eq!(
        (range_event["rows"].as_u64(), range_event["statistic"].as_f64(), range_event["threshold"].as_f64()),
        (Some(2), Some(130.0), Some(100.0))
    );
}

#[test]
fn outputs_are_identical_across_runs_and_thread_counts() {
    let sb = Sandbox::new();
    let pipeline = sb.write("p.yaml", PIPELINE);
    let input = input(&sb);
    run(&sb, &pipeline, &input, "a", &["--threads", "1"]).assert_code(0);
    run(&sb, &pipeline, &input, "b", &["--threads", "2"]).assert_code(0);
    run(&sb, &pipeline, &input, "c", &["--threads", "2"]).assert_code(0);
    let bytes = |d: &str| std::fs::read(sb.path().join(d).join("cleaned.parquet")).unwrap();
    assert_eq!(bytes("a"), bytes("b"));
    assert_eq!(bytes("b"), bytes("c"));
    // Provenance differs only in wall-clock times and the command line.
    let strip = |d: &str| {
        let mut p = provenance(&sb.path().join(d).join("provenance.jsonl"));
        for k in ["started", "finished", "command_line"] {
            p[0].as_object_mut().unwrap().remove(k);
        }
        p
    };
    assert_eq!(strip("a"), strip("b"));
}

#[test]
fn a_failing_tag_gives_exit_2_and_is_named() {
    let sb = Sandbox::new();
    // TT-* has a range step but no range anywhere: that tag fails, the others run.
    let pipeline = sb.write("p.yaml", PIPELINE.replace("    range: [0, 200]\n", ""));
    let input = input(&sb);
    let r = run(&sb, &pipeline, &input, "out", &[]);
    r.assert_code(2);
    assert!(r.stdout.contains("FAILED    TT-301.PV"), "{r}");
    let p = provenance(&sb.path().join("out/provenance.jsonl"));
    let rec = p.iter().find(|r| r["record"] == "tag" && r["tag"] == "TT-301.PV").unwrap();
    assert_eq!(rec["outcome"], "failed");
    assert!(rec["error"].as_str().unwrap().contains("no range"));
    assert_eq!(p[0]["tags_failed"][0]["tag"], "TT-301.PV");
    // Its rows are written with their raw readings.
    let c = read_cleaned(&sb.path().join("out/cleaned.parquet"));
    let rows: Vec<usize> = (0..c.tag.len()).filter(|&r| c.tag[r] == "TT-301.PV").collect();
    assert_eq!(rows.len(), 60);
    assert!(rows.iter().all(|&r| c.status[r] == "ok" && c.value[r] == c.raw[r]));
}

#[test]
fn bad_configuration_or_input_writes_nothing_and_keeps_earlier_outputs() {
    let sb = Sandbox::new();
    let pipeline = sb.write("p.yaml", PIPELINE);
    let input = input(&sb);
    run(&sb, &pipeline, &input, "out", &[]).assert_code(0);
    let before = std::fs::read(sb.path().join("out/cleaned.parquet")).unwrap();

    // Unknown step: exit 1, naming the file and line.
    let bad = sb.write("bad.yaml", PIPELINE.replace("steps: [quality, range]", "steps: [quality, rnage]"));
    let r = run(&sb, &bad, &input, "out", &[]);
    r.assert_code(1).assert_stderr_has("bad.yaml:").assert_stderr_has("rnage");
    // YAML syntax error: exit 1.
    let broken = sb.write("broken.yaml", "version: 1\nrules: [\n");
    run(&sb, &broken, &input, "out", &[]).assert_code(1).assert_stderr_has("broken.yaml");
    // Corrupt input: exit 3.
    let corrupt = sb.write("corrupt.parquet", b"PAR1 this is not parquet PAR1");
    run(&sb, &pipeline, &corrupt, "out", &[]).assert_code(3).assert_stderr_has("corrupt.parquet");
    // Missing input: exit 3.
    run(&sb, &pipeline, &sb.path().join("nope.csv"), "out", &[]).assert_code(3);
    // The earlier run's outputs are untouched and nothing half-written is left.
    assert_eq!(std::fs::read(sb.path().join("out/cleaned.parquet")).unwrap(), before);
    let leftovers: Vec<String> = std::fs::read_dir(sb.path().join("out"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n != "cleaned.parquet" && n != "provenance.jsonl")
        .collect();
    assert!(leftovers.is_empty(), "left behind: {leftovers:?}");
}

#[test]
fn window_and_shift_select_rows() {
    let sb = Sandbox::new();
    let pipeline = sb.write("p.yaml", PIPELINE);
    let input = input(&sb);
    // T0 is 2026-03-01T06:00:00Z; keep [06:01:00, 06:02:00).
    let r = run(&sb, &pipeline, &input, "w", &["--from", "2026-03-01T06:01:00Z", "--to", "2026-03-01 06:02"]);
    r.assert_code(0);
    let c = read_cleaned(&sb.path().join("w/cleaned.parquet"));
    assert_eq!(c.tag.len(), 4 * 12);
    assert!(c.ts.iter().all(|&t| (T0_US + 60_000_000..T0_US + 120_000_000).contains(&t)));
    let r = run(&sb, &pipeline, &input, "s", &["--shift", "2026-03-01/early"]);
    r.assert_code(0);
    assert!(r.stdout.contains("2026-03-01/early"), "{r}");
    assert_eq!(read_cleaned(&sb.path().join("s/cleaned.parquet")).tag.len(), 4 * 60);
    run(&sb, &pipeline, &input, "x", &["--shift", "2026-03-01/lunch"]).assert_code(1).assert_stderr_has("early");
}

#[test]
fn check_lists_what_each_rule_selects() {
    let sb = Sandbox::new();
    let pipeline = sb.write("p.yaml", PIPELINE);
    let input = input(&sb);
    let r = tagwright(["check", "--pipeline", pipeline.to_str().unwrap()]);
    r.assert_code(0);
    assert!(r.stdout.contains("valid"), "{r}");
    let r = tagwright(["check", "--pipeline", pipeline.to_str().unwrap(), "--input", input.to_str().unwrap()]);
    r.assert_code(0);
    assert!(r.stdout.contains("FT-101.PV") && r.stdout.contains("XX-999"), "{r}");
}

/// Runs a Python check script (the pinned `.venv`) with `args`; it must
/// succeed. Returns its standard output.
fn python_check(sb: &Sandbox, script: &str, args: &[&Path]) -> String {
    let py = sb.write("check.py", script);
    let out = std::process::Command::new(tagwright_tests::python()).arg(&py).args(args).output().unwrap();
    assert!(out.status.success(), "{}\n{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// The cleaned file reads back in pyarrow and polars (PyPI, pinned in
/// tests/python-requirements.txt) with the contract's types.
#[test]
fn cleaned_parquet_reads_back_in_pyarrow_and_polars() {
    let sb = Sandbox::new();
    let pipeline = sb.write("p.yaml", PIPELINE);
    let input = input(&sb);
    run(&sb, &pipeline, &input, "out", &[]).assert_code(0);
    let script = r#"
import sys
import pyarrow as pa, pyarrow.parquet as pq, polars as pl
path = sys.argv[1]
t = pq.read_table(path)
s = t.schema
assert s.names == ["tag", "ts", "raw", "value", "std", "status", "fault"], s.names
assert pa.types.is_dictionary(s.field("tag").type) and pa.types.is_string(s.field("tag").type.value_type), s.field("tag").type
assert s.field("ts").type == pa.timestamp("us", tz="UTC"), s.field("ts").type
for c in ["raw", "value", "std"]:
    assert s.field(c).type == pa.float64(), (c, s.field(c).type)
assert set(t.column("status").to_pylist()) == {"ok", "rejected"}
df = pl.read_parquet(path)
assert df.schema["ts"] == pl.Datetime("us", "UTC"), df.schema["ts"]
assert df.schema["value"] == pl.Float64
assert df.height == 240, df.height
rej = df.filter(pl.col("status") == "rejected")
assert rej["value"].null_count() == rej.height
assert set(df["fault"].drop_nulls().unique().to_list()) == {"range", "bad_quality"}
print("ok", df.height)
"#;
    let stdout = python_check(&sb, script, &[&sb.path().join("out/cleaned.parquet")]);
    assert!(stdout.starts_with("ok 240"));
}

/// A file without a single fault (its `fault` column chunk has no value, so
/// no dictionary: data pages of definition levels only) and tags longer
/// than a page read back in pyarrow and polars (PyPI).
#[test]
fn a_file_without_faults_reads_back_in_pyarrow_and_polars() {
    let sb = Sandbox::new();
    let mut text = String::from("tag,ts,value\n");
    for tag in ["FT-1.PV", "FT-2.PV"] {
        for i in 0..25_000i64 {
            text.push_str(&format!("{tag},{},{}\n", rfc3339(T0_US + i * 1_000_000), 20.0 + (i % 13) as f64));
        }
    }
    let input = sb.write("in.csv", text);
    let pipeline = sb.write(
        "p.yaml",
        "version: 1\nsite: {timezone: UTC}\ninput: {format: long, columns: {tag: tag, time: ts, value: value}}\nrules:\n  - tags: \"*\"\n    steps: [quality]\n",
    );
    run(&sb, &pipeline, &input, "out", &[]).assert_code(0);
    let script = r#"
import sys
import pyarrow.parquet as pq, polars as pl
path = sys.argv[1]
t = pq.read_table(path)
assert t.num_rows == 50000 and t.column("fault").null_count == 50000, (t.num_rows, t.column("fault").null_count)
assert t.column("status").to_pylist() == ["ok"] * 50000
tags = t.column("tag").to_pylist()
assert tags == ["FT-1.PV"] * 25000 + ["FT-2.PV"] * 25000
df = pl.read_parquet(path)
assert df["fault"].null_count() == 50000 and df["tag"].cast(pl.Utf8).to_list() == tags
print("ok")
"#;
    python_check(&sb, script, &[&sb.path().join("out/cleaned.parquet")]);
}

/// The demo through the whole chain: every status and every fault kind
/// appears, filled and replaced rows carry an estimate and its std, and every
/// changed or flagged row belongs to exactly one provenance event.
#[test]
fn the_demo_shows_every_status_and_fault_with_one_event_per_change() {
    let sb = Sandbox::new();
    let out = sb.path().join("demo");
    let r = tagwright(["demo", "--out", out.to_str().unwrap()]);
    r.assert_code(0);
    assert!(r.stdout.contains("IEC 61511"), "{r}");
    let c = read_cleaned(&out.join("run/cleaned.parquet"));
    for s in ["ok", "filled", "replaced", "rejected"] {
        assert!(c.status.iter().any(|x| x == s), "no `{s}` row");
    }
    for f in ["spike", "stuck", "step", "drift", "noise", "range", "bad_quality"] {
        assert!(c.fault.iter().any(|x| x.as_deref() == Some(f)), "no `{f}` row");
    }
    let mut with_estimate = 0;
    for i in 0..c.tag.len() {
        match c.status[i].as_str() {
            "replaced" => assert!(c.value[i].is_some() && c.std[i].is_some(), "row {i}"),
            "rejected" => assert!(c.value[i].is_none(), "row {i}"),
            "filled" => {
                assert!(c.raw[i].is_none() && c.fault[i].is_none(), "row {i}");
                with_estimate += usize::from(c.value[i].is_some());
            }
            _ => {}
        }
    }
    assert!(with_estimate > 1000);
    let changed = (0..c.tag.len()).filter(|&i| c.status[i] != "ok" || c.fault[i].is_some()).count();
    let recs = provenance(&out.join("run/provenance.jsonl"));
    let in_events: u64 = recs.iter().filter(|r| r["record"] == "event").map(|r| r["rows"].as_u64().unwrap()).sum();
    assert_eq!(in_events as usize, changed);
    // The drifting transmitter is named with its bias at the end.
    let tt = recs.iter().find(|r| r["record"] == "tag" && r["tag"] == "TT-3105B.PV").unwrap();
    let bias = tt["extra"]["drift"]["bias_end"].as_f64().unwrap();
    assert!((bias - 2.1).abs() < 0.2, "{bias}");

    // Other decoders read the dictionary columns (written from runs of keys,
    // in pages of 20,000 rows) as this one does: rows per (tag, status,
    // fault) from pyarrow and polars (PyPI) against arrow-rs above, and a
    // filter on one tag, pushed down by pyarrow, returns that tag's rows.
    let mut tally: std::collections::BTreeMap<String, u64> = Default::default();
    for i in 0..c.tag.len() {
        *tally.entry(format!("{}|{}|{}", c.tag[i], c.status[i], c.fault[i].as_deref().unwrap_or("-"))).or_default() +=
            1;
    }
    let want = sb.write("tally.json", serde_json::to_string(&tally).unwrap());
    let script = r#"
import sys, json, collections
import pyarrow.parquet as pq, polars as pl
path, want = sys.argv[1], json.load(open(sys.argv[2]))
t = pq.read_table(path, columns=["tag", "status", "fault"]).to_pydict()
got = collections.Counter(f"{a}|{b}|{c or '-'}" for a, b, c in zip(t["tag"], t["status"], t["fault"]))
assert dict(got) == want, "pyarrow differs"
df = pl.read_parquet(path, columns=["tag", "status", "fault"]).with_columns(pl.col("fault").cast(pl.Utf8).fill_null("-"))
rows = df.group_by(["tag", "status", "fault"]).len().rows()
assert {f"{a}|{b}|{c}": n for a, b, c, n in rows} == want, "polars differs"
one = pq.read_table(path, filters=[("tag", "==", "FT-3101B.PV")], columns=["tag"])
assert one.num_rows == sum(n for k, n in want.items() if k.startswith("FT-3101B.PV|")), one.num_rows
print("ok", len(want))
"#;
    python_check(&sb, script, &[&out.join("run/cleaned.parquet"), &want]);
}
