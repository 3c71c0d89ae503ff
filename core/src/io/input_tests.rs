//! Tests of [`InputSet`]: formats, times and zones, quality codings,
//! duplicates, windows, streaming reads and bad input.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::StringDictionaryBuilder;
use arrow_array::types::Int32Type;
use arrow_array::{
    ArrayRef, BooleanArray, Float64Array, Int32Array, Int64Array, RecordBatch, StringArray, TimestampMicrosecondArray,
    TimestampMillisecondArray, TimestampNanosecondArray, TimestampSecondArray, UInt32Array, UInt8Array,
};
use parquet::arrow::ArrowWriter;
use parquet::file::properties::WriterProperties;
use proptest::prelude::*;

use super::long_pq::selection;
use super::*;
use crate::pipeline::{ColumnNames, DuplicateRule, EpochUnit, InputFormat, InputSpec, QualityCoding};
use crate::series::Quality;

const T0: i64 = 1_772_344_800_000_000; // 2026-03-01T06:00:00Z
const S: i64 = 1_000_000;

fn spec() -> InputSpec {
    InputSpec {
        format: InputFormat::Long,
        columns: ColumnNames::default(),
        epoch_unit: EpochUnit::Seconds,
        quality: QualityCoding::Auto,
        duplicates: DuplicateRule::KeepBest,
    }
}

fn with_quality(mut s: InputSpec) -> InputSpec {
    s.columns.quality = Some("quality".into());
    s
}

fn wide_spec() -> InputSpec {
    InputSpec { format: InputFormat::Wide, ..spec() }
}

fn utc(s: &str) -> i64 {
    chrono::DateTime::parse_from_rfc3339(s).unwrap().timestamp_micros()
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

fn write_parquet(path: &Path, columns: Vec<(&str, ArrayRef)>, rows_per_group: usize) {
    let batch = RecordBatch::try_from_iter(columns).unwrap();
    let props = WriterProperties::builder()
        .set_max_row_group_row_count(Some(rows_per_group))
        .set_data_page_row_count_limit(3)
        .set_write_batch_size(3)
        .build();
    let file = std::fs::File::create(path).unwrap();
    let mut w = ArrowWriter::try_new(file, batch.schema(), Some(props)).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

fn open_with(paths: &[PathBuf], spec: &InputSpec, tz: chrono_tz::Tz, window: Option<(i64, i64)>) -> Result<InputSet> {
    InputSet::open(paths, InputOptions { spec, tz, window })
}

fn open(paths: &[PathBuf], spec: &InputSpec) -> Result<InputSet> {
    open_with(paths, spec, chrono_tz::UTC, None)
}

fn read_all(set: &InputSet) -> Vec<crate::series::TagSeries> {
    set.read_tags(set.tags()).unwrap()
}

fn one(set: &InputSet, tag: &str) -> crate::series::TagSeries {
    set.read_tags(&[tag.to_string()]).unwrap().remove(0)
}

fn err(r: Result<impl std::fmt::Debug>) -> String {
    r.unwrap_err().to_string()
}

#[test]
fn long_csv_rules_sort_count_and_quality_words() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "shift.csv",
        "tag,ts,value,quality\n\
         FT-101.PV,2026-03-01 07:00:10,3,Good\n\
         FT-101.PV,2026-03-01T07:00:00,1,good\n\
         FT-101.PV,2026-03-01T06:00:05Z,NaN,ok\n\
         FT-101.PV,2026-03-01T07:00:15+01:00,inf,Questionable\n\
         FT-101.PV,1772344820,,BAD\n\
         TT-204.PV,2026-03-01 07:00:00,81,uncertain\n",
    );
    let set = open_with(std::slice::from_ref(&p), &with_quality(spec()), chrono_tz::Europe::Berlin, None).unwrap();
    assert_eq!(set.tags(), ["FT-101.PV", "TT-204.PV"]);
    assert!(set.is_streaming());
    assert_eq!(set.files()[0].rows, 6);
    assert_eq!(set.files()[0].sha256.len(), 64);
    // Hashed aside: read first, the same hash when awaited.
    let opts = InputOptions { spec: &with_quality(spec()), tz: chrono_tz::Europe::Berlin, window: None };
    let mut aside = InputSet::open_hashing_aside(std::slice::from_ref(&p), opts).unwrap();
    assert_eq!(one(&aside, "TT-204.PV").values, [81.0]);
    aside.finish_hashing().unwrap();
    aside.finish_hashing().unwrap();
    assert_eq!(aside.files(), set.files());
    let s = one(&set, "FT-101.PV");
    assert_eq!(s.ts_us, [0, 5, 10, 15, 20].map(|k| T0 + k * S));
    assert_eq!(s.values[0], 1.0);
    assert_eq!(s.values[2], 3.0);
    assert!(s.values[1].is_nan() && s.values[3].is_nan() && s.values[4].is_nan());
    use Quality::*;
    assert_eq!(s.quality, [Good, Bad, Good, Bad, Bad], "non-finite values are bad");
    assert_eq!(s.counts, ReadCounts { rows: 5, out_of_order: 1, duplicates: 0, non_finite: 3 });
    let t = one(&set, "TT-204.PV");
    assert_eq!((t.ts_us[0], t.quality[0]), (T0, Uncertain));
}

