//! `misbehave`: does harm on purpose to the tags its parameters name, so
//! that tests can check the host contains it. Other tags get their first
//! reading flagged with fault `noise` (so a test can see the plugin ran).
//!
//! Parameters (lists of tag names): `panic_on` (panics inside `process`),
//! `error_on` (returns an error), `bad_status_on` (writes status code 9),
//! `bad_fault_on` (writes fault code 42), `fill_on` (marks a reading as an
//! inserted row), `keep_value_on` (rejects a reading but leaves its value),
//! `change_value_on` (changes a kept reading's value, status left `ok`);
//! and `fail_create: true` (refuses its parameters).

use tagwright_plugin_sdk::{export_plugin, parse_params, Error, Fault, Plugin, Status, Tag};

#[derive(Default, serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct Misbehave {
    #[serde(default)]
    panic_on: Vec<String>,
    #[serde(default)]
    error_on: Vec<String>,
    #[serde(default)]
    bad_status_on: Vec<String>,
    #[serde(default)]
    bad_fault_on: Vec<String>,
    #[serde(default)]
    fill_on: Vec<String>,
    #[serde(default)]
    keep_value_on: Vec<String>,
    #[serde(default)]
    change_value_on: Vec<String>,
    #[serde(default)]
    fail_create: bool,
}

impl Plugin for Misbehave {
    fn new(params: &serde_json::Value) -> Result<Self, Error> {
        let m: Misbehave = parse_params(params)?;
        if m.fail_create {
            return Err(Error::new("fail_create is set: refusing these parameters"));
        }
        Ok(m)
    }

    fn process(&self, tag: &mut Tag<'_>) -> Result<(), Error> {
        let name = tag.name().to_string();
        let on = |list: &[String]| list.contains(&name);
        if tag.is_empty() {
            return Ok(());
        }
        if on(&self.panic_on) {
            let rows: Vec<u8> = Vec::new();
            // An index out of bounds, as a real bug would do.
            let _ = rows[tag.len()];
        }
        if on(&self.error_on) {
            return Err(Error::new(format!("deliberate error for {name}")));
        }
        let cols = tag.columns_mut();
        if on(&self.bad_status_on) {
            cols.status[0] = 9;
        } else if on(&self.bad_fault_on) {
            cols.fault[0] = 42;
        } else if on(&self.fill_on) {
            cols.status[0] = Status::Filled.code();
        } else if on(&self.keep_value_on) {
            cols.status[0] = Status::Rejected.code();
            cols.fault[0] = Fault::Spike.code();
        } else if on(&self.change_value_on) {
            cols.value[0] += 1.0;
        } else {
            tag.flag(0, Fault::Noise, 1.0, 0.5);
        }
        Ok(())
    }
}

export_plugin!(Misbehave, "misbehave");
