//! tagwright: a state-space data-quality pipeline for process historian tags.
//!
//! - [`ssm`]: the state-space mathematics (no I/O).
//! - [`io`]: readers (one tag's samples from a long-format CSV or Parquet file).
//! - [`series`]: one tag's samples and its output table.
//! - [`pipeline`]: pipeline configuration.
//! - [`plugin`]: the step trait, the registry and the built-in model-free steps.
//! - [`rng`]: a seeded random number generator for simulations and the demo.
//! - [`demo`]: the built-in demo scenario (Demo Dairy Unit 3) with its known truth.
//!
//! tagwright's outputs are estimates for reporting and analysis. They do not
//! replace licensed safety-instrumented systems (IEC 61511), instrument
//! maintenance or site procedures, and must not be used for control or protection.

pub mod calendar;
pub mod demo;
pub mod engine;
pub mod io;
pub mod pipeline;
pub mod plugin;
pub mod rng;
pub mod series;
pub mod ssm;
pub mod stats;
pub mod tagmodel;
