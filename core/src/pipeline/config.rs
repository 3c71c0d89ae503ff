//! The pipeline YAML: raw serde structs that mirror the file (unknown keys
//! rejected), then validation into a [`PipelineSpec`]. The YAML libraries
//! (serde_yaml for the values, saphyr-parser for the lines of keys) are used
//! in this module only, so either can be replaced in one place.
//!
//! Errors name the file, the line and column, and the key path:
//!
//! ```text
//! pipelines/plant.yaml:14:9: rules[2].steps[1]: unknown step `fil`; known steps: quality, range
//! ```
//!
//! Indices in key paths count from 0 (`rules[0]` is the first rule). Syntax
//! errors, values of the wrong type and unknown or repeated keys stop at the
//! first ([`ConfigError::Yaml`]); invalid values (a bad glob, duration, time
//! zone, model, step ...) are all collected ([`ConfigError::Invalid`]).

use std::collections::HashMap;
use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use serde::de::{self, value::MapAccessDeserializer, IntoDeserializer, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Deserializer};
use sha2::{Digest, Sha256};

use super::select::check_pattern;
use super::spec::*;
use crate::plugin::{external, ExternalPlugin, Registry};
use crate::series::Sampling;
use crate::ssm::ModelSpec;

/// One thing wrong with a pipeline file, and where.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    /// Line in the file (1-based), where known.
    pub line: Option<usize>,
    /// Column in the line (1-based, in characters), where known.
    pub column: Option<usize>,
    /// Key path, as `rules[2].steps[1]` (indices from 0); empty for the whole file.
    pub key: String,
    pub message: String,
}

/// A pipeline that cannot be loaded.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ConfigError {
    /// The file could not be read.
    #[error("{}: cannot read the pipeline file: {source}", path.display())]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// Not UTF-8, not YAML, or YAML not of the pipeline's shape (a value of
    /// the wrong type, an unknown, repeated or missing key).
    #[error("{}", Listing(path, std::slice::from_ref(problem)))]
    Yaml { path: PathBuf, problem: Problem },
    /// Values that are not valid, every one found, in file order.
    #[error("{}", Listing(path, problems))]
    Invalid { path: PathBuf, problems: Vec<Problem> },
}

impl ConfigError {
    /// The pipeline file.
    pub fn path(&self) -> &Path {
        match self {
            ConfigError::Read { path, .. } | ConfigError::Yaml { path, .. } | ConfigError::Invalid { path, .. } => path,
        }
    }

    /// The problems found (none for a file that could not be read).
    pub fn problems(&self) -> &[Problem] {
        match self {
            ConfigError::Read { .. } => &[],
            ConfigError::Yaml { problem, .. } => std::slice::from_ref(problem),
            ConfigError::Invalid { problems, .. } => problems,
        }
    }
}

/// One line per problem: `file:line:column: key: message`.
struct Listing<'a>(&'a Path, &'a [Problem]);

impl fmt::Display for Listing<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, p) in self.1.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{}", self.0.display())?;
            if let Some(line) = p.line {
                write!(f, ":{line}")?;
                if let Some(col) = p.column {
                    write!(f, ":{col}")?;
                }
            }
            if !p.key.is_empty() {
                write!(f, ": {}", p.key)?;
            }
            write!(f, ": {}", p.message)?;
        }
        Ok(())
    }
}

impl PipelineSpec {
    /// Reads and validates the pipeline file at `path`; steps are checked
    /// against `registry`.
    pub fn load(path: &Path, registry: &Registry) -> Result<PipelineSpec, ConfigError> {
        let bytes = std::fs::read(path).map_err(|source| ConfigError::Read { path: path.to_path_buf(), source })?;
        let text = String::from_utf8(bytes).map_err(|e| {
            let at = e.utf8_error().valid_up_to();
            let before = &e.as_bytes()[..at];
            let line = before.iter().filter(|&&b| b == b'\n').count() + 1;
            // `before` is valid UTF-8; the column counts characters.
            let line_start = before.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
            let column = std::str::from_utf8(&before[line_start..]).map_or(0, |t| t.chars().count()) + 1;
            ConfigError::Yaml {
                path: path.to_path_buf(),
                problem: Problem {
                    line: Some(line),
                    column: Some(column),
                    key: String::new(),
                    message: "the file is not UTF-8 text; save it as UTF-8".into(),
                },
            }
        })?;
        PipelineSpec::parse(&text, path, registry)
    }

    /// Validates pipeline `text` read from `path` (used in messages, for the
    /// SHA-256 record and to resolve `plugins.allow`).
    pub fn parse(text: &str, path: &Path, registry: &Registry) -> Result<PipelineSpec, ConfigError> {
        let sha256 = hex::encode(Sha256::digest(text.as_bytes()));
        // Editors on some systems start UTF-8 files with a byte order mark.
        let text = text.strip_prefix('\u{feff}').unwrap_or(text);
        let positions = Positions::scan(text);
        let raw: RawPipeline = serde_yaml::from_str(text)
            .map_err(|e| ConfigError::Yaml { path: path.to_path_buf(), problem: yaml_problem(&e, text, &positions) })?;
        let mut check = Check { positions: &positions, problems: Vec::new() };
        let blank = text.lines().all(|l| l.trim().is_empty() || l.trim_start().starts_with('#'));
        let spec = check.pipeline(raw, blank, path, sha256, registry);
        match spec {
            Some(spec) if check.problems.is_empty() => Ok(spec),
            _ => {
                let mut problems = check.problems;
                problems.sort_by_key(|p| (p.line, p.column));
                Err(ConfigError::Invalid { path: path.to_path_buf(), problems })
            }
        }
    }
}

/// A serde_yaml error as a problem: its message without the location suffix,
/// its key path split off.
fn yaml_problem(e: &serde_yaml::Error, text: &str, positions: &Positions) -> Problem {
    let mut message = e.to_string();
    let (line, column) = match e.location() {
        Some(l) => {
            let suffix = format!(" at line {} column {}", l.line(), l.column());
            message = message.replacen(&suffix, "", 1);
            (Some(l.line()), Some(l.column()))
        }
        None => match positions.second_document {
            Some(p) => (Some(p.line), Some(p.column)),
            None => (None, None),
        },
    };
    if message.contains("more than one document") {
        message = "the file holds more than one YAML document (a second `---`); a pipeline is one document".into();
    }
    let mut key = String::new();
    if let Some((head, rest)) = message.split_once(": ") {
        if !head.is_empty() && !head.contains(char::is_whitespace) && !head.contains('`') {
            key = head.to_string();
            message = rest.to_string();
        }
    }
    if message.contains("unknown field `<<`") {
        message = "YAML merge keys (`<<`) are not supported; write the keys out, or set them in an earlier, broader \
                   rule"
            .into();
    }
    // A syntax error (no key path) on a line with a tab: most likely tab indentation.
    let tab = line.and_then(|l| text.lines().nth(l.saturating_sub(1))).is_some_and(|l| l.contains('\t'));
    if key.is_empty() && tab {
        message.push_str(" (this line holds a tab: indent YAML with spaces only)");
    }
    // serde_yaml places a repeated key at its map; point at the repetition.
    let repeated = message.strip_prefix("duplicate field `").and_then(|r| r.split_once('`')).map(|(f, _)| f);
    if let Some(field) = repeated {
        let full = if key.is_empty() { field.to_string() } else { format!("{key}.{field}") };
        if let Some(p) = positions.repeated.get(&full) {
            return Problem { line: Some(p.line), column: Some(p.column), key: full, message };
        }
    }
    Problem { line, column, key, message }
}

