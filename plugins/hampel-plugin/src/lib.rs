//! `hampel`: an external tagwright plugin that finds spikes with a Hampel
//! filter (rolling median ± k·1.4826·MAD over a window of readings; see the
//! `tagwright-hampel` crate for the method) and rejects or flags them with
//! fault `spike`.
//!
//! Parameters (all optional):
//!
//! | key | default | meaning |
//! |---|---|---|
//! | `window` | 7 | readings per window, odd, 3 to 10001 |
//! | `k` | 3 | threshold in robust standard deviations |
//! | `action` | `reject` | `reject` (status `rejected`, no value) or `flag` (kept, fault set) |
//! | `min_sigma` | 0 | floor of the robust standard deviation, in the tag's units |
//!
//! Only kept readings (status `ok`) enter the windows, and only those
//! without a fault from an earlier step are tested. Each decision records
//! the robust z-score (x − median)/σ as its statistic and `k` as its
//! threshold.
//!
//! This is also the template of `docs/plugins.md`. tagwright's outputs are
//! estimates for reporting and analysis; they do not replace licensed
//! safety-instrumented systems (IEC 61511) or site procedures and must not
//! feed control or protection.

use tagwright_hampel::{Action, Hampel};
use tagwright_plugin_sdk::{export_plugin, Error, Fault, Plugin, Status, Tag};

/// The plugin: a configured filter.
struct HampelPlugin(Hampel);

impl Plugin for HampelPlugin {
    fn new(params: &tagwright_plugin_sdk::serde_json::Value) -> Result<Self, Error> {
        Hampel::from_params(params).map(HampelPlugin).map_err(Error::new)
    }

    fn process(&self, tag: &mut Tag<'_>) -> Result<(), Error> {
        let f = &self.0;
        let mut outliers = Vec::new();
        f.detect(tag.value(), |i| tag.status(i) == Status::Ok, |i| tag.is_clean(i), |i, z| outliers.push((i, z)));
        for (i, z) in outliers {
            match f.action {
                Action::Reject => tag.reject(i, Fault::Spike, z, f.k),
                Action::Flag => tag.flag(i, Fault::Spike, z, f.k),
            }
        }
        Ok(())
    }
}

export_plugin!(HampelPlugin, "hampel");
