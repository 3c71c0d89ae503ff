//! The baseline of the engine's speed target: a bare read + write of a
//! long-format Parquet file with the plain arrow-rs reader and writer, no
//! tagwright logic. Reads only the `tag`, `ts`, `value` and `quality`
//! columns (those present) and writes the same rows back with the writer
//! settings of `cleaned.parquet` ([`tagwright::io::writer_properties`]),
//! then syncs the file, as `CleanedWriter::close` does.
//!
//! In the same run it times tagwright's own input/output path on the same
//! file: `InputSet::open` (first pass and hashing), `read_tags` in chunks of
//! 16 tags, each tag's table written by `CleanedWriter` (no pipeline steps),
//! and prints the ratio to the baseline. The baseline runs on one thread;
//! `CleanedWriter::create` encodes on two background threads. Each is
//! repeated `--reps` times (default 3) and the fastest run is reported;
//! `--only bare` or `--only io` runs one of them (use `--only bare` when
//! timing the whole process as the baseline).
//! `TAGWRIGHT_BREAKDOWN=1` prints the phases of each tagwright run.
//!
//! ```text
//! cargo run --release -p tagwright --example gen_long -- 200 1 /tmp/long.parquet
//! cargo run --release -p tagwright --example bare_copy -- /tmp/long.parquet /tmp/copy.parquet [zstd|snappy] [--reps N] [--only bare|io]
//! ```

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Instant;

use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::{ArrowWriter, ProjectionMask};
use parquet::file::metadata::KeyValue;
use tagwright::io::{writer_properties, CleanedWriter, InputOptions, InputSet, META_RUN_ID, META_VERSION};
use tagwright::pipeline::{ColumnNames, Compression, InputSpec};
use tagwright::series::{Sampling, TagTable};

fn main() {
    if let Err(e) = run() {
        eprintln!("bare_copy: {e}");
        std::process::exit(2);
    }
}

type Error = Box<dyn std::error::Error>;

fn run() -> Result<(), Error> {
    let mut args: Vec<String> = std::env::args().skip(1).collect();
    let mut reps = 3usize;
    if let Some(i) = args.iter().position(|a| a == "--reps") {
        reps = args.get(i + 1).and_then(|r| r.parse().ok()).ok_or("--reps needs a whole number")?;
        args.drain(i..i + 2);
    }
    let mut only = None;
    if let Some(i) = args.iter().position(|a| a == "--only") {
        only = Some(args.get(i + 1).cloned().ok_or("--only needs `bare` or `io`")?);
        args.drain(i..i + 2);
    }
    let run_bare = only.as_deref() != Some("io");
    let run_io = only.as_deref() != Some("bare");
    let (input, output, compression) = match args.as_slice() {
        [i, o] => (i, o, Compression::Zstd),
        [i, o, c] if c == "zstd" => (i, o, Compression::Zstd),
        [i, o, c] if c == "snappy" => (i, o, Compression::Snappy),
        _ => return Err("usage: bare_copy IN.parquet OUT.parquet [zstd|snappy] [--reps N] [--only bare|io]".into()),
    };
    let (input, output) = (PathBuf::from(input), PathBuf::from(output));
    let mut bare = f64::INFINITY;
    let mut ours = f64::INFINITY;
    let mut rows = (0, 0);
    for _ in 0..reps.max(1) {
        if run_bare {
            let t = Instant::now();
            rows.0 = bare_copy(&input, &output, compression)?;
            bare = bare.min(t.elapsed().as_secs_f64());
        }
        if run_io {
            let t = Instant::now();
            rows.1 = io_path(&input, &output, compression)?;
            ours = ours.min(t.elapsed().as_secs_f64());
        }
    }
    println!("bare read+write: {} rows in {bare:.3} s ({:.1} M rows/s)", rows.0, rows.0 as f64 / bare / 1e6);
    println!("tagwright io:    {} rows in {ours:.3} s ({:.1} M rows/s)", rows.1, rows.1 as f64 / ours / 1e6);
    println!("ratio io/bare:   {:.2}", ours / bare);
    Ok(())
}

fn metadata() -> Vec<KeyValue> {
    vec![
        KeyValue::new(META_RUN_ID.to_string(), "bare-copy".to_string()),
        KeyValue::new(META_VERSION.to_string(), env!("CARGO_PKG_VERSION").to_string()),
    ]
}

/// Plain arrow-rs read of the four columns and write with the cleaned-output settings.
fn bare_copy(input: &Path, output: &Path, compression: Compression) -> Result<u64, Error> {
    let builder = ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(input)?)?.with_batch_size(64 * 1024);
    let roots: Vec<usize> = builder
        .schema()
        .fields()
        .iter()
        .enumerate()
        .filter(|(_, f)| ["tag", "ts", "value", "quality"].contains(&f.name().as_str()))
        .map(|(i, _)| i)
        .collect();
    let mask = ProjectionMask::roots(builder.parquet_schema(), roots);
    let reader = builder.with_projection(mask).build()?;
    let schema = arrow_array::RecordBatchReader::schema(&reader);
    let props = writer_properties(compression, metadata());
    let mut w = ArrowWriter::try_new(std::fs::File::create(output)?, Arc::clone(&schema), Some(props))?;
    let mut rows = 0u64;
    for batch in reader {
        let batch = batch?;
        rows += batch.num_rows() as u64;
        w.write(&batch)?;
    }
    w.into_inner()?.sync_all()?;
    Ok(rows)
}

/// tagwright's input and output path, without pipeline steps. With
/// `TAGWRIGHT_BREAKDOWN=1` in the environment, prints the time of each phase.
fn io_path(input: &Path, output: &Path, compression: Compression) -> Result<u64, Error> {
    let mut phases = [0.0f64; 4];
    let mut lap = Instant::now();
    let mut mark = |k: usize| {
        phases[k] += lap.elapsed().as_secs_f64();
        lap = Instant::now();
    };
    let spec = InputSpec {
        format: tagwright::pipeline::InputFormat::Long,
        columns: ColumnNames { quality: Some("quality".into()), ..ColumnNames::default() },
        epoch_unit: Default::default(),
        quality: Default::default(),
        duplicates: Default::default(),
    };
    let set = InputSet::open(&[input.to_path_buf()], InputOptions { spec: &spec, tz: chrono_tz::UTC, window: None })?;
    mark(0);
    if !set.is_streaming() {
        eprintln!("note: {} is not tag-ordered; it is read whole", input.display());
    }
    let mut w = CleanedWriter::create(output, "io-path", compression)?;
    for chunk in set.tags().chunks(16) {
        let series = set.read_tags(chunk)?;
        mark(1);
        for s in series {
            let t = TagTable::from_series(&s, 1_000_000, Sampling::Regular);
            mark(2);
            w.write_tag(&t)?;
            mark(3);
        }
    }
    let rows = w.close()?;
    mark(3);
    if std::env::var_os("TAGWRIGHT_BREAKDOWN").is_some() {
        let [open, read, table, write] = phases;
        eprintln!("  io phases: open {open:.3} s, read_tags {read:.3} s, TagTable {table:.3} s, write {write:.3} s");
    }
    Ok(rows)
}