// ---------------------------------------------------------------------------
// Positions of keys, from the YAML events.

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Pos {
    line: usize,
    column: usize,
}

/// Where each key (for a map entry) or item (for a list entry) starts, by key
/// path; the first occurrence wins.
#[derive(Debug, Default)]
struct Positions {
    at: HashMap<String, Pos>,
    /// The second occurrence of a key written twice in one map.
    repeated: HashMap<String, Pos>,
    second_document: Option<Pos>,
}

impl Positions {
    /// Scans `text`; stops quietly at a syntax error (serde_yaml reports it).
    fn scan(text: &str) -> Positions {
        use saphyr_parser::Event;
        enum Frame {
            Map { path: String, key: Option<String> },
            Seq { path: String, next: usize },
        }
        let join =
            |parent: &str, key: &str| if parent.is_empty() { key.to_string() } else { format!("{parent}.{key}") };
        let mut out = Positions::default();
        let mut stack: Vec<Frame> = Vec::new();
        let mut documents = 0;
        for item in saphyr_parser::Parser::new_from_str(text) {
            let Ok((event, span)) = item else { break };
            let pos = Pos { line: span.start.line(), column: span.start.col() + 1 };
            let container = match &event {
                Event::DocumentStart(_) => {
                    documents += 1;
                    if documents == 2 {
                        out.second_document = Some(pos);
                    }
                    continue;
                }
                Event::MappingEnd | Event::SequenceEnd => {
                    stack.pop();
                    continue;
                }
                Event::Scalar(..) | Event::Alias(_) => None,
                Event::MappingStart(..) => Some(true),
                Event::SequenceStart(..) => Some(false),
                _ => continue,
            };
            let path = match stack.last_mut() {
                None => {
                    if documents > 1 {
                        continue;
                    }
                    String::new()
                }
                Some(Frame::Seq { path, next }) => {
                    let p = format!("{path}[{next}]");
                    *next += 1;
                    p
                }
                Some(Frame::Map { path, key }) => match key.take() {
                    // A value: its key's position stands for it.
                    Some(k) => join(path, &k),
                    None => {
                        let k = match &event {
                            Event::Scalar(v, ..) => v.to_string(),
                            _ => "?".to_string(),
                        };
                        let p = join(path, &k);
                        *key = Some(k);
                        if out.at.contains_key(&p) {
                            out.repeated.entry(p.clone()).or_insert(pos);
                        }
                        p
                    }
                },
            };
            out.at.entry(path.clone()).or_insert(pos);
            match container {
                Some(true) => stack.push(Frame::Map { path, key: None }),
                Some(false) => stack.push(Frame::Seq { path, next: 0 }),
                None => {}
            }
        }
        out
    }

    /// The position of `key`, or of its nearest written ancestor.
    fn find(&self, key: &str) -> Option<Pos> {
        let mut k = key;
        loop {
            if let Some(p) = self.at.get(k) {
                return Some(*p);
            }
            if k.is_empty() {
                return None;
            }
            k = if k.ends_with(']') {
                k.rfind('[').map_or("", |i| &k[..i])
            } else {
                k.rfind('.').map_or("", |i| &k[..i])
            };
        }
    }
}

// ---------------------------------------------------------------------------
// Raw structs: the file as written.

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPipeline {
    version: Option<i64>,
    site: Option<RawSite>,
    input: Option<RawInput>,
    shifts: Option<Vec<RawShift>>,
    output: Option<RawOutput>,
    plugins: Option<RawPlugins>,
    defaults: Option<RawSettings>,
    rules: Option<Vec<RawRule>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSite {
    timezone: Option<String>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawInput {
    format: Option<RawFormat>,
    columns: Option<RawColumns>,
    epoch_unit: Option<RawEpochUnit>,
    quality: Option<RawQuality>,
    duplicates: Option<RawDuplicates>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "lowercase")]
enum RawFormat {
    Long,
    Wide,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawColumns {
    tag: Option<String>,
    time: Option<String>,
    value: Option<String>,
    quality: Option<String>,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "lowercase")]
enum RawEpochUnit {
    S,
    Ms,
    Us,
    Ns,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "kebab-case")]
enum RawDuplicates {
    KeepBest,
    Error,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawShift {
    name: String,
    start: String,
    hours: f64,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawOutput {
    compression: Option<RawCompression>,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "lowercase")]
enum RawCompression {
    Zstd,
    Snappy,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPlugins {
    #[serde(default)]
    allow: Vec<String>,
}

/// The settings keys; `defaults` has exactly these.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSettings {
    units: Option<String>,
    range: Option<(f64, f64)>,
    period: Option<String>,
    sampling: Option<RawSampling>,
    model: Option<String>,
    uncertain_factor: Option<f64>,
    group: Option<RawGroup>,
}

/// A rule: `tags`, the settings keys and `steps` (serde cannot flatten with
/// `deny_unknown_fields`, hence the repetition).
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRule {
    tags: RawTags,
    units: Option<String>,
    range: Option<(f64, f64)>,
    period: Option<String>,
    sampling: Option<RawSampling>,
    model: Option<String>,
    uncertain_factor: Option<f64>,
    group: Option<RawGroup>,
    steps: Option<Vec<RawStep>>,
}

impl RawRule {
    fn split(self) -> (RawTags, RawSettings, Option<Vec<RawStep>>) {
        let settings = RawSettings {
            units: self.units,
            range: self.range,
            period: self.period,
            sampling: self.sampling,
            model: self.model,
            uncertain_factor: self.uncertain_factor,
            group: self.group,
        };
        (self.tags, settings, self.steps)
    }
}

/// `tags:` as one name or pattern, or a list.
#[derive(Debug)]
enum RawTags {
    One(String),
    List(Vec<String>),
}

impl<'de> Deserialize<'de> for RawTags {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawTags;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a tag name or glob, or a list of them")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<RawTags, E> {
                Ok(RawTags::One(v.to_string()))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<RawTags, E> {
                Ok(RawTags::One(v.to_string()))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<RawTags, E> {
                Ok(RawTags::One(v.to_string()))
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<RawTags, A::Error> {
                let mut out = Vec::new();
                while let Some(s) = seq.next_element::<String>()? {
                    out.push(s);
                }
                Ok(RawTags::List(out))
            }
        }
        d.deserialize_any(V)
    }
}

/// `sampling: regular` or `sampling: {exception: {deadband: X}}`.
#[derive(Debug, Clone, Copy)]
enum RawSampling {
    Regular,
    Exception(RawException),
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawException {
    deadband: f64,
}

impl<'de> Deserialize<'de> for RawSampling {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        const NAMES: &[&str] = &["regular", "exception"];
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawSampling;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("`regular` or `{exception: {deadband: NUMBER}}`")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<RawSampling, E> {
                match v {
                    "regular" => Ok(RawSampling::Regular),
                    "exception" => {
                        Err(E::custom("`exception` needs its deadband: write `{exception: {deadband: 0.5}}`"))
                    }
                    _ => Err(E::unknown_variant(v, NAMES)),
                }
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<RawSampling, A::Error> {
                let key = one_key(&mut map)?;
                if key != "exception" {
                    return Err(de::Error::unknown_variant(&key, &["exception"]));
                }
                let e = map.next_value::<RawException>()?;
                no_second_key(&mut map, "`sampling` takes one key (`exception`)")?;
                Ok(RawSampling::Exception(e))
            }
        }
        d.deserialize_any(V)
    }
}

/// `quality: auto | opc | opcua | {text: {good, uncertain, bad}}`.
#[derive(Debug)]
enum RawQuality {
    Auto,
    Opc,
    OpcUa,
    Text(RawQualityText),
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawQualityText {
    #[serde(default)]
    good: Vec<String>,
    #[serde(default)]
    uncertain: Vec<String>,
    #[serde(default)]
    bad: Vec<String>,
}

impl<'de> Deserialize<'de> for RawQuality {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        const NAMES: &[&str] = &["auto", "opc", "opcua", "text"];
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawQuality;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("`auto`, `opc`, `opcua` or `{text: {good: [...], uncertain: [...], bad: [...]}}`")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<RawQuality, E> {
                match v {
                    "auto" => Ok(RawQuality::Auto),
                    "opc" => Ok(RawQuality::Opc),
                    "opcua" => Ok(RawQuality::OpcUa),
                    "text" => Err(E::custom(
                        "`text` needs its words: write `{text: {good: [..], uncertain: [..], bad: [..]}}`",
                    )),
                    _ => Err(E::unknown_variant(v, NAMES)),
                }
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<RawQuality, A::Error> {
                let key = one_key(&mut map)?;
                if key != "text" {
                    return Err(de::Error::unknown_variant(&key, &["text"]));
                }
                let t = map.next_value::<RawQualityText>()?;
                no_second_key(&mut map, "`quality` takes one key (`text`)")?;
                Ok(RawQuality::Text(t))
            }
        }
        d.deserialize_any(V)
    }
}

/// `group: redundant` or `group: {kind: redundant, name: X, trusted: TAG}`.
#[derive(Debug)]
struct RawGroup {
    kind: RawGroupKind,
    name: Option<String>,
    trusted: Option<String>,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "lowercase")]
