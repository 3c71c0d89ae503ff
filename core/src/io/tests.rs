//! Tests of the long-format readers.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::{StringDictionaryBuilder, TimestampNanosecondBuilder};
use arrow_array::types::Int32Type;
use arrow_array::{
    ArrayRef, BinaryArray, Float32Array, Float64Array, Int64Array, RecordBatch, StringArray, TimestampMicrosecondArray,
};
use parquet::arrow::ArrowWriter;
use parquet::file::properties::WriterProperties;
use proptest::prelude::*;

use super::long::parse_time_text;
use super::*;

const T0: i64 = 1_772_344_800_000_000; // 2026-03-01T06:00:00Z

fn write(dir: &Path, name: &str, text: &[u8]) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

fn read(p: &Path, tag: &str) -> Result<TagSamples> {
    read_tag(p, tag, &ColumnMap::default())
}

fn write_parquet(path: &Path, columns: Vec<(&str, ArrayRef)>, max_rows_per_group: usize) {
    let batch = RecordBatch::try_from_iter(columns).unwrap();
    let props = WriterProperties::builder().set_max_row_group_row_count(Some(max_rows_per_group)).build();
    let file = std::fs::File::create(path).unwrap();
    let mut w = ArrowWriter::try_new(file, batch.schema(), Some(props)).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

#[test]
fn time_text_forms() {
    let ok = |s: &str| parse_time_text(s).unwrap();
    assert_eq!(ok("2026-03-01T06:00:00Z"), T0);
    assert_eq!(ok("2026-03-01t06:00:00z"), T0);
    assert_eq!(ok("2026-03-01T07:00:00+01:00"), T0);
    assert_eq!(ok("2026-03-01T06:00:00.25Z"), T0 + 250_000);
    assert_eq!(ok("2026-03-01T06:00:00.0000019Z"), T0 + 1, "ns are floored");
    assert_eq!(ok("2026-03-01T06:00:00"), T0, "naive is UTC");
    assert_eq!(ok("2026-03-01 06:00:00.5"), T0 + 500_000);
    assert_eq!(ok("1772344800"), T0);
    assert_eq!(ok("-1"), -1_000_000);
    for bad in
        ["", "2026-03-01", "2026-03-01 25:00:00", "06:00:00", "1772344800.5", "99999999999999999999", "yesterday"]
    {
        assert!(parse_time_text(bad).is_err(), "{bad:?} should be rejected");
    }
}

#[test]
fn period_is_the_median_spacing() {
    assert_eq!(infer_period_us(&[]), None);
    assert_eq!(infer_period_us(&[5]), None);
    assert_eq!(infer_period_us(&[0, 5, 10, 30, 35]), Some(5));
    assert_eq!(infer_period_us(&[0, 5, 15, 30]), Some(10));
    assert_eq!(infer_period_us(&[0, 10, 15, 20]), Some(5), "lower median");
    // Spacings beyond i64::MAX count as i64::MAX.
    assert_eq!(infer_period_us(&[i64::MIN, i64::MAX]), Some(i64::MAX));
    assert_eq!(infer_period_us(&[i64::MIN, -10, -5, 0, i64::MAX]), Some(5));
    assert_eq!(infer_period_us(&[i64::MIN, 0, 1, i64::MAX]), Some(i64::MAX - 1));
}

#[test]
fn csv_rules_sort_skip_and_count() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "a.csv",
        b"tag,ts,value,quality\n\
          A,2026-03-01T06:00:10Z,3,192\n\
          B,not a time,x,0\n\
          A, 2026-03-01T06:00:00Z ,1,192\n\
          A,2026-03-01T06:00:05Z,NaN,192\n\
          A,1772344815,inf,192\n\
          A,2026-03-01T06:00:20Z,,192\n",
    );
    let s = read(&p, "A").unwrap();
    assert_eq!(s.ts_us, [0, 5, 10, 15, 20].map(|k| T0 + k * 1_000_000).to_vec());
    assert_eq!(s.values[0], 1.0);
    assert_eq!(s.values[2], 3.0);
    assert_eq!(s.n_missing(), 3);
    assert_eq!(s.stats, ReadStats { rows_read: 6, n_null: 1, n_non_finite: 2, n_out_of_order: 1 });
}