#[test]
fn berlin_autumn_repeated_hour_in_a_csv() {
    let dir = tempfile::tempdir().unwrap();
    // Two tags interleaved: the rule is per tag, in file order.
    let p = write(
        dir.path(),
        "fallback.csv",
        "tag,ts,value\n\
         A,2026-10-25 01:30:00,1\n\
         A,2026-10-25 02:00:00,2\n\
         B,2026-10-25 02:30:00,20\n\
         A,2026-10-25 02:30:00,3\n\
         A,2026-10-25 02:00:00,4\n\
         B,2026-10-25 02:30:00,21\n\
         A,2026-10-25 02:30:00,5\n\
         A,2026-10-25 03:00:00,6\n",
    );
    let set = open_with(&[p], &spec(), chrono_tz::Europe::Berlin, None).unwrap();
    assert!(!set.is_streaming());
    let a = one(&set, "A");
    let want = ["2026-10-24T23:30:00Z", "2026-10-25T00:00:00Z", "2026-10-25T00:30:00Z", "2026-10-25T01:00:00Z"];
    let want2 = ["2026-10-25T01:30:00Z", "2026-10-25T02:00:00Z"];
    assert_eq!(a.ts_us, want.iter().chain(&want2).map(|s| utc(s)).collect::<Vec<_>>());
    assert_eq!(a.values, [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
    assert_eq!(a.counts.out_of_order, 0);
    let b = one(&set, "B");
    assert_eq!(b.ts_us, [utc("2026-10-25T00:30:00Z"), utc("2026-10-25T01:30:00Z")]);
}

#[test]
fn berlin_spring_gap_names_file_and_row() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(dir.path(), "spring.csv", "tag,ts,value\nA,2026-03-29 01:59:00,1\nA,2026-03-29 02:30:00,2\n");
    let set = open_with(&[p], &spec(), chrono_tz::Europe::Berlin, None).unwrap();
    let e = err(set.read_tags(&["A".into()]));
    assert!(
        e.contains("spring.csv: row 3, column `ts`: bad time `2026-03-29 02:30:00`: local time 2026-03-29 02:30:00 does not exist in Europe/Berlin"),
        "{e}"
    );
}

#[test]
fn parquet_time_units_zones_and_epochs() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let tag = |n: usize| Arc::new(StringArray::from(vec!["A"; n])) as ArrayRef;
    let value = |n: usize| Arc::new(Float64Array::from_iter_values((0..n).map(|i| i as f64))) as ArrayRef;
    let cases: Vec<(&str, ArrayRef, InputSpec)> = vec![
        ("s", Arc::new(TimestampSecondArray::from(vec![T0 / S]).with_timezone("UTC")), spec()),
        ("ms", Arc::new(TimestampMillisecondArray::from(vec![T0 / 1000]).with_timezone("+05:00")), spec()),
        ("us", Arc::new(TimestampMicrosecondArray::from(vec![T0])), spec()), // naive: local (UTC here)
        ("ns", Arc::new(TimestampNanosecondArray::from(vec![T0 * 1000 + 999]).with_timezone("UTC")), spec()),
        (
            "i64ms",
            Arc::new(Int64Array::from(vec![T0 / 1000])),
            InputSpec { epoch_unit: EpochUnit::Milliseconds, ..spec() },
        ),
        ("i32s", Arc::new(Int32Array::from(vec![(T0 / S) as i32])), spec()),
    ];
    for (name, ts, sp) in cases {
        let p = d.join(format!("{name}.parquet"));
        write_parquet(&p, vec![("tag", tag(1)), ("ts", ts), ("value", value(1))], 10);
        let set = open(&[p], &sp).unwrap();
        assert_eq!(one(&set, "A").ts_us, [T0], "{name}");
    }
    // A naive timestamp is a local time in the site's zone.
    let p = d.join("naive.parquet");
    write_parquet(
        &p,
        vec![
            ("tag", tag(1)),
            ("ts", Arc::new(TimestampMicrosecondArray::from(vec![T0 + 3600 * S]))),
            ("value", value(1)),
        ],
        10,
    );
    let set = open_with(&[p], &spec(), chrono_tz::Europe::Berlin, None).unwrap();
    assert_eq!(one(&set, "A").ts_us, [T0]);
}