enum RawGroupKind {
    Redundant,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawGroupMap {
    kind: RawGroupKind,
    name: Option<String>,
    trusted: Option<String>,
}

impl<'de> Deserialize<'de> for RawGroup {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawGroup;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a group kind (`redundant`) or `{kind: redundant, name: NAME, trusted: TAG}`")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<RawGroup, E> {
                let kind = RawGroupKind::deserialize(v.into_deserializer())?;
                Ok(RawGroup { kind, name: None, trusted: None })
            }
            fn visit_map<A: MapAccess<'de>>(self, map: A) -> Result<RawGroup, A::Error> {
                let m = RawGroupMap::deserialize(MapAccessDeserializer::new(map))?;
                Ok(RawGroup { kind: m.kind, name: m.name, trusted: m.trusted })
            }
        }
        d.deserialize_any(V)
    }
}

/// A step: `name` or `name: parameters`.
#[derive(Debug)]
struct RawStep {
    name: String,
    params: serde_json::Value,
}

impl<'de> Deserialize<'de> for RawStep {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawStep;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a step name, or `name: {parameters}`")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<RawStep, E> {
                Ok(RawStep { name: v.to_string(), params: serde_json::Value::Null })
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<RawStep, A::Error> {
                let name = one_key(&mut map)?;
                let params = map.next_value::<Param>()?.0;
                no_second_key(
                    &mut map,
                    "a step is one name, or one `name: {parameters}` pair (indent the parameters under the \
                     step's name, and start each step with `- `)",
                )?;
                Ok(RawStep { name, params })
            }
        }
        d.deserialize_any(V)
    }
}

/// The first key of a map that must have exactly one.
fn one_key<'de, A: MapAccess<'de>>(map: &mut A) -> Result<String, A::Error> {
    map.next_key::<String>()?.ok_or_else(|| de::Error::custom("an empty map; expected one key"))
}

/// Errs if the map has a second key: `what` is written with one key only.
fn no_second_key<'de, A: MapAccess<'de>>(map: &mut A, what: &str) -> Result<(), A::Error> {
    match map.next_key::<String>()? {
        None => Ok(()),
        Some(k) => Err(de::Error::custom(format!("{what}, but `{k}` follows"))),
    }
}

/// A step parameter as JSON; non-finite numbers (`.inf`, `.nan`) are errors,
/// since JSON cannot hold them.
struct Param(serde_json::Value);

