//! Pipeline files against `docs/schema/pipeline.schema.json` (checked with
//! Python's `jsonschema` and `pyyaml` from the pinned `.venv`) and against
//! the loader: every shipped pipeline passes both, and the schema rejects the
//! shape errors the loader rejects.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use tagwright::pipeline::PipelineSpec;
use tagwright::plugin::Registry;
use tagwright_tests::{install_plugin, python, repo_root, Sandbox};

/// Validates each file against the schema; prints a JSON object mapping each
/// file to its list of errors (empty when valid). Exits 2 if the schema
/// itself is not a valid draft 2020-12 schema.
const VALIDATE: &str = r#"
import json, sys
import jsonschema, yaml
schema = json.load(open(sys.argv[1], encoding="utf-8"))
try:
    jsonschema.Draft202012Validator.check_schema(schema)
except jsonschema.SchemaError as e:
    print(f"the schema is not valid: {e}")
    sys.exit(2)
validator = jsonschema.Draft202012Validator(schema)
out = {}
for path in sys.argv[2:]:
    with open(path, encoding="utf-8") as f:
        doc = yaml.safe_load(f)
    out[path] = [f"{e.json_path}: {e.message}" for e in validator.iter_errors(doc)]
print(json.dumps(out))
"#;

fn schema_path() -> PathBuf {
    repo_root().join("docs").join("schema").join("pipeline.schema.json")
}

/// `pipelines/*.yaml` (and `*.yml`), sorted.
fn pipeline_files() -> Vec<PathBuf> {
    let dir = repo_root().join("pipelines");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .filter(|p| matches!(p.extension().and_then(|e| e.to_str()), Some("yaml" | "yml")))
        .collect();
    files.sort();
    for shipped in ["minimal.yaml", "water-treatment.yaml"] {
        assert!(files.iter().any(|p| p.ends_with(shipped)), "pipelines/{shipped} is missing");
    }
    files
}

/// Schema errors of each file.
fn schema_errors(files: &[PathBuf]) -> BTreeMap<PathBuf, Vec<String>> {
    let out = Command::new(python()).arg("-c").arg(VALIDATE).arg(schema_path()).args(files).output().unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "schema check failed:\n{stdout}{}", String::from_utf8_lossy(&out.stderr));
    let map: BTreeMap<String, Vec<String>> =
        serde_json::from_str(&stdout).unwrap_or_else(|e| panic!("not JSON ({e}):\n{stdout}"));
    map.into_iter().map(|(k, v)| (PathBuf::from(k), v)).collect()
}

fn load(path: &Path) -> Result<PipelineSpec, tagwright::pipeline::ConfigError> {
    // Every step the `tagwright` binary registers.
    let mut reg = Registry::with_builtins();
    tagwright_faults::register(&mut reg);
    tagwright_drift::register(&mut reg);
    tagwright_fill::register(&mut reg);
    PipelineSpec::load(path, &reg)
}

#[test]
fn every_pipeline_matches_the_schema() {
    let files = pipeline_files();
    let errors = schema_errors(&files);
    assert_eq!(errors.len(), files.len());
    let bad: Vec<String> = errors
        .iter()
        .filter(|(_, e)| !e.is_empty())
        .map(|(f, e)| format!("{}:\n  {}", f.display(), e.join("\n  ")))
        .collect();
    assert!(bad.is_empty(), "pipelines that do not match the schema:\n{}", bad.join("\n"));
}

#[test]
fn every_pipeline_loads() {
    for file in pipeline_files() {
        match load(&file) {
            Ok(spec) => assert!(!spec.rules.is_empty(), "{}", file.display()),
            Err(e) => panic!("{} does not load:\n{e}", file.display()),
        }
    }
}

