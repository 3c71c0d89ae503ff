//! The validated pipeline: what the engine runs. Made from the YAML by
//! [`super::config`]; every field here has passed validation.

use std::path::PathBuf;
use std::sync::Arc;

use crate::plugin::{ExternalPlugin, PluginInfo, Registry, Step, TagSettings};
use crate::series::Sampling;
use crate::ssm::ModelSpec;

/// A validated pipeline.
#[derive(Debug, Clone)]
pub struct PipelineSpec {
    /// The pipeline file.
    pub path: PathBuf,
    /// SHA-256 of the file's bytes, lower-case hex.
    pub sha256: String,
    pub site: SiteSpec,
    pub input: InputSpec,
    pub shifts: Vec<ShiftSpec>,
    pub output: OutputSpec,
    /// Directories external plugins may be loaded from, as written in
    /// `plugins.allow`, with relative ones joined to the directory of the
    /// pipeline file.
    pub plugin_dirs: Vec<PathBuf>,
    /// The external plugins the steps name, each once, in file order.
    pub plugins: Vec<PluginInfo>,
    /// Settings applied to every tag before the rules.
    pub defaults: PartialSettings,
    pub rules: Vec<RuleSpec>,
}

/// Site facts.
#[derive(Debug, Clone, PartialEq)]
pub struct SiteSpec {
    /// Time zone in which naive input times and shift starts are read.
    pub timezone: chrono_tz::Tz,
}

