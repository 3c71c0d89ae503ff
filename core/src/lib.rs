//! tagwright: a state-space data-quality pipeline for process historian tags.
//!
//! - [`ssm`]: the state-space mathematics (no I/O).
//! - [`io`]: readers (one tag's samples from a long-format CSV or Parquet file).
//! - [`rng`]: a seeded random number generator for simulations and the demo.
//!
//! tagwright's outputs are estimates for reporting and analysis. They do not
//! replace licensed safety-instrumented systems (IEC 61511), instrument
//! maintenance or site procedures, and must not be used for control or protection.

pub mod io;
pub mod rng;
pub mod ssm;
