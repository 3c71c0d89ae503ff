//! Bad inputs made by the tests themselves: Parquet bytes (damaged,
//! truncated, wrong types) and command lines. Text inputs are in `tests/corpus/`.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::{ArrayRef, Float64Array, TimestampMicrosecondArray};
use tagwright::io::{read_tag, ColumnMap};
use tagwright::rng::Rng;
use tagwright_tests::{fit, floats, strings, tagwright, write_parquet, Sandbox, T0_US};

const TAG: &str = "FT-101.PV";

/// A valid Parquet file: two tags, 60 samples each, every 5 s.
fn good_parquet(dir: &Path, name: &str) -> PathBuf {
    let n = 120;
    let path = dir.join(name);
    write_parquet(
        &path,
        vec![
            ("tag", strings((0..n).map(|i| if i % 2 == 0 { TAG } else { "TT-204.PV" }))),
            ("ts", Arc::new(TimestampMicrosecondArray::from_iter_values((0..n).map(|i| T0_US + (i / 2) * 5_000_000)))),
            ("value", floats((0..n).map(|i| 50.0 + ((i * 37) % 11) as f64 * 0.3))),
        ],
    );
    path
}

#[test]
fn good_parquet_fits() {
    let sb = Sandbox::new();
    fit(&good_parquet(sb.path(), "good.parquet"), TAG, "local-level", &["--json"]).assert_code(0);
}

#[test]
fn missing_file() {
    let sb = Sandbox::new();
    let path = sb.path().join("nowhere.parquet");
    fit(&path, TAG, "local-level", &[]).assert_code(3).assert_stderr_has("nowhere.parquet: file not found");
}

#[test]
fn garbage_bytes_are_not_parquet() {
    let sb = Sandbox::new();
    let mut rng = Rng::new(3);
    let bytes: Vec<u8> = (0..2000).map(|_| rng.next_u64() as u8).collect();
    let path = sb.write("garbage.parquet", bytes);
    fit(&path, TAG, "local-level", &[])
        .assert_code(3)
        .assert_stderr_has("garbage.parquet: not a Parquet file, or the file is damaged or truncated");
}

#[test]
fn truncated_parquet() {
    let sb = Sandbox::new();
    let bytes = std::fs::read(good_parquet(sb.path(), "good.parquet")).unwrap();
    for (name, len) in [("half.parquet", bytes.len() / 2), ("last_byte_lost.parquet", bytes.len() - 1)] {
        let path = sb.write(name, &bytes[..len]);
        fit(&path, TAG, "local-level", &[])
            .assert_code(3)
            .assert_stderr_has(&format!("{name}: not a Parquet file, or the file is damaged or truncated"));
    }
}

/// Some damaged footers make the Parquet decoder panic; the reader turns
/// that into an ordinary error, and no panic message reaches stderr.
#[test]
fn damaged_footer_gives_an_error_not_a_panic() {
    let sb = Sandbox::new();
    let bytes = std::fs::read(good_parquet(sb.path(), "good.parquet")).unwrap();
    let probe = sb.path().join("probe.parquet");
    // Find a one-byte change that reaches a panic inside the decoder.
    let found = (0..bytes.len()).rev().find_map(|i| {
        let mut b = bytes.clone();
        b[i] ^= 0xFF;
        std::fs::write(&probe, &b).unwrap();
        match read_tag(&probe, TAG, &ColumnMap::default()) {
            Err(e) if e.to_string().contains("the Parquet decoder failed") => Some(b),
            _ => None,
        }
    });
    let Some(damaged) = found else {
        // A decoder that no longer panics on any of these files is fine too.
        return;
    };
    let path = sb.write("damaged.parquet", damaged);
    let run = fit(&path, TAG, "local-level", &[]);
    run.assert_code(3).assert_stderr_has("damaged.parquet: not a Parquet file, or the file is damaged");
    assert!(!run.stderr.contains("panicked"), "{run}");
}