#[test]
fn parquet_quality_codings() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let n = 4;
    let base = |q: ArrayRef| -> Vec<(&'static str, ArrayRef)> {
        vec![
            ("tag", Arc::new(StringArray::from(vec!["A"; n])) as ArrayRef),
            ("ts", Arc::new(TimestampMicrosecondArray::from_iter_values((0..n as i64).map(|i| T0 + i * S)))),
            ("value", Arc::new(Float64Array::from(vec![1.0; n]))),
            ("quality", q),
        ]
    };
    use Quality::*;
    // Auto on small codes: the OPC byte.
    let p = d.join("byte.parquet");
    write_parquet(&p, base(Arc::new(UInt8Array::from(vec![192, 64, 0, 128]))), 2);
    assert_eq!(one(&open(&[p], &with_quality(spec())).unwrap(), "A").quality, [Good, Uncertain, Bad, Bad]);
    // Auto with a code above 255 anywhere in the file: OPC UA for every row (0 is good).
    let p = d.join("ua.parquet");
    write_parquet(&p, base(Arc::new(UInt32Array::from(vec![0, 0x4000_0000, 0x8000_0000, 0xC000_0000]))), 2);
    assert_eq!(one(&open(&[p], &with_quality(spec())).unwrap(), "A").quality, [Good, Uncertain, Bad, Bad]);
    // The same codes read as OPC bytes when the pipeline says so: an error naming row and value.
    let p = d.join("ua_as_byte.parquet");
    write_parquet(&p, base(Arc::new(UInt32Array::from(vec![192, 192, 0x8000_0000, 0]))), 2);
    let sp = InputSpec { quality: QualityCoding::OpcByte, ..with_quality(spec()) };
    let e = err(open(&[p], &sp).unwrap().read_tags(&["A".into()]));
    assert!(e.contains("row 3, column `quality`: quality code 2147483648 is not an OPC quality byte"), "{e}");
    // A negative code is an error naming the row (found by the first pass for `auto`).
    let p = d.join("neg.parquet");
    write_parquet(&p, base(Arc::new(Int32Array::from(vec![192, 192, 192, -1]))), 2);
    let e = err(open(&[p], &with_quality(spec())));
    assert!(e.contains("neg.parquet: row 4, column `quality`: quality code -1 is negative"), "{e}");
    // Words from a dictionary column.
    let p = d.join("words.parquet");
    let mut q = StringDictionaryBuilder::<Int32Type>::new();
    for w in ["Good", "QUESTIONABLE", "error", "nope"] {
        q.append_value(w);
    }
    write_parquet(&p, base(Arc::new(q.finish())), 10);
    let e = err(open(&[p], &with_quality(spec())).unwrap().read_tags(&["A".into()]));
    assert!(e.contains("words.parquet: row 4, column `quality`: quality `nope` is not a known word"), "{e}");
    // Integers where the pipeline expects words: a type error when opened.
    let p = d.join("int_words.parquet");
    write_parquet(&p, base(Arc::new(Int64Array::from(vec![192; 4]))), 10);
    let sp = InputSpec {
        quality: QualityCoding::Text { good: vec!["valid".into()], uncertain: vec![], bad: vec![] },
        ..with_quality(spec())
    };
    let e = err(open(&[p], &sp));
    assert!(e.contains("column `quality` has type Int64; as the quality column it must be text"), "{e}");
}

#[test]
fn csv_quality_auto_and_errors() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    use Quality::*;
    let p = write(d, "ua.csv", "tag,ts,value,quality\nA,1,1,0\nA,2,1,1073741824\nA,3,1,2147483648\nA,4,1,\n");
    assert_eq!(one(&open(&[p], &with_quality(spec())).unwrap(), "A").quality, [Good, Uncertain, Bad, Bad]);
    let p = write(d, "byte.csv", "tag,ts,value,quality\nA,1,1,192\nA,2,1,0\n");
    assert_eq!(one(&open(&[p], &with_quality(spec())).unwrap(), "A").quality, [Good, Bad]);
    let p = write(d, "neg.csv", "tag,ts,value,quality\nA,1,1,192\nA,2,1,-4\n");
    let e = err(open(&[p], &with_quality(spec())));
    assert!(e.contains("neg.csv: row 3, column `quality`: quality code -4 is negative"), "{e}");
    let p = write(d, "mixed.csv", "tag,ts,value,quality\nA,1,1,good\nA,2,1,192\n");
    let e = err(open(&[p], &with_quality(spec())).unwrap().read_tags(&["A".into()]));
    assert!(e.contains("mixed.csv: row 3, column `quality`: quality `192` is not a known word"), "{e}");
    let p = write(d, "noq.csv", "tag,ts,value\nA,1,1\n");
    let e = err(open(&[p], &with_quality(spec())));
    assert!(e.contains("noq.csv: no quality column `quality`"), "{e}");
}