impl<'de> Deserialize<'de> for Param {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        use serde_json::Value;
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Value;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a parameter value")
            }
            fn visit_bool<E: de::Error>(self, v: bool) -> Result<Value, E> {
                Ok(Value::Bool(v))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<Value, E> {
                Ok(Value::from(v))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<Value, E> {
                Ok(Value::from(v))
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<Value, E> {
                serde_json::Number::from_f64(v)
                    .map(Value::Number)
                    .ok_or_else(|| E::custom(format!("{v} is not a usable parameter value; write a finite number")))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<Value, E> {
                Ok(Value::String(v.to_string()))
            }
            fn visit_unit<E: de::Error>(self) -> Result<Value, E> {
                Ok(Value::Null)
            }
            fn visit_none<E: de::Error>(self) -> Result<Value, E> {
                Ok(Value::Null)
            }
            fn visit_some<D2: Deserializer<'de>>(self, d: D2) -> Result<Value, D2::Error> {
                Param::deserialize(d).map(|p| p.0)
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Value, A::Error> {
                let mut out = Vec::new();
                while let Some(Param(v)) = seq.next_element()? {
                    out.push(v);
                }
                Ok(Value::Array(out))
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Value, A::Error> {
                let mut out = serde_json::Map::new();
                while let Some(k) = map.next_key::<String>()? {
                    let Param(v) = map.next_value()?;
                    if out.insert(k.clone(), v).is_some() {
                        return Err(de::Error::custom(format!("parameter `{k}` is given twice")));
                    }
                }
                Ok(Value::Object(out))
            }
        }
        d.deserialize_any(V).map(Param)
    }
}

// ---------------------------------------------------------------------------
// Validation.

/// Collects problems with their positions.
struct Check<'a> {
    positions: &'a Positions,
    problems: Vec<Problem>,
}

impl Check<'_> {
    fn fail(&mut self, key: &str, message: impl Into<String>) {
        let pos = self.positions.find(key);
        self.problems.push(Problem {
            line: pos.map(|p| p.line),
            column: pos.map(|p| p.column),
            key: key.to_string(),
            message: message.into(),
        });
    }

    fn line(&self, key: &str) -> usize {
        self.positions.find(key).map_or(1, |p| p.line)
    }

    /// `Some` unless a problem stops the spec from being built (problems
    /// found alongside are in `self.problems`).
    fn pipeline(
        &mut self,
        raw: RawPipeline,
        blank: bool,
        path: &Path,
        sha256: String,
        registry: &Registry,
    ) -> Option<PipelineSpec> {
        if blank {
            self.fail("", "the file is empty; a pipeline starts with `version: 1` (see docs/pipeline.md)");
            return None;
        }
        match raw.version {
            None => self.fail("version", "missing; write `version: 1` at the top of the file"),
            Some(1) => {}
            Some(v) => self.fail("version", format!("{v} is not supported; this tagwright reads version 1")),
        }
        let site = self.site(raw.site.unwrap_or_default());
        let input = self.input(raw.input.unwrap_or_default());
        let shifts = self.shifts(raw.shifts.unwrap_or_default());
        let output = OutputSpec {
            compression: match raw.output.unwrap_or_default().compression {
                None | Some(RawCompression::Zstd) => Compression::Zstd,
                Some(RawCompression::Snappy) => Compression::Snappy,
            },
        };
        let base = path.parent().unwrap_or(Path::new(""));
        let mut plugin_dirs = Vec::new();
        for (i, dir) in raw.plugins.unwrap_or_default().allow.into_iter().enumerate() {
            if dir.trim().is_empty() {
                self.fail(&format!("plugins.allow[{i}]"), "empty directory name");
            } else {
                plugin_dirs.push(base.join(dir));
            }
        }
        let mut defaults = PartialSettings::default();
        if let Some(d) = raw.defaults {
            if d.group.is_some() {
                self.fail(
                    "defaults.group",
                    "a group couples the tags of one rule; set `group` on a rule, not in defaults",
                );
            }
            defaults = self.settings("defaults", d);
        }
        let rules = match raw.rules {
            None => {
                self.fail("rules", "missing; a pipeline needs at least one rule (`rules:` with `tags` and `steps`)");
                Vec::new()
            }
            Some(r) if r.is_empty() => {
                self.fail("rules", "empty; a pipeline needs at least one rule");
                Vec::new()
            }
            Some(r) => {
                let plugins = PluginPlaces { base, allowed: &plugin_dirs };
                r.into_iter().enumerate().map(|(i, r)| self.rule(i, r, registry, &plugins)).collect()
            }
        };
        let mut plugins: Vec<crate::plugin::PluginInfo> = Vec::new();
        for p in rules.iter().flat_map(|r| r.steps.iter().flatten()).filter_map(|s| s.plugin.as_ref()) {
            if !plugins.contains(p.info()) {
                plugins.push(p.info().clone());
            }
        }
        Some(PipelineSpec {
            path: path.to_path_buf(),
            sha256,
            site: site?,
            input,
            shifts,
            output,
            plugin_dirs,
            plugins,
            defaults,
            rules,
        })
    }

    fn site(&mut self, raw: RawSite) -> Option<SiteSpec> {
        let Some(name) = raw.timezone else {
            return Some(SiteSpec { timezone: chrono_tz::Tz::UTC });
        };
        match name.trim().parse::<chrono_tz::Tz>() {
            Ok(timezone) => Some(SiteSpec { timezone }),
            Err(_) => {
                self.fail(
                    "site.timezone",
                    format!(
                        "unknown time zone `{name}`; use an IANA name such as Europe/Berlin, America/Chicago or UTC"
                    ),
                );
                None
            }
        }
    }

    fn input(&mut self, raw: RawInput) -> InputSpec {
        let format = match raw.format {
            None | Some(RawFormat::Long) => InputFormat::Long,
            Some(RawFormat::Wide) => InputFormat::Wide,
        };
        let mut columns = ColumnNames::default();
        if let Some(c) = raw.columns {
            if format == InputFormat::Wide {
                for (key, given) in [("tag", &c.tag), ("value", &c.value), ("quality", &c.quality)] {
                    if given.is_some() {
                        self.fail(
                            &format!("input.columns.{key}"),
                            "not used with `format: wide`, where every column but the time column is a tag",
                        );
                    }
                }
            }
            let mut take = |key: &str, given: Option<String>, slot: &mut String| {
                if let Some(name) = given {
                    if name.trim().is_empty() {
                        self.fail(&format!("input.columns.{key}"), "empty column name");
                    }
                    *slot = name;
                }
            };
            take("tag", c.tag, &mut columns.tag);
            take("time", c.time, &mut columns.time);
            take("value", c.value, &mut columns.value);
            if let Some(q) = c.quality {
                let mut quality = String::new();
                take("quality", Some(q), &mut quality);
                columns.quality = Some(quality);
            }
        }
        if format == InputFormat::Long {
            let mut named: Vec<(&str, &String)> =
                vec![("tag", &columns.tag), ("time", &columns.time), ("value", &columns.value)];
            if let Some(q) = &columns.quality {
                named.push(("quality", q));
            }
            let mut dup = None;
            for (i, (k, n)) in named.iter().enumerate() {
                if let Some((k0, _)) = named[..i].iter().find(|(_, m)| m == n) {
                    dup = Some((k0.to_string(), k.to_string(), n.to_string()));
                    break;
                }
            }
            if let Some((k0, k, n)) = dup {
                self.fail(&format!("input.columns.{k}"), format!("column `{n}` is already the {k0} column"));
            }
        }
        let epoch_unit = match raw.epoch_unit {
            None | Some(RawEpochUnit::S) => EpochUnit::Seconds,
            Some(RawEpochUnit::Ms) => EpochUnit::Milliseconds,
            Some(RawEpochUnit::Us) => EpochUnit::Microseconds,
            Some(RawEpochUnit::Ns) => EpochUnit::Nanoseconds,
        };
        let quality = match raw.quality {
            None | Some(RawQuality::Auto) => QualityCoding::Auto,
            Some(RawQuality::Opc) => QualityCoding::OpcByte,
            Some(RawQuality::OpcUa) => QualityCoding::OpcUa,
            Some(RawQuality::Text(t)) => self.quality_words(t),
        };
        let duplicates = match raw.duplicates {
            None | Some(RawDuplicates::KeepBest) => DuplicateRule::KeepBest,
            Some(RawDuplicates::Error) => DuplicateRule::Error,
        };
        InputSpec { format, columns, epoch_unit, quality, duplicates }
    }

    fn quality_words(&mut self, t: RawQualityText) -> QualityCoding {
        let key = "input.quality.text";
        let mut seen: HashMap<String, &str> = HashMap::new();
        for (class, words) in [("good", &t.good), ("uncertain", &t.uncertain), ("bad", &t.bad)] {
            for (i, w) in words.iter().enumerate() {
                let k = format!("{key}.{class}[{i}]");
                if w.trim().is_empty() {
                    self.fail(&k, "empty word");
                } else if let Some(first) = seen.insert(w.trim().to_lowercase(), class) {
                    self.fail(&k, format!("`{w}` is already a word for {first} (words are compared ignoring case)"));
                }
            }
        }
        if seen.is_empty() {
            self.fail(key, "no words given; list the quality words under good, uncertain and bad");
        }
        let words = |w: Vec<String>| w.into_iter().map(|s| s.trim().to_string()).collect();
        QualityCoding::Text { good: words(t.good), uncertain: words(t.uncertain), bad: words(t.bad) }
    }

    fn shifts(&mut self, raw: Vec<RawShift>) -> Vec<ShiftSpec> {
        let mut out: Vec<ShiftSpec> = Vec::new();
        for (i, s) in raw.into_iter().enumerate() {
            let key = format!("shifts[{i}]");
            let name = s.name.trim().to_string();
            if name.is_empty() || name.contains('/') || name.contains(char::is_whitespace) || name == "last" {
                self.fail(
                    &format!("{key}.name"),
                    format!("`{}` cannot be a shift name: use a word without spaces or `/`, other than `last`", s.name),
                );
            } else if let Some(j) = out.iter().position(|o| o.name == name) {
                self.fail(&format!("{key}.name"), format!("shift name `{name}` is already used by shifts[{j}]"));
            }
            let start = chrono::NaiveTime::parse_from_str(s.start.trim(), "%H:%M")
                .or_else(|_| chrono::NaiveTime::parse_from_str(s.start.trim(), "%H:%M:%S"));
            let start = match start {
                Ok(t) => t,
                Err(_) => {
                    self.fail(
                        &format!("{key}.start"),
                        format!("`{}` is not a local time of day; write HH:MM in quotes, as \"06:00\"", s.start),
                    );
                    chrono::NaiveTime::MIN
                }
            };
            if !(s.hours > 0.0 && s.hours <= 24.0) {
                self.fail(
                    &format!("{key}.hours"),
                    format!("{} hours: a shift lasts more than 0 and at most 24 hours", s.hours),
                );
            }
            out.push(ShiftSpec { name, start, hours: s.hours });
        }
        out
    }

    /// The settings keys of a rule or of `defaults` (`group` is done by the caller).
    fn settings(&mut self, key: &str, raw: RawSettings) -> PartialSettings {
        let mut out = PartialSettings { units: raw.units, ..PartialSettings::default() };
        if let Some(u) = &out.units {
            if u.trim().is_empty() {
                self.fail(&format!("{key}.units"), "empty units; leave the key out instead");
            }
        }
        if let Some((lo, hi)) = raw.range {
            if !(lo.is_finite() && hi.is_finite() && lo < hi) {
                self.fail(&format!("{key}.range"), format!("[{lo}, {hi}]: write [low, high] with finite low < high"));
            } else {
                out.range = Some((lo, hi));
            }
        }
        if let Some(p) = raw.period {
            match parse_duration_us(p.trim()) {
                Ok(us) if us > 0 => out.period_us = Some(us),
                Ok(_) => self.fail(&format!("{key}.period"), "the sampling period must be longer than zero"),
                Err(e) => self.fail(&format!("{key}.period"), e),
            }
        }
        match raw.sampling {
            None => {}
            Some(RawSampling::Regular) => out.sampling = Some(Sampling::Regular),
            Some(RawSampling::Exception(RawException { deadband })) => {
                if deadband.is_finite() && deadband >= 0.0 {
                    out.sampling = Some(Sampling::Exception { deadband });
                } else {
                    self.fail(
                        &format!("{key}.sampling.exception.deadband"),
                        format!("deadband {deadband}: write a finite number >= 0, in the tag's units"),
                    );
                }
            }
        }
        if let Some(m) = raw.model {
            match m.parse::<ModelSpec>() {
                Ok(spec) => out.model = Some(spec),
                Err(e) => self.fail(&format!("{key}.model"), e.to_string()),
            }
        }
        if let Some(f) = raw.uncertain_factor {
            if f.is_finite() && f > 0.0 {
                out.uncertain_factor = Some(f);
            } else {
                self.fail(&format!("{key}.uncertain_factor"), format!("{f}: write a finite number > 0"));
            }
        }
        out
    }

    fn rule(&mut self, i: usize, raw: RawRule, registry: &Registry, plugins: &PluginPlaces) -> RuleSpec {
        let key = format!("rules[{i}]");
        let (tags, settings, steps) = raw.split();
        let patterns = match tags {
            RawTags::One(p) => {
                if let Err(e) = check_pattern(&p) {
                    self.fail(&format!("{key}.tags"), e);
                }
                vec![p]
            }
            RawTags::List(list) => {
                if list.is_empty() {
                    self.fail(&format!("{key}.tags"), "empty list; give a tag name, a glob or a list of them");
                }
                for (j, p) in list.iter().enumerate() {
                    if let Err(e) = check_pattern(p) {
                        self.fail(&format!("{key}.tags[{j}]"), e);
                    }
                }
                list
            }
        };
        let tags = TagSelector { patterns };
        let group = settings.group.as_ref().map(|g| (g.kind, g.name.clone(), g.trusted.clone()));
        let mut settings = self.settings(&key, settings);
        if let Some((kind, name, trusted)) = group {
            let kind = match kind {
                RawGroupKind::Redundant => GroupKind::Redundant,
            };
            if let Some(n) = &name {
                if n.trim().is_empty() || n.contains(char::is_whitespace) {
                    self.fail(
                        &format!("{key}.group.name"),
                        format!("`{n}` cannot be a group name: use a word without spaces"),
                    );
                }
            }
            if let Some(t) = &trusted {
                if !tags.matches(t) {
                    self.fail(
                        &format!("{key}.group.trusted"),
                        format!("`{t}` is not one of the tags this rule selects"),
                    );
                }
            }
            let id = name.unwrap_or_else(|| format!("rule{}", i + 1));
            settings.group = Some(GroupSpec { id, kind, trusted });
        }
        let steps = steps.map(|steps| {
            let mut out = Vec::with_capacity(steps.len());
            for (j, s) in steps.into_iter().enumerate() {
                let skey = format!("{key}.steps[{j}]");
                if s.name == "plugin" {
                    let (params, plugin) = self.plugin_step(&skey, s.params, plugins);
                    out.push(StepSpec { name: s.name, params, line: self.line(&skey), plugin });
                    continue;
                }
                if let Err(e) = registry.make(&s.name, &s.params) {
                    self.fail(&skey, e);
                }
                out.push(StepSpec { name: s.name, params: s.params, line: self.line(&skey), plugin: None });
            }
            out
        });
        RuleSpec { line: self.line(&key), tags, settings, steps }
    }

    /// A `plugin: {path, sha256, params}` step at `key`: loads and checks the
    /// plugin and makes an instance with the parameters (so that `check`
    /// reports bad parameters too). Returns the parameters and the plugin,
    /// `None` after a problem (recorded).
    fn plugin_step(
        &mut self,
        key: &str,
        raw: serde_json::Value,
        places: &PluginPlaces,
    ) -> (serde_json::Value, Option<Arc<ExternalPlugin>>) {
        #[derive(Deserialize)]
        #[serde(deny_unknown_fields)]
        struct RawPluginStep {
            path: String,
            sha256: String,
            #[serde(default)]
            params: serde_json::Value,
        }
        let r: RawPluginStep = match serde_json::from_value(raw) {
            Ok(r) => r,
            Err(e) => {
                self.fail(
                    &format!("{key}.plugin"),
                    format!("step `plugin`: {e}; write `plugin: {{path: FILE, sha256: HEX, params: {{...}}}}`"),
                );
                return (serde_json::Value::Null, None);
            }
        };
        if r.path.trim().is_empty() {
            self.fail(&format!("{key}.plugin.path"), "empty path; give the plugin's file");
            return (r.params, None);
        }
        // Relative to the pipeline file's directory, like plugins.allow.
        let path = places.base.join(&r.path);
        match external::load(&path, &r.sha256, places.allowed) {
            Ok(plugin) => match plugin.step(&r.params) {
                Ok(_) => (r.params, Some(plugin)),
                Err(e) => {
                    self.fail(&format!("{key}.plugin.params"), e);
                    (r.params, None)
                }
            },
            Err(e) => {
                let at = match e {
                    external::PluginError::BadSha256 { .. } | external::PluginError::HashMismatch { .. } => "sha256",
                    _ => "path",
                };
                self.fail(&format!("{key}.plugin.{at}"), format!("plugin: {e}"));
                (r.params, None)
            }
        }
    }
}

