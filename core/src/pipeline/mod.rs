//! Pipelines: the YAML configuration ([`config`]), the validated spec
//! ([`spec`]) and tag selection.

pub mod spec;

pub use spec::*;
