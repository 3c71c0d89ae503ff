//! The run engine: reads the input, runs each selected tag's chain of steps
//! (tags coupled by a group run together), writes `cleaned.parquet` and
//! `provenance.jsonl` atomically, and carries each tag's step state to the
//! next run.
//!
//! Work flows one way in chunks: the tags to clean are sorted; a chunk of
//! work units (a tag, or a group) is read, processed in parallel on a rayon
//! pool, and written in sorted tag order. With more than one thread three
//! chunks are in flight at once (the next one read on a reader thread, this
//! one cleaned on the pool, the one before written by this thread), so
//! memory holds a few chunks whatever the file size (for a tag-ordered
//! input). The output is the same bytes whatever the thread count: results
//! are written in tag order and nothing depends on scheduling.

mod events;
mod provenance;
mod state;

use std::collections::{BTreeMap, BTreeSet};
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Instant;

use rayon::prelude::*;
use sha2::{Digest, Sha256};

pub use events::{events, Event};
pub use provenance::{time_text, CAUTION};

use crate::io::{infer_period_us, CleanedWriter, InputOptions, InputSet, IoError, OutputDir};
use crate::pipeline::{PipelineSpec, ResolvedTag};
use crate::plugin::{survey, Registry, Step, StepContext, Survey, TagWork};
use crate::series::{Fault, Status, TagSeries, TagTable};

/// Options of one run.
#[derive(Debug, Clone, Default)]
pub struct RunOptions {
    /// Input files (long or wide, CSV or Parquet, as the pipeline says).
    pub inputs: Vec<PathBuf>,
    /// Output directory.
    pub out_dir: PathBuf,
    /// Run window [from, to) in µs UTC, and how it was given (for provenance).
    pub window: Option<(i64, i64)>,
    pub window_label: Option<String>,
    /// Directory holding the state carried between runs.
    pub state_dir: Option<PathBuf>,
    /// Worker threads (None: all cores).
    pub threads: Option<usize>,
    /// The command line, for provenance.
    pub command_line: Vec<String>,
    /// Work units per chunk (None: 8 per thread).
    pub chunk_units: Option<usize>,
}

/// Why a run could not be done at all (a tag's failure is not an error).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum EngineError {
    /// An input file could not be read (exit code 3).
    #[error(transparent)]
    Input(IoError),
    /// Writing the outputs failed.
    #[error(transparent)]
    Output(IoError),
    /// The pipeline names a step the registry cannot make (exit code 1).
    #[error("{0}")]
    Config(String),
    /// The carried state could not be read or written.
    #[error("state: {0}")]
    State(String),
    /// The worker pool could not be started.
    #[error("thread pool: {0}")]
    Threads(String),
}

/// What a run did, for the summary and the exit code.
#[derive(Debug, Clone, Default)]
pub struct RunOutcome {
    pub run_id: String,
    /// Tags whose chain ran to the end.
    pub tags_processed: usize,
    /// Tags that failed, with the reason (their rows are written raw).
    pub tags_failed: Vec<(String, String)>,
    /// Tags in the input that no rule selects.
    pub tags_not_selected: usize,
    /// Output rows by status (ok, filled, replaced, rejected).
    pub rows_by_status: [u64; 4],
    /// Rows by fault kind.
    pub faults: BTreeMap<&'static str, u64>,
    /// Provenance events written.
    pub events: u64,
    pub seconds: f64,
    /// The files written.
    pub outputs: Vec<PathBuf>,
    /// Whether the input was read tag group by tag group.
    pub streaming: bool,
}

/// One tag's carried state: a JSON value per step name.
type StepState = BTreeMap<String, serde_json::Value>;

/// A tag (or group of tags) and the chain it runs.
struct Unit {
    tags: Vec<(String, ResolvedTag)>,
    chain: Vec<Arc<dyn Step>>,
    names: Vec<String>,
}

/// The result of one tag.
struct TagResult {
    table: ResultTable,
    work_report: crate::plugin::TagReport,
    state: BTreeMap<String, serde_json::Value>,
    counts: crate::series::ReadCounts,
    error: Option<String>,
    step_names: Vec<String>,
    group: Option<String>,
}

/// A tag's table for the writer: checked after its chain (the writer need
/// not scan its times again), or a failed tag's raw readings.
enum ResultTable {
    Checked(crate::series::CheckedTable),
    Raw(TagTable),
}

impl std::ops::Deref for ResultTable {
    type Target = TagTable;
    fn deref(&self) -> &TagTable {
        match self {
            ResultTable::Checked(t) => t,
            ResultTable::Raw(t) => t,
        }
    }
}