#[test]
fn csv_errors_name_row_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let err = |name: &str, text: &[u8]| read(&write(d, name, text), "A").unwrap_err().to_string();

    let e = err("v.csv", b"tag,ts,value\nA,1,1\nA,2,1.2.3\n");
    assert!(e.contains("v.csv: row 3, column `value`: value `1.2.3`"), "{e}");
    let e = err("t.csv", b"tag,ts,value\nA,1,1\nA,2,2\nA,tomorrow,3\n");
    assert!(e.contains("row 4, column `ts`: bad time `tomorrow`"), "{e}");
    let e = err("n.csv", b"tag,ts,value\nA,1,1\nA,2\n");
    assert!(e.contains("row 3: has 2 fields where the header has 3"), "{e}");
    let e = err("u.csv", b"tag,ts,value\nA,1,1\nA,2,\xb0C\n");
    assert!(e.contains("row 3, column `value`: not valid UTF-8"), "{e}");
    let e = err("d.csv", b"tag,ts,value\nA,5,1\nB,5,1\nA,7,1\nA,5,2\n");
    assert!(e.contains("tag `A` has two samples at 1970-01-01T00:00:05Z (rows 2 and 5)"), "{e}");
    let e = err("m.csv", b"tag,time,value\nA,1,1\n");
    assert!(e.contains("no time column `ts`; the columns present are: tag, time, value"), "{e}");
    let e = err("e.csv", b"");
    assert!(e.contains("e.csv: the file is empty (0 bytes)"), "{e}");
    let e = err("h.csv", b"tag,ts,value\n");
    assert!(e.contains("the file is empty (no data rows)"), "{e}");
    let mut many = String::from("tag,ts,value\n");
    for i in (0..12).rev() {
        many += &format!("T{i:02},1,1\nT{i:02},2,1\n");
    }
    let e = err("x.csv", many.as_bytes());
    assert!(
        e.contains("tag `A` not found in column `tag`; the file has 12 tags, the first 10 being: T00, T01,"),
        "{e}"
    );
    assert!(e.contains("T09") && !e.contains("T10"), "{e}");
    let e = read(&d.join("missing.csv"), "A").unwrap_err().to_string();
    assert!(e.ends_with("missing.csv: file not found"), "{e}");
    let e = read(&d.join("x.xlsx"), "A").unwrap_err().to_string();
    assert!(e.contains("unknown input format `.xlsx`"), "{e}");
}

#[test]
fn parquet_types_projection_and_rows() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("a.parquet");
    let mut tags = StringDictionaryBuilder::<Int32Type>::new();
    let mut ts = TimestampNanosecondBuilder::new();
    let rows: [(&str, Option<i64>); 5] = [("B", Some(0)), ("A", Some(10)), ("A", Some(0)), ("B", None), ("A", Some(5))];
    for (t, s) in rows {
        tags.append_value(t);
        ts.append_option(s.map(|s| T0 * 1000 + s * 1_000_000_000 + 999));
    }
    let ts = ts.finish().with_timezone("+01:00");
    let values = Float32Array::from(vec![Some(9.0), Some(3.0), Some(1.0), None, None]);
    // A column of a type the reader cannot use, which projection never decodes.
    let blob = BinaryArray::from_vec(vec![b"x", b"y", b"z", b"w", b"v"]);
    write_parquet(
        &p,
        vec![
            ("blob", Arc::new(blob) as ArrayRef),
            ("value", Arc::new(values)),
            ("ts", Arc::new(ts)),
            ("tag", Arc::new(tags.finish())),
        ],
        2,
    );
    let s = read(&p, "A").unwrap();
    assert_eq!(s.ts_us, [T0, T0 + 5_000_000, T0 + 10_000_000]);
    assert_eq!(s.values[0], 1.0);
    assert!(s.values[1].is_nan());
    assert_eq!(s.values[2], 3.0);
    assert_eq!(s.stats.rows_read, 5);
    assert_eq!(s.stats.n_out_of_order, 1);
    // Row 4 is B's and has a null time: skipped, not an error.
    let e = read(&p, "C").unwrap_err().to_string();
    assert!(e.contains("the tags present are: A, B"), "{e}");
}

#[test]
fn parquet_errors() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let tag = |n: usize| Arc::new(StringArray::from(vec!["A"; n])) as ArrayRef;
    let p = d.join("types.parquet");
    write_parquet(
        &p,
        vec![
            ("tag", tag(2)),
            ("ts", Arc::new(Int64Array::from(vec![1, 2]))),
            ("value", Arc::new(StringArray::from(vec!["1", "2"]))),
        ],
        100,
    );
    let e = read(&p, "A").unwrap_err().to_string();
    assert!(e.contains("column `value` has type Utf8; as the value column it must be numeric"), "{e}");

    let p = d.join("null_time.parquet");
    write_parquet(
        &p,
        vec![
            ("tag", tag(3)),
            ("ts", Arc::new(TimestampMicrosecondArray::from(vec![Some(1), Some(2), None]))),
            ("value", Arc::new(Float64Array::from(vec![1.0, 2.0, 3.0]))),
        ],
        2,
    );
    let e = read(&p, "A").unwrap_err().to_string();
    assert!(e.contains("row 3, column `ts`: bad time `null`"), "{e}");

    let p = d.join("overflow.parquet");
    write_parquet(
        &p,
        vec![
            ("tag", tag(1)),
            ("ts", Arc::new(Int64Array::from(vec![i64::MAX / 10]))),
            ("value", Arc::new(Float64Array::from(vec![1.0]))),
        ],
        2,
    );
    let e = read(&p, "A").unwrap_err().to_string();
    assert!(e.contains("row 1, column `ts`") && e.contains("out of range"), "{e}");

    let p = d.join("cols.pq");
    write_parquet(&p, vec![("tag", tag(1)), ("time", Arc::new(Int64Array::from(vec![1])))], 2);
    let e = read(&p, "A").unwrap_err().to_string();
    assert!(e.contains("no time column `ts`; the columns present are: tag, time"), "{e}");

    let p = write(d, "garbage.parquet", b"tag,ts,value\nA,1,1\n");
    let e = read(&p, "A").unwrap_err().to_string();
    assert!(e.contains("not a Parquet file, or the file is damaged"), "{e}");
}