/// Layout of the input files.
#[derive(Debug, Clone, PartialEq)]
pub struct InputSpec {
    pub format: InputFormat,
    /// Column names: for `long`, tag, time, value and optionally quality; for
    /// `wide`, only time is used and every other numeric column is a tag.
    pub columns: ColumnNames,
    /// Unit of integer epoch time columns.
    pub epoch_unit: EpochUnit,
    /// How the quality column is coded.
    pub quality: QualityCoding,
    /// What to do with two samples of one tag at the same time.
    pub duplicates: DuplicateRule,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum InputFormat {
    Long,
    Wide,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ColumnNames {
    pub tag: String,
    pub time: String,
    pub value: String,
    pub quality: Option<String>,
}

impl Default for ColumnNames {
    fn default() -> Self {
        ColumnNames { tag: "tag".into(), time: "ts".into(), value: "value".into(), quality: None }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum EpochUnit {
    #[default]
    Seconds,
    Milliseconds,
    Microseconds,
    Nanoseconds,
}

/// Quality codings (see `docs/pipeline.md`).
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub enum QualityCoding {
    /// Integer column: values 0-255 as the classic OPC quality byte; larger
    /// values as OPC UA status codes. Text column: `Text` with the default words.
    #[default]
    Auto,
    /// Classic OPC quality byte: bits 7-6 = 11 good, 01 uncertain, 00 bad.
    OpcByte,
    /// OPC UA StatusCode: top two bits 00 good, 01 uncertain, 10/11 bad.
    OpcUa,
    /// Words, compared case-insensitively.
    Text { good: Vec<String>, uncertain: Vec<String>, bad: Vec<String> },
}

/// Rule for duplicate timestamps of one tag.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum DuplicateRule {
    /// Keep the sample of best quality, and among equals the last in file
    /// order; count the dropped ones (default).
    #[default]
    KeepBest,
    /// Stop with an error naming the tag, the time and the rows.
    Error,
}

/// A shift of the site's calendar.
#[derive(Debug, Clone, PartialEq)]
pub struct ShiftSpec {
    pub name: String,
    /// Local start time.
    pub start: chrono::NaiveTime,
    /// Length in hours (> 0, <= 24).
    pub hours: f64,
}

/// Output settings.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct OutputSpec {
    pub compression: Compression,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Compression {
    #[default]
    Zstd,
    Snappy,
}

/// Settings a rule (or the defaults) may set; unset fields leave earlier values.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct PartialSettings {
    pub units: Option<String>,
    pub range: Option<(f64, f64)>,
    pub model: Option<ModelSpec>,
    pub period_us: Option<i64>,
    pub sampling: Option<Sampling>,
    pub uncertain_factor: Option<f64>,
    /// Coupling of the tags this rule selects (`group:` key).
    pub group: Option<GroupSpec>,
}

/// Tags coupled by one rule (e.g. a redundant transmitter set).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct GroupSpec {
    /// Identifier used in provenance: `rule<N>` unless the rule names it.
    pub id: String,
    pub kind: GroupKind,
    /// A member trusted as reference (for a pair).
    pub trusted: Option<String>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GroupKind {
    /// Transmitters measuring the same quantity.
    Redundant,
}

/// One rule of the pipeline.
#[derive(Debug, Clone)]
pub struct RuleSpec {
    /// Line of the rule in the pipeline file (1-based).
    pub line: usize,
    pub tags: TagSelector,
    pub settings: PartialSettings,
    /// The chain of steps; `None` leaves the chain of an earlier rule in force.
    pub steps: Option<Vec<StepSpec>>,
}

/// A step as written in a rule.
#[derive(Debug, Clone, PartialEq)]
pub struct StepSpec {
    /// The step's name; `plugin` for an external plugin.
    pub name: String,
    /// Parameters (`null` when none were written); for a plugin, its `params`.
    pub params: serde_json::Value,
    /// Line in the pipeline file (1-based).
    pub line: usize,
    /// The loaded plugin of a `plugin` step.
    pub plugin: Option<Arc<ExternalPlugin>>,
}

impl StepSpec {
    /// Makes the step: an instance of its plugin, or the registry's step of
    /// that name. Built-in and external steps are the same [`Step`] to the engine.
    pub fn make(&self, registry: &Registry) -> Result<Arc<dyn Step>, String> {
        match &self.plugin {
            Some(p) => p.step(&self.params),
            None => registry.make(&self.name, &self.params),
        }
    }
}

/// Tag names and glob patterns (`*` any run of characters, `?` one
/// character, `[...]` a character class); a tag is selected if any matches.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TagSelector {
    pub patterns: Vec<String>,
}

/// The resolved configuration of one tag.
#[derive(Debug, Clone)]
pub struct ResolvedTag {
    pub settings: TagSettings,
    pub steps: Vec<StepSpec>,
    /// Indices of the rules that matched, in order.
    pub rules: Vec<usize>,
    /// The coupling group, if any.
    pub group: Option<GroupSpec>,
}

/// Parses a duration written as a number followed directly by a unit: `us`,
/// `ms`, `s`, `m` (minutes) or `h`, as in `500ms`, `5s`, `1.5m`, `1h`.
/// Returns whole microseconds (>= 0); a duration finer than a microsecond or
/// beyond the range of `i64` microseconds is an error. Steps use it for their
/// own duration parameters, so every duration in a pipeline reads the same.
pub fn parse_duration_us(text: &str) -> Result<i64, String> {
    const UNITS: [(&str, i64); 5] =
        [("us", 1), ("ms", 1_000), ("s", 1_000_000), ("m", 60_000_000), ("h", 3_600_000_000)];
    let bad =
        || format!("`{text}` is not a duration: write a number and a unit (us, ms, s, m, h), as in 500ms, 5s, 10m, 1h");
    let split = text.find(|c: char| !(c.is_ascii_digit() || c == '.')).ok_or_else(bad)?;
    let (number, unit) = text.split_at(split);
    let scale = UNITS.iter().find(|(u, _)| *u == unit).map(|&(_, f)| f).ok_or_else(bad)?;
    let (whole, frac) = number.split_once('.').unwrap_or((number, ""));
    let digits_ok = |d: &str| d.bytes().all(|b| b.is_ascii_digit());
    if whole.is_empty() || (number.contains('.') && frac.is_empty()) || !digits_ok(whole) || !digits_ok(frac) {
        return Err(bad());
    }
    let too_long = || format!("`{text}` is too long a duration");
    let whole: i64 = whole.parse().map_err(|_| too_long())?;
    let mut us = whole.checked_mul(scale).ok_or_else(too_long)?;
    // The fraction, exactly: digit k (1-based) is worth scale / 10^k.
    let mut rest = 0i128;
    let mut denom = 1i128;
    for d in frac.bytes() {
        denom = denom.checked_mul(10).ok_or_else(bad)?;
        rest = rest * 10 + i128::from(d - b'0');
    }
    let num = rest * i128::from(scale);
    if num % denom != 0 {
        return Err(format!("`{text}` is finer than a microsecond"));
    }
    let extra = i64::try_from(num / denom).map_err(|_| too_long())?;
    us = us.checked_add(extra).ok_or_else(too_long)?;
    Ok(us)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations() {
        for (text, us) in [
            ("500ms", 500_000),
            ("5s", 5_000_000),
            ("10m", 600_000_000),
            ("1h", 3_600_000_000),
            ("250us", 250),
            ("1.5s", 1_500_000),
            ("0.25h", 900_000_000),
            ("0s", 0),
            ("0.001ms", 1),
        ] {
            assert_eq!(parse_duration_us(text), Ok(us), "{text}");
        }
        for text in ["", "5", "s", "5 s", "5S", "5sec", "-5s", "1.s", ".5s", "1.2.3s", "5s ", "1e3s", "5d"] {
            let e = parse_duration_us(text).unwrap_err();
            assert!(e.contains("is not a duration"), "{text}: {e}");
        }
        assert!(parse_duration_us("0.0001ms").unwrap_err().contains("finer than a microsecond"));
        assert!(parse_duration_us("99999999999999999999h").unwrap_err().contains("too long"));
        assert!(parse_duration_us("9999999999h").unwrap_err().contains("too long"));
        assert!(parse_duration_us("0.00000000000000000000000000000000000000001s").is_err());
    }
}