/// Pipelines of the wrong shape: both the loader and the schema reject them.
const BAD: &[(&str, &str)] = &[
    ("unknown_top_key", "version: 1\nrule: [{tags: a}]\n"),
    ("unknown_rule_key", "version: 1\nrules:\n  - {tags: a, unit: m3/h}\n"),
    ("version_2", "version: 2\nrules: [{tags: a}]\n"),
    ("no_version", "rules: [{tags: a}]\n"),
    ("no_rules", "version: 1\n"),
    ("empty_rules", "version: 1\nrules: []\n"),
    ("no_tags", "version: 1\nrules: [{steps: [quality]}]\n"),
    ("empty_tag_list", "version: 1\nrules: [{tags: []}]\n"),
    ("empty_tag", "version: 1\nrules: [{tags: \"\"}]\n"),
    ("spaced_duration", "version: 1\nrules: [{tags: a, period: 5 s}]\n"),
    ("bare_number_duration", "version: 1\nrules: [{tags: a, period: 5}]\n"),
    ("day_duration", "version: 1\nrules: [{tags: a, period: 1d}]\n"),
    ("bad_format", "version: 1\ninput: {format: lng}\nrules: [{tags: a}]\n"),
    ("bad_epoch_unit", "version: 1\ninput: {epoch_unit: sec}\nrules: [{tags: a}]\n"),
    ("bad_duplicates", "version: 1\ninput: {duplicates: keep}\nrules: [{tags: a}]\n"),
    ("bad_quality", "version: 1\ninput: {quality: opc-ua}\nrules: [{tags: a}]\n"),
    ("quality_text_key", "version: 1\ninput: {quality: {text: {fine: [OK]}}}\nrules: [{tags: a}]\n"),
    ("bad_column_key", "version: 1\ninput: {columns: {name: x}}\nrules: [{tags: a}]\n"),
    ("bad_compression", "version: 1\noutput: {compression: gzip}\nrules: [{tags: a}]\n"),
    ("bad_plugins_key", "version: 1\nplugins: {dirs: [x]}\nrules: [{tags: a}]\n"),
    ("bad_site_key", "version: 1\nsite: {tz: UTC}\nrules: [{tags: a}]\n"),
    ("no_deadband", "version: 1\nrules: [{tags: a, sampling: {exception: {}}}]\n"),
    ("negative_deadband", "version: 1\nrules: [{tags: a, sampling: {exception: {deadband: -1}}}]\n"),
    ("bad_sampling", "version: 1\nrules: [{tags: a, sampling: irregular}]\n"),
    ("bad_group_kind", "version: 1\nrules: [{tags: a, group: {kind: spare}}]\n"),
    ("group_no_kind", "version: 1\nrules: [{tags: a, group: {name: x}}]\n"),
    ("group_in_defaults", "version: 1\ndefaults: {group: redundant}\nrules: [{tags: a}]\n"),
    ("steps_in_defaults", "version: 1\ndefaults: {steps: [quality]}\nrules: [{tags: a}]\n"),
    ("range_three", "version: 1\nrules: [{tags: a, range: [0, 1, 2]}]\n"),
    ("range_text", "version: 1\nrules: [{tags: a, range: [low, high]}]\n"),
    ("zero_factor", "version: 1\nrules: [{tags: a, uncertain_factor: 0}]\n"),
    ("hours_25", "version: 1\nshifts: [{name: a, start: \"06:00\", hours: 25}]\nrules: [{tags: a}]\n"),
    ("hours_0", "version: 1\nshifts: [{name: a, start: \"06:00\", hours: 0}]\nrules: [{tags: a}]\n"),
    ("shift_last", "version: 1\nshifts: [{name: last, start: \"06:00\", hours: 8}]\nrules: [{tags: a}]\n"),
    ("shift_start", "version: 1\nshifts: [{name: a, start: \"6 am\", hours: 8}]\nrules: [{tags: a}]\n"),
    ("shift_no_hours", "version: 1\nshifts: [{name: a, start: \"06:00\"}]\nrules: [{tags: a}]\n"),
    ("step_two_keys", "version: 1\nrules:\n  - tags: a\n    steps:\n      - range:\n        action: flag\n"),
    ("step_bad_param", "version: 1\nrules: [{tags: a, range: [0, 1], steps: [range: {actoin: flag}]}]\n"),
    ("step_bad_action", "version: 1\nrules: [{tags: a, range: [0, 1], steps: [range: {action: drop}]}]\n"),
    ("quality_bad_param", "version: 1\nrules: [{tags: a, steps: [quality: {uncertain: maybe}]}]\n"),
    ("plugin_bare", "version: 1\nplugins: {allow: [p]}\nrules: [{tags: a, steps: [plugin]}]\n"),
    ("plugin_no_sha", "version: 1\nplugins: {allow: [p]}\nrules: [{tags: a, steps: [plugin: {path: p/x.so}]}]\n"),
    (
        "plugin_bad_sha",
        "version: 1\nplugins: {allow: [p]}\nrules: [{tags: a, steps: [plugin: {path: p/x.so, sha256: abc}]}]\n",
    ),
    (
        "plugin_unknown_key",
        "version: 1\nplugins: {allow: [p]}\nrules:\n  - tags: a\n    steps:\n      - plugin:\n          path: p/x.so\n          \
         sha256: \"0000000000000000000000000000000000000000000000000000000000000000\"\n          parms: {}\n",
    ),
];