#[test]
fn duplicates_keep_best_then_last() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let p = write(
        d,
        "dup.csv",
        "tag,ts,value,quality\n\
         A,10,1,192\n\
         A,10,2,64\n\
         A,10,3,192\n\
         A,20,4,0\n\
         A,20,5,64\n\
         A,30,NaN,192\n\
         A,30,6,0\n",
    );
    let s = one(&open(std::slice::from_ref(&p), &with_quality(spec())).unwrap(), "A");
    assert_eq!(s.ts_us, [10 * S, 20 * S, 30 * S]);
    // At 30 s the NaN reading counts as bad, like the 6 after it: the last wins.
    assert_eq!(s.values, [3.0, 5.0, 6.0]);
    assert_eq!(s.counts.duplicates, 4);
    assert_eq!(s.counts.rows, 7);
    let sp = InputSpec { duplicates: DuplicateRule::Error, ..with_quality(spec()) };
    let e = err(open(&[p], &sp).unwrap().read_tags(&["A".into()]));
    assert!(e.contains("dup.csv: tag `A` has two samples at 1970-01-01T00:00:10Z (rows 2 and 3)"), "{e}");
    // Across files, in the order given.
    let p1 = write(d, "one.csv", "tag,ts,value\nA,1,1\nA,2,2\n");
    let p2 = write(d, "two.csv", "tag,ts,value\nA,2,9\nA,3,3\n");
    let s = one(&open(&[p1.clone(), p2.clone()], &spec()).unwrap(), "A");
    assert_eq!(s.values, [1.0, 9.0, 3.0]);
    let s = one(&open(&[p2.clone(), p1.clone()], &spec()).unwrap(), "A");
    assert_eq!(s.values, [1.0, 2.0, 3.0]);
    let sp = InputSpec { duplicates: DuplicateRule::Error, ..spec() };
    let e = err(open(&[p1, p2], &sp).unwrap().read_tags(&["A".into()]));
    assert!(e.contains("tag `A` has two samples at 1970-01-01T00:00:02Z (") && e.contains("one.csv row 3 and "), "{e}");
    assert!(e.contains("two.csv row 2)"), "{e}");
}

#[test]
fn window_keeps_from_inclusive_to_exclusive() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(dir.path(), "w.csv", "tag,ts,value\nA,1,1\nA,2,2\nA,3,3\nA,4,4\nB,9,9\n");
    let set = open_with(&[p], &spec(), chrono_tz::UTC, Some((2 * S, 4 * S))).unwrap();
    assert_eq!(set.tags(), ["A", "B"], "a tag outside the window is still listed");
    let r = read_all(&set);
    assert_eq!(r[0].values, [2.0, 3.0]);
    assert_eq!(r[0].counts.rows, 2);
    assert!(r[1].ts_us.is_empty());
}

/// A long Parquet file sorted by tag, with small row groups and pages.
fn tag_sorted_parquet(path: &Path, tags: &[&str], per_tag: usize, rows_per_group: usize) {
    let mut t = Vec::new();
    let mut ts = Vec::new();
    let mut v = Vec::new();
    for (k, tag) in tags.iter().enumerate() {
        for i in 0..per_tag {
            t.push(*tag);
            ts.push(T0 + i as i64 * S);
            v.push((k * 1000 + i) as f64);
        }
    }
    write_parquet(
        path,
        vec![
            ("tag", Arc::new(StringArray::from(t)) as ArrayRef),
            ("ts", Arc::new(TimestampMicrosecondArray::from(ts).with_timezone("UTC"))),
            ("value", Arc::new(Float64Array::from(v))),
        ],
        rows_per_group,
    );
}

#[test]
fn streaming_parquet_reads_only_asked_runs() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("sorted.parquet");
    let tags = ["AT-1", "FT-1", "FT-2", "LT-1", "PT-1", "TT-1"];
    tag_sorted_parquet(&p, &tags, 7, 5);
    let set = open(&[p], &spec()).unwrap();
    assert!(set.is_streaming());
    assert_eq!(set.tags(), tags);
    let asked: Vec<String> = ["TT-1", "FT-1", "FT-2"].map(String::from).to_vec();
    let r = set.read_tags(&asked).unwrap();
    assert_eq!(r.iter().map(|s| s.tag.as_str()).collect::<Vec<_>>(), ["TT-1", "FT-1", "FT-2"]);
    for s in &r {
        let k = tags.iter().position(|t| *t == s.tag).unwrap();
        assert_eq!(s.values, (0..7).map(|i| (k * 1000 + i) as f64).collect::<Vec<_>>(), "{}", s.tag);
        assert_eq!(s.ts_us.len(), 7);
    }
    // Asked twice: returned twice.
    let r = set.read_tags(&["LT-1".into(), "LT-1".into()]).unwrap();
    assert_eq!(r.len(), 2);
    assert_eq!(r[0], r[1]);
    let e = err(set.read_tags(&["XX-9".into()]));
    assert!(e.contains("tag `XX-9` is not in the input (1 file(s) read)"), "{e}");
}

