//! Tests of the `cleaned.parquet` writer: schema, metadata, encodings and
//! round trips through the plain Parquet reader.

use std::path::Path;

use arrow_array::cast::AsArray;
use arrow_array::types::{Float64Type, Int32Type, TimestampMicrosecondType};
use arrow_array::{Array, RecordBatch};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::basic::Encoding;
use parquet::file::reader::{FileReader, SerializedFileReader};
use proptest::prelude::*;

use super::*;
use crate::series::{Fault, Quality, ReadCounts, Sampling, Status, TagSeries};

/// One row as read back: tag, ts, raw, value, std, status, fault.
/// (`raw` as bits, so that a NaN reading compares equal to itself.)
type Row = (String, i64, Option<u64>, Option<f64>, Option<f64>, String, Option<String>);

fn read_back(path: &Path) -> (SchemaRef, Vec<Row>, Meta) {
    let file = std::fs::File::open(path).unwrap();
    let builder = ParquetRecordBatchReaderBuilder::try_new(file).unwrap();
    let schema = builder.schema().clone();
    let kv: Meta = builder
        .metadata()
        .file_metadata()
        .key_value_metadata()
        .map(|v| v.iter().map(|k| (k.key.clone(), k.value.clone().unwrap_or_default())).collect())
        .unwrap_or_default();
    let mut rows = Vec::new();
    for batch in builder.build().unwrap() {
        rows.extend(rows_of(&batch.unwrap()));
    }
    (schema, rows, kv)
}

type Meta = std::collections::BTreeMap<String, String>;

fn rows_of(b: &RecordBatch) -> Vec<Row> {
    let text = |c: usize, i: usize| -> Option<String> {
        let d = b.column(c).as_dictionary::<Int32Type>();
        if d.is_null(i) {
            return None;
        }
        let k = d.keys().value(i) as usize;
        Some(d.values().as_string::<i32>().value(k).to_string())
    };
    let float = |c: usize, i: usize| {
        let a = b.column(c).as_primitive::<Float64Type>();
        (!a.is_null(i)).then(|| a.value(i))
    };
    let ts = b.column(1).as_primitive::<TimestampMicrosecondType>();
    (0..b.num_rows())
        .map(|i| {
            (
                text(0, i).unwrap(),
                ts.value(i),
                float(2, i).map(f64::to_bits),
                float(3, i),
                float(4, i),
                text(5, i).unwrap(),
                text(6, i),
            )
        })
        .collect()
}

fn expected_rows(tables: &[TagTable]) -> Vec<Row> {
    let opt = |v: f64| (!v.is_nan()).then_some(v);
    tables
        .iter()
        .flat_map(|t| {
            (0..t.len()).map(move |i| {
                (
                    t.tag.clone(),
                    t.ts_us[i],
                    if t.status[i] == Status::Filled { None } else { Some(t.raw[i].to_bits()) },
                    opt(t.value[i]),
                    opt(t.std[i]),
                    t.status[i].as_str().to_string(),
                    t.fault[i].map(|f| f.as_str().to_string()),
                )
            })
        })
        .collect()
}

fn table(tag: &str, n: usize) -> TagTable {
    let s = TagSeries {
        tag: tag.into(),
        ts_us: (0..n as i64).map(|i| 1_772_344_800_000_000 + i * 5_000_000).collect(),
        values: (0..n).map(|i| i as f64 * 0.5).collect(),
        quality: vec![Quality::Good; n],
        counts: ReadCounts::default(),
    };
    TagTable::from_series(&s, 5_000_000, Sampling::Regular)
}

