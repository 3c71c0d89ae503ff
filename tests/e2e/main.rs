//! End-to-end tests: the `tagwright` binary run on files, one module per topic.
//!
//! - `fit`: `tagwright fit` on simulated series in every input encoding;
//! - `bad_input`: damaged or wrong inputs made by the tests (Parquet bytes);
//! - `corpus`: every file of `tests/corpus/` against its manifest entry;
//! - `run`: `tagwright run` and `check`: output contract, provenance, determinism, exit codes;
//! - `quality`: the demo pipeline scored against the demo's truth (regression thresholds of issue 4).
//! - `plugins`: external plugins: the example Hampel plugin, bad plugins refused or contained;
//! - `pipeline_schema`: shipped pipelines against the JSON Schema and the loader.

mod bad_input;
mod corpus;
mod fit;
mod pipeline_schema;
mod plugins;
mod quality;
mod run;