/// Where the plugins of a pipeline are looked for.
struct PluginPlaces<'a> {
    /// The directory of the pipeline file.
    base: &'a Path,
    /// `plugins.allow`, resolved against `base`.
    allowed: &'a [PathBuf],
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::series::Sampling;

    const FILE: &str = "pipelines/x.yaml";

    fn parse(text: &str) -> Result<PipelineSpec, ConfigError> {
        PipelineSpec::parse(text, Path::new(FILE), &Registry::with_builtins())
    }

    /// The error of `text` as displayed.
    fn err(text: &str) -> String {
        match parse(text) {
            Ok(_) => panic!("accepted:\n{text}"),
            Err(e) => e.to_string(),
        }
    }

    /// The error names the place (`"L:C"`, or `"L:"` for line L at any
    /// column, or `""` for no line) and holds `fragment`.
    #[track_caller]
    fn assert_err(text: &str, place: &str, fragment: &str) {
        let e = err(text);
        let want = match place {
            "" => format!("{FILE}: "),
            p if p.ends_with(':') => format!("{FILE}:{p}"),
            p => format!("{FILE}:{p}: "),
        };
        assert!(e.contains(&want), "want {want:?} in\n{e}");
        assert!(e.contains(fragment), "want {fragment:?} in\n{e}");
    }

    /// A valid pipeline around one rule body (indented by four spaces).
    fn with_rule(body: &str) -> String {
        format!("version: 1\nrules:\n  - tags: \"FT-*.PV\"\n{body}")
    }

    const FULL: &str = r#"version: 1