#[test]
fn round_trip_schema_metadata_and_encodings() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cleaned.parquet");
    let mut a = table("FT-101.PV", 6);
    a.insert_rows(&[a.ts_us[2] + 1], 0);
    a.value[3] = 1.25;
    a.std[3] = 0.5;
    a.decide(1, Status::Replaced, Some(Fault::Spike), 1, 9.0, 5.0);
    a.value[1] = 0.75;
    a.decide(4, Status::Rejected, Some(Fault::Stuck), 1, 9.0, 5.0);
    a.value[4] = f64::NAN;
    a.decide(5, Status::Ok, Some(Fault::Drift), 2, 1.0, 0.5);
    a.raw[6] = f64::NAN;
    let b = table("TT-204.PV", 3);
    let empty = table("XX-0", 0);
    let mut w = CleanedWriter::create(&path, "run-0", Compression::Zstd).unwrap();
    assert!(!path.exists(), "written under a partial name until closed");
    for t in [&a, &b, &empty] {
        w.write_tag(t).unwrap();
    }
    // A run learns its id at the end: the footer has the last one set.
    w.set_run_id("run-7");
    assert_eq!(w.close().unwrap(), 10);

    let (schema, rows, kv) = read_back(&path);
    let shape = |s: &SchemaRef| {
        s.fields().iter().map(|f| (f.name().clone(), f.data_type().clone(), f.is_nullable())).collect::<Vec<_>>()
    };
    assert_eq!(shape(&schema), shape(&cleaned_schema()));
    assert_eq!(rows, expected_rows(&[a, b]));
    assert_eq!(rows[3].2, None, "filled row: raw is null");
    assert!(rows[6].2.is_some_and(|b| f64::from_bits(b).is_nan()), "a NaN reading stays NaN in raw");
    assert_eq!(kv.get(META_RUN_ID).map(String::as_str), Some("run-7"));
    assert_eq!(kv.get(META_VERSION).map(String::as_str), Some(env!("CARGO_PKG_VERSION")));

    // The design's encodings: delta for ts, byte-stream-split for the floats.
    let r = SerializedFileReader::new(std::fs::File::open(&path).unwrap()).unwrap();
    let rg = r.metadata().row_group(0);
    for c in rg.columns() {
        let name = c.column_path().string();
        let enc = c.encodings().collect::<Vec<_>>();
        match name.as_str() {
            "ts" => assert!(enc.contains(&Encoding::DELTA_BINARY_PACKED), "{name}: {enc:?}"),
            "raw" | "value" | "std" => assert!(enc.contains(&Encoding::BYTE_STREAM_SPLIT), "{name}: {enc:?}"),
            _ => {}
        }
        let dictionary = ["tag", "status", "fault"].contains(&name.as_str());
        assert_eq!(enc.contains(&Encoding::RLE_DICTIONARY), dictionary, "{name}: {enc:?}");
        // Statistics only for the columns a reader prunes by.
        assert_eq!(c.statistics().is_some(), ["tag", "ts"].contains(&name.as_str()), "{name}: statistics");
    }
    let tag_stats = rg.column(0).statistics().unwrap();
    assert_eq!(tag_stats.min_bytes_opt(), Some("FT-101.PV".as_bytes()));
    assert_eq!(tag_stats.max_bytes_opt(), Some("TT-204.PV".as_bytes()));
    assert_eq!(tag_stats.null_count_opt(), Some(0));
}

/// Offset index of every column and column index of `tag`, as a reader
/// that prunes pages sees them.
fn page_index(path: &Path) -> parquet::file::metadata::ParquetMetaData {
    let opts = parquet::file::serialized_reader::ReadOptionsBuilder::new().with_page_index().build();
    let r = SerializedFileReader::new_with_options(std::fs::File::open(path).unwrap(), opts).unwrap();
    r.metadata().clone()
}

#[test]
fn key_columns_span_pages_with_nulls_and_keep_a_page_index() {
    // Long tags whose status and fault change across page boundaries
    // (pages of 20,000 rows), a fault-free tag (no fault in a whole page),
    // and row groups holding several tags.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("keys.parquet");
    let n = 3 * super::super::output_keys::PAGE_ROWS / 2 + 11;
    let mut tables = Vec::new();
    for k in 0..3 {
        let mut t = table(&format!("K-{k}"), n);
        if k != 1 {
            for i in (n / 3 - 5)..(n / 3 + 20_003) {
                t.decide(i, Status::Replaced, Some(Fault::ALL[(i / 7) % 7]), 1, 9.0, 5.0);
                t.value[i] = 0.5;
            }
            t.decide(n - 1, Status::Ok, Some(Fault::Drift), 2, 1.0, 0.5);
        }
        tables.push(t);
    }
    let mut w = CleanedWriter::create(&path, "r", Compression::Zstd).unwrap();
    for t in &tables {
        w.write_tag(t).unwrap();
    }
    w.close().unwrap();
    assert_eq!(read_back(&path).1, expected_rows(&tables));

    let meta = page_index(&path);
    let ix = meta.page_index_for_row_group(0);
    let rg = meta.row_group(0);
    assert_eq!(rg.num_rows() as usize, 3 * n);
    for (c, col) in rg.columns().iter().enumerate() {
        let pages = &ix.offset_index(c).unwrap_or_else(|| panic!("{}: offset index", col.column_path())).page_locations;
        assert_eq!(pages[0].first_row_index, 0);
        assert!(pages.windows(2).all(|p| p[0].first_row_index < p[1].first_row_index));
    }
    // Pages of `tag`: 20,000 rows each, min and max the tags they hold.
    let tag_pages = &ix.offset_index(0).unwrap().page_locations;
    assert_eq!(tag_pages.len(), (3 * n).div_ceil(20_000));
    match ix.column_index(0) {
        Some(parquet::file::page_index::column_index::ColumnIndexMetaData::BYTE_ARRAY(ix)) => {
            assert_eq!(ix.min_value(0), Some("K-0".as_bytes()));
            // Rows 20,000-39,999 hold the end of K-0 and the start of K-1.
            assert_eq!((ix.min_value(1), ix.max_value(1)), (Some("K-0".as_bytes()), Some("K-1".as_bytes())));
            assert_eq!(ix.max_value(tag_pages.len() - 1), Some("K-2".as_bytes()));
        }
        other => panic!("tag column index: {other:?}"),
    }
}