#[test]
fn wrong_column_types() {
    let sb = Sandbox::new();
    let ts = || Arc::new(TimestampMicrosecondArray::from(vec![T0_US, T0_US + 5_000_000])) as ArrayRef;
    let path = sb.path().join("value_text.parquet");
    write_parquet(&path, vec![("tag", strings([TAG, TAG])), ("ts", ts()), ("value", strings(["1.5", "2.5"]))]);
    fit(&path, TAG, "local-level", &[])
        .assert_code(3)
        .assert_stderr_has("value_text.parquet: column `value` has type Utf8; as the value column it must be numeric");

    let path = sb.path().join("time_float.parquet");
    write_parquet(&path, vec![("tag", strings([TAG, TAG])), ("ts", floats([1.0, 2.0])), ("value", floats([1.0, 2.0]))]);
    fit(&path, TAG, "local-level", &[])
        .assert_code(3)
        .assert_stderr_has("column `ts` has type Float64; as the time column it must be a timestamp");

    let path = sb.path().join("tag_number.parquet");
    write_parquet(&path, vec![("tag", floats([1.0, 2.0])), ("ts", ts()), ("value", floats([1.0, 2.0]))]);
    fit(&path, TAG, "local-level", &[]).assert_code(3).assert_stderr_has("column `tag` has type Float64");
}

#[test]
fn missing_parquet_column_lists_the_columns() {
    let sb = Sandbox::new();
    let path = sb.path().join("renamed.parquet");
    write_parquet(
        &path,
        vec![
            ("tag", strings([TAG])),
            ("time", Arc::new(TimestampMicrosecondArray::from(vec![T0_US]))),
            ("value", Arc::new(Float64Array::from(vec![1.0]))),
        ],
    );
    fit(&path, TAG, "local-level", &[])
        .assert_code(3)
        .assert_stderr_has("renamed.parquet: no time column `ts`; the columns present are: tag, time, value");
}

#[test]
fn duplicate_time_in_parquet_names_time_and_rows() {
    let sb = Sandbox::new();
    let path = sb.path().join("dup.parquet");
    let t = [T0_US, T0_US + 5_000_000, T0_US + 10_000_000, T0_US + 5_000_000];
    write_parquet(
        &path,
        vec![
            ("tag", strings([TAG; 4])),
            ("ts", Arc::new(TimestampMicrosecondArray::from(t.to_vec()))),
            ("value", floats([1.0, 2.0, 3.0, 4.0])),
        ],
    );
    fit(&path, TAG, "local-level", &[])
        .assert_code(3)
        .assert_stderr_has("tag `FT-101.PV` has two samples at 2026-03-01T06:00:05Z (rows 2 and 4)");
}

#[test]
fn unknown_tag_lists_the_first_ten() {
    let sb = Sandbox::new();
    let path = sb.path().join("many.parquet");
    let tags: Vec<String> = (0..15).map(|i| format!("TT-{:03}.PV", 200 + i)).collect();
    write_parquet(
        &path,
        vec![
            ("tag", strings(tags.iter().rev().map(String::as_str))),
            ("ts", Arc::new(TimestampMicrosecondArray::from_iter_values((0..15).map(|i| T0_US + i)))),
            ("value", floats((0..15).map(|i| i as f64))),
        ],
    );
    let run = fit(&path, "TT-999.PV", "local-level", &[]);
    run.assert_code(1).assert_stderr_has(
        "many.parquet: tag `TT-999.PV` not found in column `tag`; the file has 15 tags, the first 10 being: TT-200.PV, TT-201.PV,",
    );
    assert!(run.stderr.contains("TT-209.PV") && !run.stderr.contains("TT-210.PV"), "{run}");
}

#[test]
fn command_line_errors_are_usage_errors() {
    let sb = Sandbox::new();
    let path = good_parquet(sb.path(), "good.parquet");
    let input = path.to_str().unwrap();
    tagwright(["fit", "--input", input, "--tag", TAG]).assert_code(1).assert_stderr_has("--model <SPEC>");
    tagwright(["fit", "--input", input, "--tag", TAG, "--model", "local-level", "--period", "-5"])
        .assert_code(1)
        .assert_stderr_has("--period");
    tagwright(["fit", "--input", input, "--tag", TAG, "--model", "local-level", "--period", "fast"])
        .assert_code(1)
        .assert_stderr_has("`fast` is not a number of seconds");
    tagwright(["fit", "--input", input, "--tag", TAG, "--model", "local-level", "--colour"]).assert_code(1);
    tagwright(["frobnicate"]).assert_code(1);
    tagwright(Vec::<&str>::new()).assert_code(1);
    let help = tagwright(["fit", "--help"]);
    help.assert_code(0);
    assert!(help.stdout.contains("--model <SPEC>"), "{help}");
    // A spec the library rejects, and a spec that parses but has nothing to fit.
    fit(&path, TAG, "arma(11,0)", &[]).assert_code(1).assert_stderr_has("--model: ARMA order (11,0) exceeds the cap");
    fit(&path, TAG, "const", &[]).assert_code(1).assert_stderr_has("cannot be fitted");
}