#[test]
fn interleaved_files_are_cached_and_agree() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let p = d.join("mixed.parquet");
    let n = 30;
    write_parquet(
        &p,
        vec![
            ("tag", Arc::new(StringArray::from_iter_values((0..n).map(|i| ["B", "A", "C"][i % 3]))) as ArrayRef),
            ("ts", Arc::new(TimestampMicrosecondArray::from_iter_values((0..n as i64).map(|i| T0 + i * S)))),
            ("value", Arc::new(Float64Array::from_iter_values((0..n).map(|i| i as f64)))),
        ],
        4,
    );
    let set = open(&[p], &spec()).unwrap();
    assert!(!set.is_streaming());
    let a = one(&set, "A");
    assert_eq!(a.values, (0..10).map(|k| (3 * k + 1) as f64).collect::<Vec<_>>());
    assert_eq!(one(&set, "A"), a, "second read from the cache");
    let csv = write(d, "mixed.csv", "tag,ts,value\nA,1,1\nB,1,5\nA,2,2\n");
    let set = open(&[csv], &spec()).unwrap();
    assert!(!set.is_streaming());
    assert_eq!(one(&set, "A").values, [1.0, 2.0]);
}

#[test]
fn streaming_csv_seeks_to_runs() {
    let dir = tempfile::tempdir().unwrap();
    let mut text = String::from("tag,ts,value\n");
    for (k, t) in ["A", "B \"quoted\"", "C"].iter().enumerate() {
        for i in 0..5 {
            let name = if t.contains('"') { "\"B \"\"q\"\"\nline\"".to_string() } else { t.to_string() };
            text += &format!("{name},{i},{}\n", k * 10 + i);
        }
    }
    let p = write(dir.path(), "runs.csv", &text);
    let set = open(&[p], &spec()).unwrap();
    assert!(set.is_streaming());
    assert_eq!(set.tags()[2], "C");
    let r = set.read_tags(&["C".into(), "A".into()]).unwrap();
    assert_eq!(r[0].values, [20.0, 21.0, 22.0, 23.0, 24.0]);
    assert_eq!(r[1].values, [0.0, 1.0, 2.0, 3.0, 4.0]);
    let b = set.tags()[1].clone();
    assert_eq!(b, "B \"q\"\nline");
    assert_eq!(one(&set, &b).values, [10.0, 11.0, 12.0, 13.0, 14.0]);
    // Errors in a run name the row in the file.
    let p = write(dir.path(), "bad.csv", "tag,ts,value\nA,1,1\nB,1,1\nB,2,x\n");
    let set = open(&[p], &spec()).unwrap();
    assert_eq!(one(&set, "A").values, [1.0]);
    let e = err(set.read_tags(&["B".into()]));
    assert!(e.contains("bad.csv: row 4, column `value`: value `x` is not a number"), "{e}");
}

#[test]
fn a_file_changed_after_opening_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(dir.path(), "c.csv", "tag,ts,value\nA,1,1\n");
    let set = open(std::slice::from_ref(&p), &spec()).unwrap();
    std::fs::write(&p, "tag,ts,value\nA,1,1\nA,2,2\n").unwrap();
    let e = err(set.read_tags(&["A".into()]));
    assert!(e.contains("the file changed after it was opened"), "{e}");
}