#[test]
fn handing_tables_over_writes_the_same_rows_as_copying_them() {
    // Small tags are buffered (copied), large ones handed over whole; a
    // large tag after buffered small ones must not overtake them.
    let dir = tempfile::tempdir().unwrap();
    let sizes = [5, BATCH_ROWS / 2 + 3, 17, 40, BATCH_ROWS + 9, 0, BATCH_ROWS / 2 - 1, 2 * BATCH_ROWS];
    let tables: Vec<TagTable> = sizes.iter().enumerate().map(|(k, &n)| table(&format!("T{k:02}"), n)).collect();
    let mut files = Vec::new();
    for (name, how, threads) in [("copy", 0, 2), ("owned", 1, 2), ("owned1", 1, 1), ("checked", 2, 2)] {
        let path = dir.path().join(format!("{name}.parquet"));
        let mut w = CleanedWriter::create_with_threads(&path, "r", Compression::Zstd, threads).unwrap();
        for t in &tables {
            match how {
                0 => w.write_tag(t).unwrap(),
                1 => w.write_tag_owned(t.clone()).unwrap(),
                _ => w.write_checked(t.clone().checked().unwrap()).unwrap(),
            }
        }
        assert_eq!(w.close().unwrap(), sizes.iter().sum::<usize>() as u64);
        files.push(std::fs::read(&path).unwrap());
        assert_eq!(read_back(&path).1, expected_rows(&tables), "{name}: rows");
    }
    // Page boundaries follow the batches, so the two paths may differ in
    // bytes; each is the same whatever the thread count.
    assert!(files[1] == files[2], "same bytes from 1 and 2 threads");
    assert!(files[1] == files[3], "a checked table is written as an unchecked one");
    // The owned path checks the contract as the copying one does.
    let mut w = CleanedWriter::create(&dir.path().join("bad.parquet"), "r", Compression::Zstd).unwrap();
    w.write_tag_owned(table("B", BATCH_ROWS)).unwrap();
    assert!(matches!(w.write_tag_owned(table("A", BATCH_ROWS)), Err(IoError::BadTable { .. })));
}

/// A table whose time repeats at row 2.
fn t_repeat(tag: &str) -> TagTable {
    let mut t = table(tag, 3);
    t.ts_us[2] = t.ts_us[1];
    t
}

#[test]
fn contract_breaches_are_errors_and_leave_no_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cleaned.parquet");
    let mut w = CleanedWriter::create(&path, "r", Compression::Snappy).unwrap();
    w.write_tag(&table("B", 2)).unwrap();
    let e = w.write_tag(&table("A", 2)).unwrap_err().to_string();
    assert!(e.contains("tag `A`: tags must be written in sorted order, each once; `A` comes after `B`"), "{e}");
    let e = w.write_tag(&table("B", 2)).unwrap_err().to_string();
    assert!(e.contains("comes after `B`"), "{e}");
    let mut t = table("C", 3);
    t.ts_us[2] = t.ts_us[1];
    let e = w.write_tag(&t).unwrap_err().to_string();
    assert!(e.contains("tag `C`: times do not increase at row 2"), "{e}");
    let mut t = table("D", 3);
    t.std.pop();
    assert!(w.write_tag(&t).unwrap_err().to_string().contains("column lengths differ"));
    // A table whose times do not increase is never a checked one; a checked
    // one still keeps the tag order.
    let (t, e) = *t_repeat("E").checked().unwrap_err();
    assert!(e.contains("times do not increase at row 2") && t.tag == "E", "{e}");
    let e = w.write_checked(table("A", 2).checked().unwrap()).unwrap_err().to_string();
    assert!(e.contains("`A` comes after `B`"), "{e}");
    drop(w);
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0, "dropped unclosed: nothing left");
}