site:
  timezone: Europe/Berlin
input:
  format: long
  columns: {tag: name, time: t, value: v, quality: q}
  epoch_unit: ms
  quality: {text: {good: [OK, Good], uncertain: [SUSPECT], bad: [BAD]}}
  duplicates: error
shifts:
  - {name: early, start: "06:00", hours: 8}
  - {name: late, start: "14:00:00", hours: 8.5}
output:
  compression: snappy
plugins:
  allow: [plugins/]
defaults:
  model: local-level
  uncertain_factor: 4
rules:
  - tags: "FT-*.PV"
    units: m3/h
    range: [0, 400]
    period: 5s
    sampling: regular
    model: local-level+arma(1,0)
    uncertain_factor: 2.5
    group: redundant
    steps:
      - quality
      - range: {action: reject}
  - tags: [TT-2204A.PV, TT-2204B.PV]
    sampling: {exception: {deadband: 0.2}}
    group: {kind: redundant, name: TT-2204, trusted: TT-2204A.PV}
    steps: [quality, range: {low: -20, high: 150, action: flag}]
"#;

    #[test]
    fn full_example_parses() {
        let s = parse(FULL).unwrap();
        assert_eq!(s.site.timezone, chrono_tz::Europe::Berlin);
        assert_eq!(s.sha256, hex::encode(Sha256::digest(FULL.as_bytes())));
        assert_eq!(s.input.format, InputFormat::Long);
        assert_eq!(s.input.columns.quality.as_deref(), Some("q"));
        assert_eq!(s.input.columns.tag, "name");
        assert_eq!(s.input.epoch_unit, EpochUnit::Milliseconds);
        assert_eq!(s.input.duplicates, DuplicateRule::Error);
        let QualityCoding::Text { good, uncertain, bad } = &s.input.quality else { panic!("{:?}", s.input.quality) };
        assert_eq!((good.len(), uncertain.len(), bad.len()), (2, 1, 1));
        assert_eq!(s.shifts.len(), 2);
        assert_eq!(s.shifts[1].start, chrono::NaiveTime::from_hms_opt(14, 0, 0).unwrap());
        assert_eq!(s.shifts[1].hours, 8.5);
        assert_eq!(s.output.compression, Compression::Snappy);
        assert_eq!(s.plugin_dirs, vec![PathBuf::from("pipelines/plugins/")]);
        assert_eq!(s.defaults.model.as_ref().map(|m| m.to_string()).as_deref(), Some("local-level"));
        let r0 = &s.rules[0];
        assert_eq!(r0.line, 21);
        assert_eq!(r0.settings.period_us, Some(5_000_000));
        assert_eq!(r0.settings.range, Some((0.0, 400.0)));
        assert_eq!(r0.settings.uncertain_factor, Some(2.5));
        assert_eq!(r0.settings.group.as_ref().map(|g| g.id.as_str()), Some("rule1"));
        let steps = r0.steps.as_ref().unwrap();
        assert_eq!(
            steps[0],
            StepSpec { name: "quality".into(), params: serde_json::Value::Null, line: 30, plugin: None }
        );
        assert_eq!(steps[1].params, serde_json::json!({"action": "reject"}));
        assert_eq!(steps[1].line, 31);
        let r1 = &s.rules[1];
        assert_eq!(r1.line, 32);
        assert_eq!(r1.tags.patterns, ["TT-2204A.PV", "TT-2204B.PV"]);
        assert_eq!(r1.settings.sampling, Some(Sampling::Exception { deadband: 0.2 }));
        let g = r1.settings.group.as_ref().unwrap();
        assert_eq!(
            (g.id.as_str(), g.kind, g.trusted.as_deref()),
            ("TT-2204", GroupKind::Redundant, Some("TT-2204A.PV"))
        );
        let steps = r1.steps.as_ref().unwrap();
        assert_eq!(steps[1].params, serde_json::json!({"low": -20, "high": 150, "action": "flag"}));
        assert_eq!(steps.iter().map(|s| s.line).collect::<Vec<_>>(), [35, 35]);
    }

    #[test]
    fn defaults_of_a_minimal_pipeline() {
        let s = parse("version: 1\nrules:\n  - {tags: FT-101.PV, steps: [quality]}\n").unwrap();
        assert_eq!(s.site.timezone, chrono_tz::Tz::UTC);
        assert_eq!(s.input.format, InputFormat::Long);
        assert_eq!(s.input.columns, ColumnNames::default());
        assert_eq!(s.input.epoch_unit, EpochUnit::Seconds);
        assert_eq!(s.input.quality, QualityCoding::Auto);
        assert_eq!(s.input.duplicates, DuplicateRule::KeepBest);
        assert!(s.shifts.is_empty() && s.plugin_dirs.is_empty());
        assert_eq!(s.output.compression, Compression::Zstd);
        assert_eq!(s.defaults, PartialSettings::default());
        assert_eq!(s.rules[0].line, 3);
    }

    #[test]
    fn syntax_and_shape_errors_have_line_and_key() {
        // YAML syntax.
        assert_err("version: 1\nrules: [\n", "3:1", "did not find expected node content");
        assert_err("version: 1\nrules:\n  - tags: a\n   steps: x\n", "4:", "");
        // Wrong type.
        assert_err(
            &with_rule("    units: [m3, h]\n"),
            "4:12",
            "rules[0].units: invalid type: sequence, expected a string",
        );
        assert_err(&with_rule("    range: [0, 1, 2]\n"), "4:", "rules[0].range: invalid length 3");
        assert_err("version: one\n", "1:", "version: invalid type: string \"one\"");
        // Unknown keys, anywhere.
        assert_err(&with_rule("    unit: m3/h\n"), "4:5", "rules[0]: unknown field `unit`, expected one of");
        assert_err("version: 1\nrule: []\n", "2:1", "unknown field `rule`");
        assert_err("version: 1\ninput:\n  columns: {tagname: x}\n", "3:", "input.columns: unknown field `tagname`");
        assert_err("version: 1\nsite:\n  tz: UTC\n", "3:3", "site: unknown field `tz`");
        // Unknown choices.
        assert_err(
            "version: 1\ninput:\n  format: lng\n",
            "3:11",
            "input.format: unknown variant `lng`, expected `long` or `wide`",
        );
        assert_err(
            "version: 1\ninput:\n  duplicates: keep\n",
            "3:",
            "unknown variant `keep`, expected `keep-best` or `error`",
        );
        assert_err("version: 1\ninput:\n  quality: {txt: {}}\n", "3:", "unknown variant `txt`, expected `text`");
        assert_err("version: 1\ninput:\n  quality: text\n", "3:", "`text` needs its words");
        assert_err("version: 1\noutput: {compression: gzip}\n", "2:", "output.compression: unknown variant `gzip`");
        assert_err(
            &with_rule("    group: spare\n"),
            "4:",
            "rules[0].group: unknown variant `spare`, expected `redundant`",
        );
        assert_err(&with_rule("    group: {kind: redundant, nam: x}\n"), "4:", "unknown field `nam`");
        assert_err(&with_rule("    sampling: exception\n"), "4:", "`exception` needs its deadband");
        assert_err(&with_rule("    sampling: {exception: {dead_band: 1}}\n"), "4:", "unknown field `dead_band`");
        // Repeated keys.
        assert_err(&with_rule("    units: a\n    units: b\n"), "5:5", "rules[0].units: duplicate field `units`");
        assert_err("version: 1\nversion: 1\n", "2:1", "version: duplicate field `version`");
        // Missing required keys.
        assert_err("version: 1\nrules:\n  - steps: [quality]\n", "3:", "rules[0]: missing field `tags`");
        assert_err("version: 1\nshifts:\n  - {name: a, start: \"06:00\"}\n", "3:", "missing field `hours`");
    }

    #[test]
    fn step_errors() {
        let e = err(&with_rule("    steps:\n      - quality\n      - fil\n"));
        assert!(
            e.contains("pipelines/x.yaml:6:9: rules[0].steps[1]: unknown step `fil`; known steps: quality, range"),
            "{e}"
        );
        assert_err(
            &with_rule("    steps: [quality, range: {actoin: flag}]\n"),
            "4:22",
            "rules[0].steps[1]: step `range`: unknown field `actoin`",
        );
        assert_err(
            &with_rule("    steps:\n      - range: {low: 5, high: 1}\n"),
            "5:9",
            "rules[0].steps[0]: step `range`: low (5) must be below high (1)",
        );
        // Parameters not indented under the step name: a map of two keys.
        assert_err(&with_rule("    steps:\n      - range:\n        action: flag\n"), "5:9", "rules[0].steps[0]: a step is one name, or one `name: {parameters}` pair (indent the parameters under the step's name, and start each step with `- `), but `action` follows");
        assert_err(&with_rule("    steps: [range: {low: .inf}]\n"), "4:", "inf is not a usable parameter value");
        assert_err(&with_rule("    steps: [range: {low: 1, low: 2}]\n"), "4:", "");
        assert_err(&with_rule("    steps: [[quality]]\n"), "4:", "expected a step name, or `name: {parameters}`");
    }

    #[test]
    fn semantic_errors_have_line_and_key() {
        assert_err(
            "version: 2\nrules: [{tags: a}]\n",
            "1:1",
            "version: 2 is not supported; this tagwright reads version 1",
        );
        assert_err("rules: [{tags: a}]\n", "1:1", "version: missing; write `version: 1`");
        assert_err("", "", "the file is empty");
        assert_err("# nothing\n\n", "", "the file is empty");
        assert_err("version: 1\n", "1:1", "rules: missing");
        assert_err("version: 1\nrules: []\n", "2:1", "rules: empty");
        assert_err(
            "version: 1\nsite:\n  timezone: Europe/Berlín\nrules: [{tags: a}]\n",
            "3:3",
            "site.timezone: unknown time zone `Europe/Berlín`",
        );
        // Tags.
        assert_err(
            "version: 1\nrules:\n  - tags: \"FT-[12\"\n",
            "3:5",
            "rules[0].tags: `FT-[12`: `[` at character 4 opens a class that is never closed",
        );
        assert_err(
            "version: 1\nrules:\n  - tags:\n      - FT-101.PV\n      - \"TT-[9-0]\"\n",
            "5:9",
            "rules[0].tags[1]: `TT-[9-0]`: range `9-0` runs backwards",
        );
        assert_err("version: 1\nrules:\n  - tags: []\n", "3:5", "rules[0].tags: empty list");
        assert_err("version: 1\nrules:\n  - tags: \"\"\n", "3:5", "rules[0].tags: empty tag name");
        // Settings.
        assert_err(&with_rule("    period: 5 s\n"), "4:5", "rules[0].period: `5 s` is not a duration");
        assert_err(&with_rule("    period: 5\n"), "4:5", "`5` is not a duration: write a number and a unit");
        assert_err(
            &with_rule("    period: 0s\n"),
            "4:5",
            "rules[0].period: the sampling period must be longer than zero",
        );
        assert_err(&with_rule("    period: 0.1us\n"), "4:5", "finer than a microsecond");
        assert_err(
            &with_rule("    range: [400, 0]\n"),
            "4:5",
            "rules[0].range: [400, 0]: write [low, high] with finite low < high",
        );
        assert_err(&with_rule("    range: [5, 5]\n"), "4:5", "rules[0].range");
        assert_err(&with_rule("    range: [0, .inf]\n"), "4:5", "finite low < high");
        assert_err(
            &with_rule("    model: local-levl\n"),
            "4:5",
            "rules[0].model: model spec `local-levl`: unknown component",
        );
        assert_err(
            &with_rule("    uncertain_factor: 0\n"),
            "4:5",
            "rules[0].uncertain_factor: 0: write a finite number > 0",
        );
        assert_err(
            &with_rule("    sampling: {exception: {deadband: -1}}\n"),
            "4:",
            "rules[0].sampling.exception.deadband: deadband -1",
        );
        assert_err(&with_rule("    units: \"\"\n"), "4:5", "rules[0].units: empty units");
        assert_err("version: 1\ndefaults:\n  period: 1x\nrules: [{tags: a}]\n", "3:3", "defaults.period:");
        assert_err(
            "version: 1\ndefaults:\n  group: redundant\nrules: [{tags: a}]\n",
            "3:3",
            "defaults.group: a group couples the tags of one rule",
        );
        // Groups.
        let e = err(&with_rule("    group: {kind: redundant, trusted: TT-1.PV}\n"));
        assert!(
            e.contains("pipelines/x.yaml:4:") && e.contains("rules[0].group.trusted: `TT-1.PV` is not one of the tags"),
            "{e}"
        );
        assert_err(
            &with_rule("    group: {kind: redundant, name: \"TT 1\"}\n"),
            "4:",
            "rules[0].group.name: `TT 1` cannot be a group name",
        );
    }

    #[test]
    fn shift_errors() {
        let shifts = |body: &str| format!("version: 1\nshifts:\n{body}rules: [{{tags: a}}]\n");
        let two =
            shifts("  - {name: early, start: \"06:00\", hours: 8}\n  - {name: early, start: \"14:00\", hours: 8}\n");
        assert_err(&two, "4:6", "shifts[1].name: shift name `early` is already used by shifts[0]");
        assert_err(
            &shifts("  - {name: a, start: \"06:00\", hours: 0}\n"),
            "3:",
            "shifts[0].hours: 0 hours: a shift lasts more than 0 and at most 24 hours",
        );
        assert_err(&shifts("  - {name: a, start: \"06:00\", hours: 25}\n"), "3:", "shifts[0].hours: 25 hours");
        assert_err(
            &shifts("  - {name: a, start: \"6 am\", hours: 8}\n"),
            "3:",
            "shifts[0].start: `6 am` is not a local time of day",
        );
        assert_err(&shifts("  - {name: a, start: \"24:00\", hours: 8}\n"), "3:", "shifts[0].start");
        assert_err(
            &shifts("  - {name: last, start: \"06:00\", hours: 8}\n"),
            "3:",
            "shifts[0].name: `last` cannot be a shift name",
        );
        assert_err(&shifts("  - {name: a/b, start: \"06:00\", hours: 8}\n"), "3:", "cannot be a shift name");
        // Unquoted times are read as text too.
        let s = parse(&shifts("  - {name: a, start: 06:00, hours: 8}\n")).unwrap();
        assert_eq!(s.shifts[0].start, chrono::NaiveTime::from_hms_opt(6, 0, 0).unwrap());
    }

    #[test]
    fn input_errors() {
        assert_err(
            "version: 1\ninput:\n  format: wide\n  columns: {time: ts, tag: name}\nrules: [{tags: a}]\n",
            "4:",
            "input.columns.tag: not used with `format: wide`",
        );
        assert_err(
            "version: 1\ninput:\n  columns: {tag: x, value: x}\nrules: [{tags: a}]\n",
            "3:",
            "input.columns.value: column `x` is already the tag column",
        );
        assert_err(
            "version: 1\ninput:\n  columns: {time: \" \"}\nrules: [{tags: a}]\n",
            "3:",
            "input.columns.time: empty column name",
        );
        let q = |w: &str| format!("version: 1\ninput:\n  quality:\n    text:\n{w}rules: [{{tags: a}}]\n");
        assert_err(
            &q("      good: [OK]\n      bad: [ok]\n"),
            "6:",
            "input.quality.text.bad[0]: `ok` is already a word for good",
        );
        assert_err(&q("      good: []\n"), "4:5", "input.quality.text: no words given");
        assert_err(
            "version: 1\nplugins: {allow: [\"\"]}\nrules: [{tags: a}]\n",
            "2:",
            "plugins.allow[0]: empty directory name",
        );
    }

    #[test]
    fn plugin_step_errors() {
        let step = |allow: &str, body: &str| {
            format!("version: 1\n{allow}rules:\n  - tags: a\n    steps:\n      - quality\n      - plugin: {body}\n")
        };
        let sha = "0".repeat(64);
        assert_err(
            &step("", &format!("{{path: x.so, sha256: \"{sha}\"}}")),
            "6:",
            "rules[0].steps[1].plugin.path: plugin: no directory is allowed to hold plugins",
        );
        assert_err(
            &step("plugins: {allow: [p]}\n", "{path: p/x.so, sha256: abc}"),
            "7:",
            "rules[0].steps[1].plugin.sha256: plugin: `abc` is not a SHA-256",
        );
        assert_err(
            &step("plugins: {allow: [p]}\n", &format!("{{path: p/x.so, sha256: \"{sha}\", parms: {{}}}}")),
            "7:",
            "rules[0].steps[1].plugin: step `plugin`: unknown field `parms`",
        );
        assert_err(&step("", "{sha256: abc}"), "6:", "step `plugin`: missing field `path`");
        assert_err(&step("plugins: {allow: [p]}\n", "{path: \" \", sha256: abc}"), "7:", "plugin.path: empty path");
        // The file is looked for relative to the pipeline's directory.
        assert_err(
            &step("plugins: {allow: [p]}\n", &format!("{{path: p/x.so, sha256: \"{sha}\"}}")),
            "7:",
            "pipelines/p/x.so: cannot find the plugin",
        );
    }

    #[test]
    fn every_problem_is_reported_in_file_order() {
        let text =
            "version: 1\nsite: {timezone: Mars/Olympus}\nrules:\n  - tags: \"[\"\n    period: fast\n    steps: [fil]\n";
        let e = parse(text).unwrap_err();
        let keys: Vec<&str> = e.problems().iter().map(|p| p.key.as_str()).collect();
        assert_eq!(keys, ["site.timezone", "rules[0].tags", "rules[0].period", "rules[0].steps[0]"]);
        assert_eq!(e.to_string().lines().count(), 4);
        assert_eq!(e.path(), Path::new(FILE));
    }

    #[test]
    fn byte_order_mark_tabs_and_merge_keys() {
        let bom = "\u{feff}version: 1\nrules: [{tags: a}]\n";
        let s = parse(bom).unwrap();
        assert_eq!(s.sha256, hex::encode(Sha256::digest(bom.as_bytes())));
        assert_eq!(s.rules[0].line, 2);
        assert_err("version: 1\nrules:\n\t- tags: a\n", "3:1", "indent YAML with spaces only");
        let merge = "version: 1\nrules:\n  - &base {tags: a, steps: [quality]}\n  - <<: *base\n    tags: b\n";
        assert_err(merge, "4:5", "rules[1]: YAML merge keys (`<<`) are not supported");
        // Anchors and aliases are fine.
        let alias = "version: 1\nrules:\n  - {tags: a, range: &r [0, 1], steps: &s [range]}\n  - {tags: b, range: *r, steps: *s}\n";
        let s = parse(alias).unwrap();
        assert_eq!(s.rules[1].settings.range, Some((0.0, 1.0)));
        assert_eq!(s.rules[1].steps.as_ref().unwrap()[0].line, 4);
    }

    #[test]
    fn more_than_one_document() {
        assert_err("version: 1\nrules: [{tags: a}]\n---\nversion: 1\n", "3:1", "more than one YAML document");
    }

    #[test]
    fn a_rule_that_selects_nothing_is_fine() {
        let s = parse("version: 1\nrules:\n  - tags: NONE-*\n    steps: [quality]\n").unwrap();
        assert!(s.resolve("FT-101.PV").is_none());
    }

    #[test]
    fn load_reads_the_file_and_hashes_it() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("p.yaml");
        let text =
            "version: 1\nplugins: {allow: [ext, /opt/plugins]}\nrules:\n  - {tags: FT-101.PV, steps: [quality]}\n";
        std::fs::write(&p, text).unwrap();
        let s = PipelineSpec::load(&p, &Registry::with_builtins()).unwrap();
        assert_eq!(s.path, p);
        assert_eq!(s.sha256, hex::encode(Sha256::digest(text.as_bytes())));
        assert_eq!(s.plugin_dirs, vec![dir.path().join("ext"), PathBuf::from("/opt/plugins")]);

        // Columns count characters: `Ä` is two bytes.
        let mut bytes = "version: 1\nrules:\n  - tags: ÄT-".as_bytes().to_vec();
        bytes.push(0xff);
        std::fs::write(&p, bytes).unwrap();
        let e = PipelineSpec::load(&p, &Registry::with_builtins()).unwrap_err().to_string();
        assert!(e.contains("p.yaml:3:14: the file is not UTF-8"), "{e}");

        let missing = dir.path().join("missing.yaml");
        let e = PipelineSpec::load(&missing, &Registry::with_builtins()).unwrap_err();
        assert!(matches!(e, ConfigError::Read { .. }) && e.problems().is_empty());
        assert!(e.to_string().contains("missing.yaml: cannot read the pipeline file"), "{e}");
    }

    #[test]
    fn positions_of_block_and_flow_keys() {
        let p = Positions::scan("a:\n  b: [x, {c: 1}]\n  - bad\n");
        assert_eq!(p.find("a.b"), Some(Pos { line: 2, column: 3 }));
        assert_eq!(p.find("a.b[1].c"), Some(Pos { line: 2, column: 11 }));
        assert_eq!(p.find("a.b[1].zz"), Some(Pos { line: 2, column: 10 }));
        assert_eq!(p.find("nothing"), Some(Pos { line: 1, column: 1 }));
        let p = Positions::scan("");
        assert_eq!(p.find("a"), None);
    }
}
