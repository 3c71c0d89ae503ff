//! End-to-end tests: the `tagwright` binary run on files, one module per topic.
//!
//! - `fit`: `tagwright fit` on simulated series in every input encoding;
//! - `bad_input`: damaged or wrong inputs made by the tests (Parquet bytes);
//! - `corpus`: every file of `tests/corpus/` against its manifest entry;
//! - `run`: `tagwright run` and `check`: output contract, provenance, determinism, exit codes;
//! - `quality`: the demo pipeline scored against the demo's truth (regression thresholds of issue 4).

mod bad_input;
mod corpus;
mod fit;
mod pipeline_schema;
mod quality;
mod run;