/// Runs a pipeline. `progress(done, total)` is called after each chunk.
pub fn run(
    spec: &PipelineSpec,
    registry: &Registry,
    opts: &RunOptions,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<RunOutcome, EngineError> {
    let started = Instant::now();
    let started_at = chrono::Utc::now();
    // The inputs' SHA-256 (for the run id and provenance) is computed aside
    // while the run reads them, and awaited at the end.
    let mut input = InputSet::open_hashing_aside(
        &opts.inputs,
        InputOptions { spec: &spec.input, tz: spec.site.timezone, window: opts.window },
    )
    .map_err(EngineError::Input)?;

    // Selection and work units, in sorted tag order.
    let mut outcome = RunOutcome { streaming: input.is_streaming(), ..Default::default() };
    let mut units: Vec<Unit> = Vec::new();
    let mut group_unit: BTreeMap<String, usize> = BTreeMap::new();
    for tag in input.tags() {
        let Some(resolved) = spec.resolve(tag).filter(|r| !r.steps.is_empty()) else {
            outcome.tags_not_selected += 1;
            continue;
        };
        if let Some(g) = resolved.group.as_ref().map(|g| g.id.clone()) {
            if let Some(&u) = group_unit.get(&g) {
                units[u].tags.push((tag.clone(), resolved));
                continue;
            }
            group_unit.insert(g, units.len());
        }
        let mut chain = Vec::with_capacity(resolved.steps.len());
        for s in &resolved.steps {
            chain.push(
                s.make(registry)
                    .map_err(|e| EngineError::Config(format!("{}:{}: {e}", spec.path.display(), s.line)))?,
            );
        }
        // The steps' own names: an external step names its plugin (`plugin:NAME`).
        let names = chain.iter().map(|s| s.name().to_string()).collect();
        units.push(Unit { tags: vec![(tag.clone(), resolved)], chain, names });
    }
    let selected: Vec<String> = {
        let mut v: Vec<String> = units.iter().flat_map(|u| u.tags.iter().map(|(t, _)| t.clone())).collect();
        v.sort();
        v
    };

    // Plant-wide survey of abrupt changes, when a step asks for it: one extra
    // read of the selected tags, chunk by chunk, keeping only change times.
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(opts.threads.unwrap_or(0))
        .build()
        .map_err(|e| EngineError::Threads(e.to_string()))?;
    let chunk = opts.chunk_units.unwrap_or_else(|| 8 * pool.current_num_threads()).max(1);
    let survey = if units.iter().any(|u| u.chain.iter().any(|s| s.uses_survey())) {
        Some(run_survey(&input, &units, chunk, &pool)?)
    } else {
        None
    };

    let mut state_in = state::load(opts.state_dir.as_deref()).map_err(EngineError::State)?;
    let mut state_out: BTreeMap<String, BTreeMap<String, serde_json::Value>> = BTreeMap::new();

    let out = OutputDir::create(&opts.out_dir).map_err(EngineError::Output)?;
    // The writer encodes on a background thread unless the run is held to one.
    // (The run id goes into the file's footer when it is closed.)
    let mut writer = CleanedWriter::create_with_threads(
        &out.path("cleaned.parquet"),
        "",
        spec.output.compression,
        if pool.current_num_threads() == 1 { 1 } else { 2 },
    )
    .map_err(EngineError::Output)?;
    let mut prov = provenance::Body::new(out.path("provenance.body.partial")).map_err(EngineError::Output)?;

    // Results wait here until every tag before them in sorted order is written.
    let mut pending: BTreeMap<String, TagResult> = BTreeMap::new();
    let mut next = 0usize;
    let total = units.len();
    let chunk_names: Vec<Vec<String>> =
        units.chunks(chunk).map(|b| b.iter().flat_map(|u| u.tags.iter().map(|(t, _)| t.clone())).collect()).collect();
    // With more than one thread, the next chunk is read (decoded) on a
    // reader thread while this one is cleaned and written.
    let read_ahead = pool.current_num_threads() > 1;
    std::thread::scope(|scope| -> Result<(), EngineError> {
        let (tx, rx) = std::sync::mpsc::sync_channel::<crate::io::Result<Vec<TagSeries>>>(1);
        if read_ahead {
            let (input, chunk_names) = (&input, &chunk_names);
            std::thread::Builder::new()
                .name("tagwright-reader".into())
                .spawn_scoped(scope, move || {
                    for names in chunk_names {
                        let r = input.read_tags(names);
                        let failed = r.is_err();
                        // The receiver is gone when the run stopped early.
                        if tx.send(r).is_err() || failed {
                            break;
                        }
                    }
                })
                .map_err(|e| EngineError::Threads(e.to_string()))?;
        }
        for (ci, (batch, names)) in units.chunks(chunk).zip(&chunk_names).enumerate() {
            let series = if read_ahead {
                rx.recv().map_err(|_| EngineError::Threads("the reader thread stopped".into()))?
            } else {
                input.read_tags(names)
            }
            .map_err(EngineError::Input)?;
            let mut by_tag: BTreeMap<String, TagSeries> = series.into_iter().map(|s| (s.tag.clone(), s)).collect();
            let jobs: Vec<(&Unit, Vec<TagSeries>, Vec<StepState>)> = batch
                .iter()
                .map(|u| {
                    let s: Vec<TagSeries> = u.tags.iter().filter_map(|(t, _)| by_tag.remove(t)).collect();
                    let st = u.tags.iter().map(|(t, _)| state_in.remove(t).unwrap_or_default()).collect();
                    (u, s, st)
                })
                .collect();
            // This chunk is cleaned on the pool while this thread writes the
            // results of the one before (so the pool does not wait for the
            // writing, nor the writing for the pool).
            // A run held to one thread does one thing at a time.
            let mut results: Option<Vec<Vec<TagResult>>> = None;
            let slot = &mut results;
            let survey = survey.as_ref();
            let input = &input;
            let clean = move || {
                *slot = Some(jobs.into_par_iter().map(|(u, s, st)| run_unit(u, s, st, survey, input)).collect());
            };
            let mut write = || {
                write_ready(&mut pending, &selected, &mut next, &mut writer, &mut prov, &mut outcome, &mut state_out)
            };
            let written = if read_ahead {
                pool.in_place_scope(|sc| {
                    sc.spawn(move |_| clean());
                    write()
                })
            } else {
                let w = write();
                pool.install(clean);
                w
            };
            written.map_err(EngineError::Output)?;
            let results = results.ok_or_else(|| EngineError::Threads("a chunk's cleaning did not finish".into()))?;
            for r in results.into_iter().flatten() {
                pending.insert(r.table.tag.clone(), r);
            }
            progress(((ci + 1) * chunk).min(total), total);
        }
        write_ready(&mut pending, &selected, &mut next, &mut writer, &mut prov, &mut outcome, &mut state_out)
            .map_err(EngineError::Output)
    })?;
    // Tags whose results never came (a read returned nothing for them).
    while next < selected.len() {
        if let Some(r) = pending.remove(&selected[next]) {
            write_result(r, &mut writer, &mut prov, &mut outcome, &mut state_out).map_err(EngineError::Output)?;
        }
        next += 1;
    }
    input.finish_hashing().map_err(EngineError::Input)?;
    let run_id = run_id(spec, &input, opts);
    outcome.run_id = run_id.clone();
    writer.set_run_id(&run_id);
    writer.close().map_err(EngineError::Output)?;

    let finished_at = chrono::Utc::now();
    let run = provenance::RunRecord::new(spec, &input, opts, &run_id, started_at, finished_at, &outcome);
    prov.write(&out.path("provenance.jsonl"), &run).map_err(EngineError::Output)?;
    if let Some(dir) = &opts.state_dir {
        // Tags not in this run keep their earlier state.
        for (tag, st) in state_in {
            state_out.entry(tag).or_insert(st);
        }
        state::save(dir, &state_out).map_err(EngineError::State)?;
    }
    out.commit().map_err(EngineError::Output)?;
    outcome.outputs = vec![opts.out_dir.join("cleaned.parquet"), opts.out_dir.join("provenance.jsonl")];
    outcome.seconds = started.elapsed().as_secs_f64();
    Ok(outcome)
}

/// Content-derived run id: the same tool version, pipeline, inputs and window
/// give the same id, so a repeated run writes identical files.
fn run_id(spec: &PipelineSpec, input: &InputSet, opts: &RunOptions) -> String {
    let mut h = Sha256::new();
    h.update(env!("CARGO_PKG_VERSION"));
    h.update(&spec.sha256);
    for f in input.files() {
        h.update(&f.sha256);
    }
    if let Some((a, b)) = opts.window {
        h.update(a.to_le_bytes());
        h.update(b.to_le_bytes());
    }
    hex::encode(&h.finalize()[..8])
}

/// Surveys every tag of the units for abrupt changes (see [`survey`]).
fn run_survey(input: &InputSet, units: &[Unit], chunk: usize, pool: &rayon::ThreadPool) -> Result<Survey, EngineError> {
    let mut out = Survey::new();
    for batch in units.chunks(chunk) {
        let mut names = Vec::new();
        let mut periods = BTreeMap::new();
        for (t, r) in batch.iter().flat_map(|u| u.tags.iter()) {
            // Exception-reported tags store only movements: every stored
            // sample is a change by construction, so they give no evidence.
            if r.settings.sampling == crate::series::Sampling::Regular {
                names.push(t.clone());
                periods.insert(t.clone(), (r.settings.period_us, r.group.as_ref().map(|g| g.id.clone())));
            }
        }
        // Each thread decodes and surveys its own share of the chunk (tags
        // in file order, so a share is a contiguous stretch of a tag-ordered
        // file): this phase reads the whole input once more, and decoding
        // is most of its cost.
        let share = names.len().div_ceil(pool.current_num_threads()).max(1);
        let found: Vec<Vec<(String, Vec<i64>)>> = pool
            .install(|| {
                names
                    .par_chunks(share)
                    .map(|part| {
                        let series = input.read_tags(part)?;
                        Ok(series
                            .iter()
                            .map(|s| {
                                let period =
                                    periods.get(&s.tag).and_then(|p| p.0).or_else(|| infer_period_us(&s.ts_us));
                                (s.tag.clone(), survey::change_times(s, period.unwrap_or(1_000_000)))
                            })
                            .collect())
                    })
                    .collect::<crate::io::Result<_>>()
            })
            .map_err(EngineError::Input)?;
        for (tag, times) in found.into_iter().flatten() {
            let group = periods.get(&tag).and_then(|p| p.1.as_deref());
            out.add(&tag, group, &times);
        }
    }
    out.finish();
    Ok(out)
}

fn run_unit(
    unit: &Unit,
    series: Vec<TagSeries>,
    states: Vec<BTreeMap<String, serde_json::Value>>,
    survey: Option<&Survey>,
    input: &InputSet,
) -> Vec<TagResult> {
    let mut works: Vec<TagWork> = Vec::with_capacity(series.len());
    let mut counts = Vec::with_capacity(series.len());
    for (s, state) in series.into_iter().zip(states) {
        let resolved = unit.tags.iter().find(|(t, _)| *t == s.tag).map(|(_, r)| r);
        let settings = resolved.map(|r| r.settings.clone()).unwrap_or_default();
        let period = settings.period_us.or_else(|| infer_period_us(&s.ts_us)).unwrap_or(1_000_000);
        counts.push(s.counts);
        // The readings move into the table (no copy of the series is kept).
        let table = TagTable::from_owned_series(s, period, settings.sampling);
        works.push(TagWork { table, settings: Arc::new(settings), report: Default::default(), state });
    }
    let group = unit.tags.first().and_then(|(_, r)| r.group.as_ref().map(|g| g.id.clone()));
    let error = run_chain(unit, &mut works, survey);
    works
        .into_iter()
        .zip(counts)
        .map(|(w, counts)| {
            // A failed tag keeps its raw readings, read again from the input
            // (failures are rare; the success path keeps no copy); the
            // provenance says why.
            let raw = |(t, e): (TagTable, Option<String>)| (ResultTable::Raw(t), e);
            let (table, error) = match &error {
                Some(e) => raw(failed_table(input, &w.table, e.clone())),
                None => match w.table.checked() {
                    Ok(t) => (ResultTable::Checked(t), None),
                    Err(failed) => {
                        let (t, e) = *failed;
                        raw(failed_table(input, &t, format!("internal check failed: {e}")))
                    }
                },
            };
            TagResult {
                table,
                work_report: w.report,
                state: w.state,
                counts,
                error,
                step_names: unit.names.clone(),
                group: group.clone(),
            }
        })
        .collect()
}

/// The output table of a tag whose chain failed: its readings as read,
/// unchanged, from a fresh read of the input. Should that read fail too (the
/// file changed under the run), the table is empty and the error says so.
fn failed_table(input: &InputSet, worked: &TagTable, error: String) -> (TagTable, Option<String>) {
    let (period, sampling) = (worked.period_us, worked.sampling);
    match input.read_tags(std::slice::from_ref(&worked.tag)).map(|mut v| v.pop()) {
        Ok(Some(s)) => (TagTable::from_owned_series(s, period, sampling), Some(error)),
        Ok(None) => {
            (empty_table(&worked.tag, period, sampling), Some(format!("{error}; its readings could not be read again")))
        }
        Err(e) => (
            empty_table(&worked.tag, period, sampling),
            Some(format!("{error}; its readings could not be read again: {e}")),
        ),
    }
}

fn empty_table(tag: &str, period: i64, sampling: crate::series::Sampling) -> TagTable {
    let s =
        TagSeries { tag: tag.to_string(), ts_us: vec![], values: vec![], quality: vec![], counts: Default::default() };
    TagTable::from_owned_series(s, period, sampling)
}

/// Runs the chain; a step error or panic fails the whole unit.
fn run_chain(unit: &Unit, works: &mut [TagWork], survey: Option<&Survey>) -> Option<String> {
    for (i, step) in unit.chain.iter().enumerate() {
        let ctx = StepContext { index: i as u16, survey };
        let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            if step.couples_tags() {
                step.apply(works, &ctx)
            } else {
                works.iter_mut().try_for_each(|w| step.apply(std::slice::from_mut(w), &ctx))
            }
        }));
        match result {
            Ok(Ok(())) => {}
            Ok(Err(e)) => return Some(e.to_string()),
            Err(panic) => {
                let msg = panic
                    .downcast_ref::<&str>()
                    .map(|s| s.to_string())
                    .or_else(|| panic.downcast_ref::<String>().cloned())
                    .unwrap_or_else(|| "unknown panic".into());
                return Some(format!("step `{}` panicked: {msg}", step.name()));
            }
        }
    }
    None
}

