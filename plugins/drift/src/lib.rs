//! The `drift` step of tagwright: bias of redundant transmitters estimated
//! from one multivariate state-space model of the group.
//!
//! A group of m transmitters measuring one quantity (a rule with
//! `group: redundant`) is modelled as y_i,t = x_t + b_i,t + e_i,t: a common
//! process x_t (random walk), a slowly wandering bias b_i,t per transmitter
//! (random walk whose variance comes from the stated `drift_rate`), and
//! independent noise per transmitter. The variances are fitted by maximum
//! likelihood on the run's window; the smoothed biases decide the rows:
//!
//! - three or more members, or a pair with a trusted member: each member's
//!   bias against the process is estimated ([`Mode::Attributed`]); rows with
//!   |b| above the tolerance get fault `drift` (or `step` after an abrupt
//!   change) and, by default, the corrected value raw - b (status `replaced`);
//! - a pair without a trusted member: only the difference is known
//!   ([`Mode::Pair`]); rows of both members are flagged (status `ok`), never
//!   corrected.
//!
//! The modules, in the order a group goes through them: [`params`] (YAML),
//! [`align`] (the members on one time axis), [`model`] (the state-space form
//! and start values), [`fit`] (maximum likelihood and the choice of biased
//! members), [`jumps`] (abrupt changes), [`analysis`] (all of it for one
//! group), [`state`] (carried between runs) and the step itself ([`DriftStep`]).
//! The equations and the references are in `docs/drift.md`.
//!
//! ```
//! use tagwright::plugin::Registry;
//! let mut reg = Registry::with_builtins();
//! tagwright_drift::register(&mut reg);
//! assert!(reg.make("drift", &serde_json::json!({"tolerance": 0.5})).is_ok());
//! assert!(reg.make("drift", &serde_json::json!({"tolerence": 0.5})).is_err());
//! ```

pub mod align;
pub mod analysis;
pub mod fit;
pub mod jumps;
pub mod lone;
pub mod model;
pub mod params;
pub mod state;
mod step;
#[cfg(test)]
mod tests;

pub use analysis::{Analysis, Mode};
pub use params::{DriftParams, GroupParams};
pub use step::{make, DriftStep};

use tagwright::plugin::Registry;

/// Registers the `drift` step.
pub fn register(reg: &mut Registry) {
    reg.register("drift", step::make, "bias of redundant transmitters against the group's process estimate");
}
