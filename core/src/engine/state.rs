//! State carried from one run to the next: for each tag, each step's own
//! JSON value (filter state, detector statistics). Stored as one JSON file,
//! `state.json`, in the state directory, written atomically.

use std::collections::BTreeMap;
use std::path::Path;

pub(super) type State = BTreeMap<String, BTreeMap<String, serde_json::Value>>;

const FILE: &str = "state.json";

pub(super) fn load(dir: Option<&Path>) -> Result<State, String> {
    let Some(dir) = dir else { return Ok(State::new()) };
    let path = dir.join(FILE);
    match std::fs::read_to_string(&path) {
        Ok(text) => serde_json::from_str(&text).map_err(|e| format!("{}: {e}", path.display())),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(State::new()),
        Err(e) => Err(format!("{}: {e}", path.display())),
    }
}

pub(super) fn save(dir: &Path, state: &State) -> Result<(), String> {
    std::fs::create_dir_all(dir).map_err(|e| format!("{}: {e}", dir.display()))?;
    let path = dir.join(FILE);
    let tmp = dir.join(format!(".{FILE}.tmp"));
    let text = serde_json::to_string_pretty(state).map_err(|e| e.to_string())?;
    std::fs::write(&tmp, text).map_err(|e| format!("{}: {e}", tmp.display()))?;
    std::fs::rename(&tmp, &path).map_err(|e| format!("{}: {e}", path.display()))
}