/// Writes the pending results that are next in tag order, as far as they go.
fn write_ready(
    pending: &mut BTreeMap<String, TagResult>,
    selected: &[String],
    next: &mut usize,
    writer: &mut CleanedWriter,
    prov: &mut provenance::Body,
    outcome: &mut RunOutcome,
    state_out: &mut BTreeMap<String, StepState>,
) -> Result<(), IoError> {
    while *next < selected.len() {
        let Some(r) = pending.remove(&selected[*next]) else { break };
        write_result(r, writer, prov, outcome, state_out)?;
        *next += 1;
    }
    Ok(())
}

/// Records a tag's result (summary, provenance, carried state) and hands
/// its table to the writer.
fn write_result(
    r: TagResult,
    writer: &mut CleanedWriter,
    prov: &mut provenance::Body,
    outcome: &mut RunOutcome,
    state_out: &mut BTreeMap<String, StepState>,
) -> Result<(), IoError> {
    let evs = if r.error.is_none() { events(&r.table, &r.step_names) } else { Vec::new() };
    let mut by_status = [0u64; 4];
    let mut faults: BTreeMap<&'static str, u64> = BTreeMap::new();
    // Blocks of unchanged rows (the common case) are counted whole.
    let t = &r.table;
    for block in crate::series::blocks(t.len()) {
        if !t.any_changed(block.clone()) {
            by_status[Status::Ok as usize] += block.len() as u64;
            continue;
        }
        for i in block {
            by_status[t.status[i] as usize] += 1;
            if let Some(f) = t.fault[i] {
                *faults.entry(f.as_str()).or_default() += 1;
            }
        }
    }
    for (total, n) in outcome.rows_by_status.iter_mut().zip(by_status) {
        *total += n;
    }
    for (f, c) in &faults {
        *outcome.faults.entry(f).or_default() += c;
    }
    outcome.events += evs.len() as u64;
    match &r.error {
        Some(e) => outcome.tags_failed.push((r.table.tag.clone(), e.clone())),
        None => outcome.tags_processed += 1,
    }
    prov.tag(&r, &by_status, &faults);
    for e in &evs {
        prov.event(e);
    }
    state_out.insert(r.table.tag.clone(), r.state);
    match r.table {
        ResultTable::Checked(t) => writer.write_checked(t),
        ResultTable::Raw(t) => writer.write_tag_owned(t),
    }
}

/// Statuses in output order, for summaries.
pub fn status_names() -> [&'static str; 4] {
    Status::ALL.map(Status::as_str)
}

/// Fault kinds in output order, for summaries.
pub fn fault_names() -> [&'static str; 7] {
    Fault::ALL.map(Fault::as_str)
}

/// Tags grouped by their group id (for `check`).
pub fn groups(spec: &PipelineSpec, tags: &[String]) -> BTreeMap<String, BTreeSet<String>> {
    let mut out: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for t in tags {
        if let Some(g) = spec.resolve(t).and_then(|r| r.group) {
            out.entry(g.id).or_default().insert(t.clone());
        }
    }
    out
}