#[test]
fn wide_parquet_and_csv() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let p = d.join("wide.parquet");
    write_parquet(
        &p,
        vec![
            ("ts", Arc::new(TimestampSecondArray::from(vec![T0 / S, T0 / S + 5, T0 / S + 10])) as ArrayRef),
            ("FT-101.PV", Arc::new(Float64Array::from(vec![Some(1.0), None, Some(f64::INFINITY)]))),
            ("note", Arc::new(StringArray::from(vec!["a", "b", "c"]))),
            ("XV-3.ST", Arc::new(BooleanArray::from(vec![true, false, true]))),
        ],
        2,
    );
    let set = open_with(&[p], &wide_spec(), chrono_tz::Europe::Berlin, None).unwrap();
    assert!(set.is_streaming());
    assert_eq!(set.tags(), ["FT-101.PV", "XV-3.ST"]);
    let f = one(&set, "FT-101.PV");
    assert_eq!(f.ts_us, [T0 - 3600 * S, T0 - 3600 * S + 10 * S], "naive times are Berlin local; null cells skipped");
    assert_eq!(f.quality, [Quality::Good, Quality::Bad]);
    assert_eq!(f.counts.non_finite, 1);
    assert_eq!(one(&set, "XV-3.ST").values, [1.0, 0.0, 1.0]);

    let p = write(
        d,
        "wide.csv",
        "ts,FT-101.PV,comment,TT-204.PV,EMPTY\n\
         2026-03-01T06:00:00Z,1.5,,,\n\
         2026-03-01T06:00:05Z,,start,80,\n\
         2026-03-01T06:00:10Z,2.5,x,81,\n",
    );
    let set = open(&[p], &wide_spec()).unwrap();
    assert!(!set.is_streaming());
    assert_eq!(set.tags(), ["EMPTY", "FT-101.PV", "TT-204.PV"]);
    let r = read_all(&set);
    assert!(r[0].ts_us.is_empty());
    assert_eq!(r[1].ts_us, [T0, T0 + 10 * S]);
    assert_eq!(r[2].values, [80.0, 81.0]);

    let e = err(open(&[write(d, "w1.csv", "ts,A,A\n1,1,1\n")], &wide_spec()));
    assert!(e.contains("w1.csv: column 3 (`A`): the name is used by an earlier column too"), "{e}");
    let e = err(open(&[write(d, "w2.csv", ",ts,A\n0,1,1\n")], &wide_spec()));
    assert!(e.contains("w2.csv: column 1 (``): has no name"), "{e}");
    let e = err(open(&[write(d, "w3.csv", "ts,A\n1,1\n2,1,5\n")], &wide_spec()));
    assert!(e.contains("w3.csv: row 3: has 3 fields where the header has 2"), "{e}");
    let e = err(open(&[write(d, "w4.csv", "ts,A\n1,1\n2,one\n")], &wide_spec()));
    assert!(e.contains("w4.csv: row 3, column `A`: value `one` is not a number (the column is a tag"), "{e}");
}

#[test]
fn wide_autumn_rule_applies_to_file_rows() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "w.csv",
        "time,A\n2026-10-25 02:00:00,1\n2026-10-25 02:30:00,2\n2026-10-25 02:00:00,3\n2026-10-25 02:30:00,4\n",
    );
    let sp = InputSpec { columns: ColumnNames { time: "time".into(), ..ColumnNames::default() }, ..wide_spec() };
    let set = open_with(&[p], &sp, chrono_tz::Europe::Berlin, None).unwrap();
    let a = one(&set, "A");
    assert_eq!(a.ts_us, ["00:00", "00:30", "01:00", "01:30"].map(|h| utc(&format!("2026-10-25T{h}:00Z"))));
}

#[test]
fn bad_input_lists_and_rows() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let e = err(open(&[], &spec()));
    assert!(e.contains("no input file given"), "{e}");
    let p = write(d, "a.csv", "tag,ts,value\nA,1,1\n");
    let e = err(open(&[p.clone(), d.join(".").join("a.csv")], &spec()));
    assert!(e.contains("the same file is given twice"), "{e}");
    let e = err(open(&[write(d, "t.csv", "tag,ts,value\nA,1,1\n,2,2\n")], &spec()));
    assert!(e.contains("t.csv: row 3, column `tag`: the tag is empty"), "{e}");
    let e = err(open(&[write(d, "h.csv", "tag,ts,value\n")], &spec()));
    assert!(e.contains("h.csv: the file is empty (no data rows)"), "{e}");
    let e = err(open(&[d.join("nope.parquet")], &spec()));
    assert!(e.ends_with("nope.parquet: file not found"), "{e}");
    let e = err(open(&[d.join("x.xlsx")], &spec()));
    assert!(e.contains("unknown input format `.xlsx`"), "{e}");
    let p = d.join("nulltag.parquet");
    write_parquet(
        &p,
        vec![
            ("tag", Arc::new(StringArray::from(vec![Some("A"), None])) as ArrayRef),
            ("ts", Arc::new(Int64Array::from(vec![1, 2]))),
            ("value", Arc::new(Float64Array::from(vec![1.0, 2.0]))),
        ],
        10,
    );
    let e = err(open(&[p], &spec()));
    assert!(e.contains("nulltag.parquet: row 2, column `tag`: the tag is null"), "{e}");
    let p = d.join("nulltime.parquet");
    write_parquet(
        &p,
        vec![
            ("tag", Arc::new(StringArray::from(vec!["A", "A", "A"])) as ArrayRef),
            ("ts", Arc::new(Int64Array::from(vec![Some(1), Some(2), None]))),
            ("value", Arc::new(Float64Array::from(vec![1.0, 2.0, 3.0]))),
        ],
        2,
    );
    let e = err(open(&[p], &spec()).unwrap().read_tags(&["A".into()]));
    assert!(e.contains("nulltime.parquet: row 3, column `ts`: bad time `null`"), "{e}");
}