#[test]
fn dropped_while_encoding_leaves_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cleaned.parquet");
    let mut w = CleanedWriter::create(&path, "r", Compression::Zstd).unwrap();
    // More than a batch: the encoding thread has rows when the writer is dropped.
    w.write_tag(&table("A", BATCH_ROWS + 10)).unwrap();
    w.write_tag(&table("B", 10)).unwrap();
    drop(w);
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
}

#[test]
fn many_rows_span_row_groups_and_threads_do_not_change_the_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("big.parquet");
    let one = dir.path().join("one.parquet");
    let mut w1 = CleanedWriter::create_with_threads(&one, "r", Compression::Snappy, 1).unwrap();
    for k in 0..5 {
        w1.write_tag(&table(&format!("T{k}"), ROW_GROUP_ROWS / 4 + 7)).unwrap();
    }
    w1.close().unwrap();
    let mut w = CleanedWriter::create(&path, "r", Compression::Snappy).unwrap();
    let n = ROW_GROUP_ROWS / 4 + 7;
    for k in 0..5 {
        w.write_tag(&table(&format!("T{k}"), n)).unwrap();
    }
    assert_eq!(w.close().unwrap(), 5 * n as u64);
    let r = SerializedFileReader::new(std::fs::File::open(&path).unwrap()).unwrap();
    assert_eq!(r.metadata().num_row_groups(), 2);
    assert_eq!(r.metadata().row_group(0).num_rows() as usize, ROW_GROUP_ROWS);
    assert!(std::fs::read(&path).unwrap() == std::fs::read(&one).unwrap(), "same bytes from 1 and 2 threads");
}

fn arb_table(tag: String) -> impl Strategy<Value = TagTable> {
    let row = (
        1i64..1_000_000_000,
        prop_oneof![Just(f64::NAN), -1e6f64..1e6],
        prop_oneof![Just(f64::NAN), -1e6f64..1e6],
        prop_oneof![Just(f64::NAN), 0.0f64..10.0],
        0usize..4,
        prop::option::of(0usize..7),
    );
    prop::collection::vec(row, 0..40).prop_map(move |rows| {
        let mut ts = 0i64;
        let mut t = table(&tag, rows.len());
        for (i, r) in rows.into_iter().enumerate() {
            ts += r.0;
            t.ts_us[i] = ts;
            t.raw[i] = r.1;
            t.value[i] = r.2;
            t.std[i] = r.3;
            t.status[i] = Status::ALL[r.4];
            t.fault[i] = r.5.map(|f| Fault::ALL[f]);
        }
        t
    })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    /// Any tables written come back column by column, nulls included.
    #[test]
    fn parquet_round_trip_of_random_tables(
        tables in prop::collection::vec(0u8..26, 0..6).prop_flat_map(|mut letters| {
            letters.sort_unstable();
            letters.dedup();
            letters.into_iter().map(|l| arb_table(format!("{}T-{l:02}.PV", (b'A' + l) as char))).collect::<Vec<_>>()
        }),
        zstd in any::<bool>(),
        threads in 1usize..3,
    ) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("c.parquet");
        let compression = if zstd { Compression::Zstd } else { Compression::Snappy };
        let mut w = CleanedWriter::create_with_threads(&path, "p", compression, threads).unwrap();
        for t in &tables {
            w.write_tag(t).unwrap();
        }
        let n = w.close().unwrap();
        let want = expected_rows(&tables);
        prop_assert_eq!(n as usize, want.len());
        let (_, rows, _) = read_back(&path);
        prop_assert_eq!(rows, want);
    }
}

