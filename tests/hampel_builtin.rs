//! The example plugin's Hampel filter (`tagwright-hampel`) linked straight
//! into the host as a built-in [`Step`]: the same algorithm as
//! `plugins/hampel-plugin`, without the C ABI. The equivalence test checks
//! both give the same tables; the benchmark `plugin_abi` compares their speed.

use std::sync::Arc;

use tagwright::plugin::{Step, StepContext, StepError, TagWork};
use tagwright::series::{Fault, Status};
use tagwright_hampel::{Action, Hampel};

/// The built-in twin of the `hampel` plugin.
#[derive(Debug, Clone)]
pub struct HampelStep(Hampel);

/// Makes the step from the plugin's parameters.
pub fn make(params: &serde_json::Value) -> Result<Arc<dyn Step>, String> {
    Hampel::from_params(params).map(|h| Arc::new(HampelStep(h)) as Arc<dyn Step>)
}

impl Step for HampelStep {
    fn name(&self) -> &str {
        "hampel"
    }

    fn apply(&self, tags: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError> {
        let f = &self.0;
        for work in tags.iter_mut() {
            let t = &mut work.table;
            let mut outliers = Vec::new();
            f.detect(
                &t.value,
                |i| t.status[i] == Status::Ok,
                |i| t.status[i] == Status::Ok && t.fault[i].is_none(),
                |i, z| outliers.push((i, z)),
            );
            for (i, z) in outliers {
                match f.action {
                    Action::Reject => {
                        t.decide(i, Status::Rejected, Some(Fault::Spike), ctx.index, z, f.k);
                        t.value[i] = f64::NAN;
                        t.std[i] = f64::NAN;
                    }
                    Action::Flag => t.decide(i, Status::Ok, Some(Fault::Spike), ctx.index, z, f.k),
                }
            }
        }
        Ok(())
    }
}