/// Damaged Parquet files give errors, never panics, through the whole
/// input path (first pass and streaming read).
#[test]
fn damaged_parquet_never_panics() {
    let dir = tempfile::tempdir().unwrap();
    let good = dir.path().join("good.parquet");
    tag_sorted_parquet(&good, &["A", "B", "C"], 8, 6);
    let bytes = std::fs::read(&good).unwrap();
    let bad = dir.path().join("bad.parquet");
    let (mut errors, mut oks) = (0, 0);
    for len in (0..bytes.len()).step_by(7) {
        std::fs::write(&bad, &bytes[..len]).unwrap();
        assert!(open(std::slice::from_ref(&bad), &spec()).is_err(), "truncated to {len} bytes");
    }
    // Every third byte (the whole file is covered by the older reader's test).
    for i in (0..bytes.len()).step_by(3) {
        let mut b = bytes.clone();
        b[i] ^= 0xFF;
        std::fs::write(&bad, &b).unwrap();
        match open(std::slice::from_ref(&bad), &spec()).and_then(|s| s.read_tags(&["B".to_string()])) {
            Ok(_) => oks += 1,
            Err(_) => errors += 1,
        }
    }
    assert!(errors > 0 && oks > 0, "errors {errors}, oks {oks}");
}

#[test]
fn selection_covers_runs_across_row_groups() {
    let runs = [Run { tag: 0, start: 3, len: 4 }, Run { tag: 1, start: 7, len: 1 }, Run { tag: 2, start: 16, len: 2 }];
    let (groups, sel) = selection(&[5, 5, 5, 5], &runs);
    assert_eq!(groups, [0, 1, 3], "group 2 is skipped whole");
    let rows: Vec<usize> = sel
        .iter()
        .scan(0usize, |at, s| {
            let r = (*at, s.row_count, s.skip);
            *at += s.row_count;
            Some(r)
        })
        .filter(|r| !r.2)
        .flat_map(|r| r.0..r.0 + r.1)
        .collect();
    // Rows counted over the chosen groups only (group 3 starts at 10).
    assert_eq!(rows, [3, 4, 5, 6, 7, 11, 12]);
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(40))]

    /// Any layout (sorted by tag or shuffled, small row groups, any subset
    /// asked) reads the same as a direct application of the rules.
    #[test]
    fn parquet_reads_match_the_rules(
        rows in prop::collection::vec((0usize..4, 0i64..40, -100.0f64..100.0, 0usize..3), 1..120),
        sorted in any::<bool>(),
        group in 1usize..40,
        ask in prop::collection::vec(0usize..4, 1..4),
    ) {
        let names = ["AT-7", "FT-101.PV", "LT-3", "TT-204.PV"];
        let codes = [192u8, 64, 0];
        let mut rows = rows;
        if sorted {
            rows.sort_by_key(|r| r.0);
        }
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("p.parquet");
        write_parquet(
            &p,
            vec![
                ("tag", Arc::new(StringArray::from_iter_values(rows.iter().map(|r| names[r.0]))) as ArrayRef),
                ("ts", Arc::new(TimestampMicrosecondArray::from_iter_values(rows.iter().map(|r| r.1 * S)).with_timezone("UTC"))),
                ("value", Arc::new(Float64Array::from_iter_values(rows.iter().map(|r| r.2)))),
                ("quality", Arc::new(UInt8Array::from_iter_values(rows.iter().map(|r| codes[r.3])))),
            ],
            group,
        );
        let set = open(&[p], &with_quality(spec())).unwrap();
        if sorted {
            prop_assert!(set.is_streaming());
        }
        let present: Vec<usize> = ask.iter().copied().filter(|&k| rows.iter().any(|r| r.0 == k)).collect();
        let asked: Vec<String> = present.iter().map(|&k| names[k].to_string()).collect();
        let got = set.read_tags(&asked).unwrap();
        for (s, &k) in got.iter().zip(&present) {
            // Reference: stable sort by time, keep the best quality, the last among equals.
            let mut mine: Vec<(i64, f64, usize)> = rows.iter().filter(|r| r.0 == k).map(|r| (r.1, r.2, r.3)).collect();
            mine.sort_by_key(|m| m.0);
            let mut want: Vec<(i64, f64, usize)> = Vec::new();
            for m in mine {
                match want.last_mut() {
                    Some(w) if w.0 == m.0 => {
                        if m.2 <= w.2 {
                            *w = m;
                        }
                    }
                    _ => want.push(m),
                }
            }
            prop_assert_eq!(&s.ts_us, &want.iter().map(|w| w.0 * S).collect::<Vec<_>>());
            prop_assert_eq!(&s.values, &want.iter().map(|w| w.1).collect::<Vec<_>>());
            let q = [Quality::Good, Quality::Uncertain, Quality::Bad];
            prop_assert_eq!(&s.quality, &want.iter().map(|w| q[w.2]).collect::<Vec<_>>());
            prop_assert_eq!(s.counts.rows, rows.iter().filter(|r| r.0 == k).count());
            prop_assert_eq!(s.counts.duplicates, s.counts.rows - want.len());
        }
    }
}