/// The float columns are split into byte streams here, a page at a time:
/// pages of `SPLIT_PAGE_ROWS` rows across tags, whose headers and chunk
/// metadata say byte-stream-split (never plain), read back as the values
/// written, nulls and NaNs and signed zeros included; the streams are those
/// of Parquet's format (byte j of value i at j * n + i).
#[test]
fn float_columns_are_split_a_page_at_a_time() {
    use super::super::output_plain::SPLIT_PAGE_ROWS;
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("split.parquet");
    let n = 2 * SPLIT_PAGE_ROWS + 333;
    let mut a = table("A", n);
    for i in (0..n).step_by(997) {
        a.raw[i] = f64::NAN; // a NaN reading: a NaN, not a null, in raw
        a.decide(i, Status::Rejected, Some(Fault::Spike), 1, 9.0, 5.0);
        a.value[i] = f64::NAN; // null in value
    }
    a.value[5] = -0.0;
    a.std[7] = 1e-300;
    let mut b = table("B", SPLIT_PAGE_ROWS - 1); // a tag inside one page
    b.insert_rows(&[b.ts_us[3] + 1, b.ts_us[3] + 2], 0); // raw null on inserted rows
    let c = table("C", 3 * SPLIT_PAGE_ROWS); // whole pages straight through
    let tables = [a, b, c];
    for threads in [1, 2] {
        let mut w = CleanedWriter::create_with_threads(&path, "r", Compression::Zstd, threads).unwrap();
        for t in &tables {
            w.write_tag(t).unwrap();
        }
        w.close().unwrap();
        assert_eq!(read_back(&path).1, expected_rows(&tables), "{threads} threads");
    }

    let r = SerializedFileReader::new(std::fs::File::open(&path).unwrap()).unwrap();
    let rows: usize = tables.iter().map(|t| t.len()).sum();
    for (i, col) in r.metadata().row_group(0).columns().iter().enumerate() {
        let name = col.column_path().string();
        if !["raw", "value", "std"].contains(&name.as_str()) {
            continue;
        }
        let enc: Vec<Encoding> = col.encodings().collect();
        assert!(enc.contains(&Encoding::BYTE_STREAM_SPLIT) && !enc.contains(&Encoding::PLAIN), "{name}: {enc:?}");
        // (Read back as a full list or as a mask of encodings.)
        let page_encodings: Vec<Encoding> = match (col.page_encoding_stats(), col.page_encoding_stats_mask()) {
            (Some(stats), _) => stats.iter().map(|s| s.encoding).collect(),
            (None, Some(mask)) => mask.encodings().collect(),
            (None, None) => panic!("{name}: no page encoding stats"),
        };
        assert!(page_encodings.contains(&Encoding::BYTE_STREAM_SPLIT), "{name}: {page_encodings:?}");
        assert!(!page_encodings.contains(&Encoding::PLAIN), "{name}: {page_encodings:?}");
        let mut pages = r.get_row_group(0).unwrap().get_column_page_reader(i).unwrap();
        let mut values = 0;
        while let Some(p) = pages.get_next_page().unwrap() {
            assert_eq!(p.encoding(), Encoding::BYTE_STREAM_SPLIT, "{name}: page header");
            assert!(p.num_values() as usize <= SPLIT_PAGE_ROWS, "{name}: page of {}", p.num_values());
            values += p.num_values() as usize;
        }
        assert_eq!(values, rows, "{name}: rows in pages");
    }

    // The layout itself, against the format's definition written out, for
    // counts that are and are not a multiple of 8.
    for n in [0, 1, 7, 8, 21, 24, 64, 67] {
        let v: Vec<f64> = (0..n).map(|i| (i as f64 - 7.5) * 1.25e-3 + f64::from(i as u32).sqrt()).collect();
        let v: Vec<f64> = v
            .into_iter()
            .enumerate()
            .map(|(i, x)| [f64::NAN, -0.0, f64::INFINITY].get(i % 11).copied().unwrap_or(x))
            .collect();
        let (mut out, mut scratch) = (Vec::new(), Vec::new());
        super::super::output_plain::split_streams(&v, &mut out, &mut scratch);
        assert_eq!(out.len(), n, "{n} values");
        let bytes: Vec<u8> = out.iter().flat_map(|w| w.to_le_bytes()).collect();
        for (i, x) in v.iter().enumerate() {
            for (j, byte) in x.to_le_bytes().into_iter().enumerate() {
                assert_eq!(bytes[j * n + i], byte, "{n} values: value {i}, byte {j}");
            }
        }
    }
}
