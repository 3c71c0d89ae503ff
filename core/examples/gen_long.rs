//! Writes a generated long-format Parquet file for the read+write
//! benchmark: `TAGS` invented ISA-5.1-style tags (`FT-1000.PV`, `TT-1001.PV`,
//! ...) sampled every second for `HOURS` hours from 2026-03-01T06:00:00Z,
//! sorted by tag then time, as a historian export usually is.
//!
//! ```text
//! cargo run --release -p tagwright --example gen_long -- TAGS HOURS OUT.parquet [--unit-scale] [--seed N]
//! ```
//!
//! Each tag gets its own level and scale (0.5 to 2.5): x_t = 0.995 x_{t-1} +
//! 0.1 s eta_t, value = level + x_t + 0.05 s eps_t. With `--unit-scale`
//! every tag has s = 1, so one set of model parameters is right for all of
//! them (sigma2.obs 0.0025, phi 0.995, sigma2.arma 0.01, no level wander):
//! the case of parameters known from earlier shifts.
//!
//! Columns: `tag` (dictionary string), `ts` (timestamp[us, UTC]), `value`
//! (float64: a slow AR(1) wander plus noise, with rare NaN), `quality`
//! (UInt8 OPC quality byte: mostly 192, some 64 and 0). Seeded: the same
//! arguments give the same file; `--seed N` gives other draws of the same
//! tags (another shift of the same plant).

use std::sync::Arc;

use arrow_array::types::Int32Type;
use arrow_array::{
    ArrayRef, DictionaryArray, Float64Array, Int32Array, RecordBatch, StringArray, TimestampMicrosecondArray,
    UInt8Array,
};
use arrow_schema::{DataType, Field, Schema};
use parquet::arrow::ArrowWriter;
use tagwright::io::writer_properties;
use tagwright::pipeline::Compression;
use tagwright::rng::Rng;

const T0_US: i64 = 1_772_344_800_000_000; // 2026-03-01T06:00:00Z
const BATCH: usize = 64 * 1024;

fn main() {
    if let Err(e) = run() {
        eprintln!("gen_long: {e}");
        std::process::exit(2);
    }
}

fn run() -> Result<(), Box<dyn std::error::Error>> {
    let mut args: Vec<String> = std::env::args().skip(1).collect();
    let unit_scale = args.iter().any(|a| a == "--unit-scale");
    args.retain(|a| a != "--unit-scale");
    let mut seed = 20_260_301u64;
    if let Some(i) = args.iter().position(|a| a == "--seed") {
        let text = args.get(i + 1).ok_or("--seed needs a whole number")?;
        seed = text.parse().map_err(|_| format!("--seed `{text}` is not a whole number"))?;
        args.drain(i..i + 2);
    }
    let [tags, hours, out] = args.as_slice() else {
        return Err("usage: gen_long TAGS HOURS OUT.parquet [--unit-scale] [--seed N]".into());
    };
    let n_tags: usize = tags.parse().map_err(|_| format!("TAGS `{tags}` is not a whole number"))?;
    let hours: f64 = hours.parse().map_err(|_| format!("HOURS `{hours}` is not a number"))?;
    let per_tag = (hours * 3600.0).round() as usize;
    let prefixes = ["FT", "TT", "PT", "LT", "AT"];
    let mut names: Vec<String> =
        (0..n_tags).map(|i| format!("{}-{}.PV", prefixes[i % prefixes.len()], 1000 + i)).collect();
    names.sort();

    let schema = Arc::new(Schema::new(vec![
        Field::new("tag", DataType::Dictionary(Box::new(DataType::Int32), Box::new(DataType::Utf8)), false),
        Field::new("ts", DataType::Timestamp(arrow_schema::TimeUnit::Microsecond, Some("UTC".into())), false),
        Field::new("value", DataType::Float64, true),
        Field::new("quality", DataType::UInt8, false),
    ]));
    let file = std::fs::File::create(out)?;
    let mut w = ArrowWriter::try_new(file, schema.clone(), Some(writer_properties(Compression::Snappy, Vec::new())))?;
    let mut rng = Rng::new(seed);
    let mut buf = Batch::default();
    let started = std::time::Instant::now();
    for name in &names {
        let level = 10.0 + 90.0 * rng.uniform();
        let drawn = 0.5 + 2.0 * rng.uniform();
        let scale = if unit_scale { 1.0 } else { drawn };
        let mut x = 0.0;
        buf.tags.push(name.clone());
        for i in 0..per_tag {
            x = 0.995 * x + 0.1 * scale * rng.normal();
            let u = rng.uniform();
            let v = if u < 1e-4 { f64::NAN } else { level + x + 0.05 * scale * rng.normal() };
            // The current tag is the last entry of the batch's dictionary.
            buf.keys.push(buf.tags.len() as i32 - 1);
            buf.ts.push(T0_US + i as i64 * 1_000_000);
            buf.values.push(v);
            buf.quality.push(if u < 0.001 {
                0
            } else if u < 0.003 {
                64
            } else {
                192
            });
            if buf.keys.len() == BATCH {
                w.write(&buf.take(&schema)?)?;
            }
        }
    }
    if !buf.keys.is_empty() {
        w.write(&buf.take(&schema)?)?;
    }
    w.close()?;
    println!(
        "{} rows ({n_tags} tags x {per_tag} s) written to {out} in {:.2} s",
        n_tags * per_tag,
        started.elapsed().as_secs_f64()
    );
    Ok(())
}

#[derive(Default)]
struct Batch {
    tags: Vec<String>,
    keys: Vec<i32>,
    ts: Vec<i64>,
    values: Vec<f64>,
    quality: Vec<u8>,
}

impl Batch {
    /// The buffered rows as a record batch; keeps the current tag's name
    /// in the dictionary for the rows that follow.
    fn take(&mut self, schema: &Arc<Schema>) -> Result<RecordBatch, arrow_schema::ArrowError> {
        let tags = DictionaryArray::<Int32Type>::try_new(
            Int32Array::from(std::mem::take(&mut self.keys)),
            Arc::new(StringArray::from(self.tags.clone())) as ArrayRef,
        )?;
        let cols: Vec<ArrayRef> = vec![
            Arc::new(tags),
            Arc::new(TimestampMicrosecondArray::from(std::mem::take(&mut self.ts)).with_timezone("UTC")),
            Arc::new(Float64Array::from(std::mem::take(&mut self.values))),
            Arc::new(UInt8Array::from(std::mem::take(&mut self.quality))),
        ];
        // The next batch starts a new dictionary with the current tag as key 0.
        let last = self.tags.pop().unwrap_or_default();
        self.tags = vec![last];
        RecordBatch::try_new(schema.clone(), cols)
    }
}