/// Row numbers are kept as runs; a chunk asks for them only in errors.
#[test]
fn row_numbers_are_runs_of_consecutive_rows() {
    let mut r = RowNumbers::default();
    r.push_run(0, 5, 3); // rows 5, 6, 7
    r.push_run(3, 8, 2); // 8, 9: the same run goes on
    r.push_run(5, 20, 1); // a jump
    r.push_run(6, 30, 0); // nothing
    assert_eq!((0..6).map(|i| r.get(i)).collect::<Vec<_>>(), [5, 6, 7, 8, 9, 20]);
    assert_eq!(r.runs.len(), 2);
}

/// The order and non-finite counts taken piece by piece as rows are
/// appended equal those of the whole chunk (a step back or a repeat at a
/// seam included), and stand only while every row went through them.
#[test]
fn counts_taken_while_appending_equal_the_whole_chunks() {
    let pieces: [(&[i64], &[f64]); 4] = [
        (&[1, 2, 3], &[1.0, f64::NAN, 2.0]),
        (&[3, 4], &[f64::INFINITY, 1.0]),              // a repeat at the seam
        (&[2, 5, 5], &[0.0, -0.0, f64::NEG_INFINITY]), // a step back at the seam, a repeat inside
        (&[], &[]),
    ];
    let mut c = Chunk::with_capacity(0);
    for (ts, v) in pieces {
        let from = c.ts.len();
        c.ts.extend_from_slice(ts);
        c.value.extend_from_slice(v);
        c.quality.extend(std::iter::repeat_n(Quality::Good, ts.len()));
        c.scan_appended(from);
    }
    let whole = Order::of(&c.ts);
    let s = c.scanned().expect("every row counted");
    assert_eq!((s.order.back, s.order.repeats), (whole.back, whole.repeats));
    assert_eq!((s.order.back, s.order.repeats), (1, 2));
    assert_eq!(s.non_finite, c.value.iter().filter(|v| !v.is_finite()).count());
    assert_eq!(s.non_finite, 3);
    // A row added another way: the counts no longer stand.
    c.push(9, false, 1.0, Quality::Good, 99);
    assert!(c.scanned().is_none());
    c.push(10, false, 1.0, Quality::Good, 100);
    c.scan_appended(c.ts.len() - 1);
    assert!(c.scanned().is_none(), "a row left out of the counts stays out");
}

/// Runs of equal dictionary keys and quality codes are read a run at a
/// time; a null inside a run still stops it, at the right row.
#[test]
fn runs_of_equal_cells_stop_at_a_null() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let n = 6;
    let ts = || Arc::new(TimestampMicrosecondArray::from_iter_values((0..n as i64).map(|i| T0 + i * S))) as ArrayRef;
    let mut tags = StringDictionaryBuilder::<Int32Type>::new();
    for t in [Some("A"), Some("A"), Some("A"), None, Some("A"), Some("A")] {
        match t {
            Some(t) => tags.append_value(t),
            None => tags.append_null(),
        }
    }
    let p = d.join("nulltag_dict.parquet");
    write_parquet(
        &p,
        vec![
            ("tag", Arc::new(tags.finish()) as ArrayRef),
            ("ts", ts()),
            ("value", Arc::new(Float64Array::from(vec![1.0; n]))),
        ],
        10,
    );
    let e = err(open(&[p], &spec()));
    assert!(e.contains("nulltag_dict.parquet: row 4, column `tag`: the tag is null"), "{e}");

    use Quality::*;
    let p = d.join("nullq.parquet");
    let q = Int32Array::from(vec![Some(192), Some(192), None, Some(192), Some(64), Some(64)]);
    write_parquet(
        &p,
        vec![
            ("tag", Arc::new(StringArray::from(vec!["A"; n])) as ArrayRef),
            ("ts", ts()),
            ("value", Arc::new(Float64Array::from(vec![1.0; n]))),
            ("quality", Arc::new(q)),
        ],
        10,
    );
    let sp = InputSpec { quality: QualityCoding::OpcByte, ..with_quality(spec()) };
    assert_eq!(one(&open(&[p], &sp).unwrap(), "A").quality, [Good, Good, Bad, Good, Uncertain, Uncertain]);
}
