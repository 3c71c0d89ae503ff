//! Pipelines: the YAML configuration ([`config`]), the validated spec
//! ([`spec`]) and tag selection ([`select`]).
//!
//! ```
//! use std::path::Path;
//! use tagwright::pipeline::PipelineSpec;
//! use tagwright::plugin::Registry;
//!
//! let text = "version: 1\nrules:\n  - tags: \"FT-*.PV\"\n    range: [0, 400]\n    steps: [quality, range]\n";
//! let spec = PipelineSpec::parse(text, Path::new("plant.yaml"), &Registry::with_builtins()).unwrap();
//! let ft = spec.resolve("FT-101.PV").unwrap();
//! assert_eq!(ft.settings.range, Some((0.0, 400.0)));
//! assert!(spec.resolve("TT-2204A.PV").is_none());
//! ```

pub mod config;
pub mod select;
pub mod spec;

pub use config::{ConfigError, Problem};
pub use select::check_pattern;
pub use spec::*;