/// Damaged Parquet files give errors, never panics: every byte of a small
/// file overwritten in turn, and every truncation.
#[test]
fn damaged_parquet_never_panics() {
    let dir = tempfile::tempdir().unwrap();
    let good = dir.path().join("good.parquet");
    let n = 40;
    write_parquet(
        &good,
        vec![
            (
                "tag",
                Arc::new(StringArray::from_iter_values((0..n).map(|i| if i % 3 == 0 { "B" } else { "A" }))) as ArrayRef,
            ),
            ("ts", Arc::new(TimestampMicrosecondArray::from_iter_values((0..n).map(|i| T0 + i * 1_000_000)))),
            ("value", Arc::new(Float64Array::from_iter_values((0..n).map(|i| i as f64)))),
        ],
        16,
    );
    let bytes = std::fs::read(&good).unwrap();
    let bad = dir.path().join("bad.parquet");
    let (mut errors, mut oks) = (0, 0);
    for len in 0..bytes.len() {
        std::fs::write(&bad, &bytes[..len]).unwrap();
        assert!(read(&bad, "A").is_err(), "truncated to {len} bytes");
    }
    for i in 0..bytes.len() {
        for flip in [0xFFu8, 0x01] {
            let mut b = bytes.clone();
            b[i] ^= flip;
            std::fs::write(&bad, &b).unwrap();
            match read(&bad, "A") {
                Ok(_) => oks += 1,
                Err(_) => errors += 1,
            }
        }
    }
    assert!(errors > 0 && oks > 0, "errors {errors}, oks {oks}");
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(32))]

    /// The regular-tag fast path gives the lower median of the positive
    /// spacings, as sorting them does (spacings drawn mostly from one value,
    /// so both branches are taken).
    #[test]
    fn period_fast_path_is_the_median(steps in prop::collection::vec(prop_oneof![4 => Just(5i64), 1 => -3i64..20], 0..40)) {
        let mut ts = vec![0i64];
        for s in &steps {
            ts.push(ts[ts.len() - 1] + s);
        }
        ts.sort();
        let mut d: Vec<i64> = ts.windows(2).map(|w| w[1] - w[0]).filter(|&d| d > 0).collect();
        d.sort();
        let want = (!d.is_empty()).then(|| d[(d.len() - 1) / 2]);
        prop_assert_eq!(infer_period_us(&ts), want);
    }

    /// A Parquet round trip returns the tag's samples, sorted.
    #[test]
    fn parquet_round_trip(rows in prop::collection::btree_map(-1_000_000_000i64..1_000_000_000, (0usize..3, -1e6f64..1e6), 1..60)) {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("r.parquet");
        // Reverse the time order to exercise the sort.
        let rows: Vec<(i64, (usize, f64))> = rows.into_iter().rev().collect();
        let names = ["A", "B", "C"];
        write_parquet(
            &p,
            vec![
                ("tag", Arc::new(StringArray::from_iter_values(rows.iter().map(|r| names[r.1 .0]))) as ArrayRef),
                ("ts", Arc::new(TimestampMicrosecondArray::from_iter_values(rows.iter().map(|r| r.0)).with_timezone("UTC"))),
                ("value", Arc::new(Float64Array::from_iter_values(rows.iter().map(|r| r.1 .1)))),
            ],
            7,
        );
        let mut want: Vec<(i64, f64)> = rows.iter().filter(|r| r.1 .0 == 0).map(|r| (r.0, r.1 .1)).collect();
        want.sort_by_key(|w| w.0);
        match read(&p, "A") {
            Ok(s) => {
                prop_assert_eq!(s.ts_us, want.iter().map(|w| w.0).collect::<Vec<_>>());
                prop_assert_eq!(s.values, want.iter().map(|w| w.1).collect::<Vec<_>>());
            }
            Err(IoError::TagNotFound { .. }) => prop_assert!(want.is_empty()),
            Err(e) => prop_assert!(false, "{}", e),
        }
    }
}
