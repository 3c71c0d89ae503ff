//! Developer tool: a tag's fitted model and standardised innovations around
//! given times, from a long-format export read with a pipeline's input
//! settings.
//!
//! `cargo run --release -p tagwright-faults --example inspect -- PIPELINE EXPORT TAG [HH:MM:SS[+-N]]...`

use std::path::PathBuf;

use tagwright::io::{infer_period_us, InputOptions, InputSet};
use tagwright::pipeline::PipelineSpec;
use tagwright::plugin::Registry;
use tagwright::series::TagTable;
use tagwright::tagmodel::{model_for, Fitted, TagObs};
use tagwright_faults::detect::level_index;
use tagwright_faults::gate::{self, GateOptions};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if args.len() < 3 {
        return Err("usage: inspect PIPELINE EXPORT TAG [HH:MM:SS[+-N]]...".into());
    }
    let mut reg = Registry::with_builtins();
    tagwright_faults::register(&mut reg);
    let spec = PipelineSpec::load(&PathBuf::from(&args[0]), &reg).map_err(|e| e.to_string())?;
    let input = InputSet::open(
        &[PathBuf::from(&args[1])],
        InputOptions { spec: &spec.input, tz: spec.site.timezone, window: None },
    )?;
    let tag = &args[2];
    let series = input.read_tags(std::slice::from_ref(tag))?;
    let s = series.first().ok_or("tag not found")?;
    let resolved = spec.resolve(tag).ok_or("tag not selected")?;
    let period = resolved.settings.period_us.or_else(|| infer_period_us(&s.ts_us)).unwrap_or(1_000_000);
    let table = TagTable::from_series(s, period, resolved.settings.sampling);
    let (mspec, why) = model_for(tag, &resolved.settings);
    let mut obs = TagObs::build(&table, 4.0, |_| true, 3_600_000_000);
    let f = Fitted::fit(&mspec, &mut obs, None)?;
    println!("{tag}: {} ({why}) params {:?} loglik {:.1}", f.spec, f.params, f.loglik);
    let g = gate::run(
        &f.model,
        &obs,
        &GateOptions { spike: 4.45, shift_run: 3, level: level_index(&f.model), min_warm: 3 },
        &|k| obs.row(k).is_some(),
    );
    println!("shifts {:?} f_typical {:.3e}", g.shifts, g.f_typical);
    for spec_t in &args[3..] {
        let (hms, width) = match spec_t.split_once('+') {
            Some((a, b)) => (a, b.parse::<usize>().unwrap_or(5)),
            None => (spec_t.as_str(), 5),
        };
        let k0 =
            obs.ts_us.iter().position(|&t| tagwright::io::format_ts_us(t).contains(hms)).ok_or("time not found")?;
        for k in k0.saturating_sub(width)..(k0 + width + 1).min(obs.len()) {
            println!(
                "  {} y={:.4} e={:+.2} gated={}",
                tagwright::io::format_ts_us(obs.ts_us[k]),
                obs.y[k],
                g.e[k],
                g.gated[k]
            );
        }
    }
    Ok(())
}
