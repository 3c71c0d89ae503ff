//! Pipeline steps: the [`Step`] trait every cleaning step implements
//! (built-in or loaded from an external plugin), the [`Registry`] that makes
//! steps from their YAML name and parameters, the built-in steps that need
//! no model ([`QualityStep`], [`RangeStep`]), and the loader of external
//! plugins ([`external`]), whose steps implement the same trait.
//!
//! A step works on a [`TagWork`]: the tag's output table, the tag's resolved
//! settings, a report the step may fill in (model, parameters) and the state
//! the step carries from one run to the next. A step that couples tags (drift
//! against redundant transmitters) receives the whole group at once.

pub mod builtin;
pub mod external;
pub mod survey;

use std::collections::BTreeMap;
use std::sync::Arc;

use serde::{Deserialize, Serialize};

use crate::series::{Sampling, TagTable};
use crate::ssm::ModelSpec;

pub use builtin::{QualityStep, RangeStep};
pub use external::{ExternalPlugin, ExternalStep, PluginError, PluginInfo};
pub use survey::Survey;

/// Settings of one tag after the pipeline's rules are resolved.
#[derive(Debug, Clone, PartialEq)]
pub struct TagSettings {
    /// Engineering units (for reports only).
    pub units: Option<String>,
    /// Instrument range [low, high] in the tag's units.
    pub range: Option<(f64, f64)>,
    /// Model for the state-space steps (None: the step chooses a default).
    pub model: Option<ModelSpec>,
    /// Nominal sampling period in microseconds (None: inferred from the data).
    pub period_us: Option<i64>,
    /// How the source stored the tag.
    pub sampling: Sampling,
    /// Observation variance multiplier for uncertain-quality readings.
    pub uncertain_factor: f64,
    /// Name of the group of tags coupled with this one, if any.
    pub group: Option<String>,
    /// The member of that group trusted as reference (`group.trusted`), if any.
    pub group_trusted: Option<String>,
}

impl Default for TagSettings {
    fn default() -> Self {
        TagSettings {
            units: None,
            range: None,
            model: None,
            period_us: None,
            sampling: Sampling::Regular,
            uncertain_factor: 4.0,
            group: None,
            group_trusted: None,
        }
    }
}

/// What steps report about a tag for the provenance `tag` record.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct TagReport {
    /// Model used, as a spec string.
    pub model: Option<String>,
    /// Fitted or given parameters by name.
    pub params: BTreeMap<String, f64>,
    /// Log-likelihood of the model at those parameters.
    pub loglik: Option<f64>,
    /// Anything else a step wants on record (e.g. estimated bias at the end).
    pub extra: BTreeMap<String, serde_json::Value>,
    /// Notes for the reviewer.
    pub notes: Vec<String>,
}

/// One tag as the steps see it.
#[derive(Debug, Clone)]
pub struct TagWork {
    pub table: TagTable,
    pub settings: Arc<TagSettings>,
    pub report: TagReport,
    /// State carried between runs, by step name. Steps read their own entry
    /// at the start and write it at the end; the engine persists the map.
    pub state: BTreeMap<String, serde_json::Value>,
}

/// Where a step runs.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct StepContext<'a> {
    /// Position of the step in the tag's chain (recorded as `decided_by`).
    pub index: u16,
    /// The run's plant-wide survey of abrupt changes, when a step of the run
    /// asked for it ([`Step::uses_survey`]).
    pub survey: Option<&'a Survey>,
}

impl StepContext<'_> {
    /// A context for step `index` without a survey.
    pub fn new(index: u16) -> Self {
        StepContext { index, survey: None }
    }
}

/// A step failed for a tag (or group); the engine fails that tag only.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum StepError {
    /// The step could not process the data.
    #[error("step `{step}`: {message}")]
    Failed { step: String, message: String },
}

/// A cleaning step.
pub trait Step: Send + Sync {
    /// The step's name as written in pipelines and provenance.
    fn name(&self) -> &str;
    /// Version of the code that implements it (for provenance).
    fn version(&self) -> String {
        env!("CARGO_PKG_VERSION").to_string()
    }
    /// True if the step works on a group of coupled tags at once.
    fn couples_tags(&self) -> bool {
        false
    }
    /// True if the step needs the plant-wide survey of abrupt changes (the
    /// engine then surveys every selected tag before the steps run).
    fn uses_survey(&self) -> bool {
        false
    }
    /// Processes one tag (`tags.len() == 1`) or, for a coupling step, a group.
    fn apply(&self, tags: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError>;
}

/// Makes a step from its YAML parameters (`null` when the step is written
/// without parameters). Returns a message for the pipeline's error report.
pub type StepFactory = fn(&serde_json::Value) -> Result<Arc<dyn Step>, String>;

/// The steps a pipeline may name.
#[derive(Clone, Default)]
pub struct Registry {
    steps: BTreeMap<String, (StepFactory, &'static str)>,
}

impl Registry {
    /// An empty registry.
    pub fn new() -> Self {
        Registry::default()
    }

    /// The steps built into the library: `quality` and `range`.
    pub fn with_builtins() -> Self {
        let mut r = Registry::new();
        r.register("quality", builtin::make_quality, "reject bad-quality and non-finite readings");
        r.register("range", builtin::make_range, "reject readings outside the instrument range");
        r
    }

    /// Adds (or replaces) a step.
    pub fn register(&mut self, name: &str, factory: StepFactory, summary: &'static str) {
        self.steps.insert(name.to_string(), (factory, summary));
    }

    /// Makes the named step; `Err` says what is wrong (unknown name, bad parameters).
    pub fn make(&self, name: &str, params: &serde_json::Value) -> Result<Arc<dyn Step>, String> {
        match self.steps.get(name) {
            Some((factory, _)) => factory(params),
            None => Err(format!("unknown step `{name}`; known steps: {}", self.names().join(", "))),
        }
    }

    /// Names of the registered steps, sorted.
    pub fn names(&self) -> Vec<String> {
        self.steps.keys().cloned().collect()
    }

    /// Name and one-line summary of every step.
    pub fn summaries(&self) -> Vec<(String, &'static str)> {
        self.steps.iter().map(|(k, (_, s))| (k.clone(), *s)).collect()
    }
}

/// Helper for steps: the parameters as a typed struct, with a clear message.
pub fn parse_params<T: for<'de> Deserialize<'de> + Default>(
    step: &str,
    params: &serde_json::Value,
) -> Result<T, String> {
    if params.is_null() {
        return Ok(T::default());
    }
    serde_json::from_value(params.clone()).map_err(|e| format!("step `{step}`: {e}"))
}