/// Pipelines both accept.
const GOOD: &[(&str, &str)] = &[
    ("smallest", "version: 1\nrules: [{tags: a}]\n"),
    (
        "step_null_params",
        "version: 1\nrules:\n  - tags: a\n    range: [0, 1]\n    steps:\n      - range:\n      - quality\n",
    ),
    ("decimal_duration", "version: 1\nrules: [{tags: a, period: 1.5s}]\n"),
    ("no_steps", "version: 1\nrules: [{tags: [a, \"b*\"], steps: []}]\n"),
    ("wide", "version: 1\ninput: {format: wide, columns: {time: Time}}\nrules: [{tags: \"*\"}]\n"),
    (
        "group_full",
        "version: 1\nrules: [{tags: [a, b], group: {kind: redundant, name: ab, trusted: a}, steps: [quality]}]\n",
    ),
];

#[test]
fn the_schema_rejects_what_the_loader_rejects() {
    let sb = Sandbox::new();
    let mut files = Vec::new();
    for (name, text) in BAD.iter().chain(GOOD) {
        files.push(sb.write(&format!("{name}.yaml"), text));
    }
    // A plugin step that loads: the example plugin, installed with its hash.
    let (lib, sha) = install_plugin(&sb.path().join("plugins"), "tagwright-hampel-plugin");
    let plugin = format!(
        "version: 1\nplugins: {{allow: [plugins]}}\nrules:\n  - tags: \"FT-*.PV\"\n    steps:\n      - quality\n      - plugin:\n          \
         path: plugins/{}\n          sha256: \"{sha}\"\n          params: {{window: 9, k: 3.5, action: flag}}\n",
        lib.file_name().unwrap().to_str().unwrap()
    );
    files.push(sb.write("plugin_good.yaml", plugin));
    let errors = schema_errors(&files);
    let mut disagreements = Vec::new();
    for (i, file) in files.iter().enumerate() {
        let want_ok = i >= BAD.len();
        let schema_ok = errors[file].is_empty();
        let loader = load(file);
        if schema_ok != want_ok {
            disagreements.push(format!(
                "{}: schema says {schema_ok}, want {want_ok}: {:?}",
                file.display(),
                errors[file]
            ));
        }
        match (&loader, want_ok) {
            (Ok(_), false) => disagreements.push(format!("{}: the loader accepts it", file.display())),
            (Err(e), true) => disagreements.push(format!("{}: the loader rejects it: {e}", file.display())),
            _ => {}
        }
    }
    assert!(disagreements.is_empty(), "{}", disagreements.join("\n"));
}
