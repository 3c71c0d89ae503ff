//! Linear Gaussian state-space models: representation, Kalman filter,
//! smoother, likelihood, ARMA in companion form and maximum-likelihood fitting.
//!
//! No I/O here. The layers, each usable alone:
//!
//! - [`StateSpace`] (the matrices, see [`model`] for every symbol) and
//!   [`Observations`] (the data);
//! - [`filter()`] -> [`FilterOutput`]: Kalman filter with missing values and
//!   exact diffuse initialisation, log-likelihood by the prediction-error decomposition;
//! - [`smooth()`] -> [`SmootherOutput`]: smoothed states and variances;
//! - [`ModelSpec`]: `local-level`, `local-trend`, `arma(p,q)`, `const`, `noise` and sums;
//! - [`fit()`] -> [`FitResult`]: maximum likelihood.
//!
//! ```
//! use tagwright::ssm::{fit, FitOptions, ModelSpec, Observations};
//! let y: Vec<f64> = (0..200).map(|t| 10.0 + ((t * 37 % 11) as f64 - 5.0) * 0.3 + (t as f64 / 40.0).sin()).collect();
//! let spec: ModelSpec = "local-level".parse().unwrap();
//! let res = fit(&spec, &Observations::univariate(&y), &FitOptions::default()).unwrap();
//! assert!(res.converged);
//! assert_eq!(res.param_names, ["sigma2.obs", "sigma2.level"]);
//! ```

pub mod arma;
mod error;
pub mod filter;
pub mod fit;
pub mod lanes;
pub mod lyapunov;
pub mod model;
mod newton;
#[cfg(test)]
mod proptests;
mod scalar;
pub mod smoother;
pub mod spec;
#[cfg(test)]
mod tests;

pub use arma::MAX_ARMA_ORDER;
pub use error::{Result, SsmError};
pub use filter::{filter, filter_into, FilterOptions, FilterOutput, Path};
pub use fit::{fit, loglik, FitOptions, FitResult};
pub use model::{Observations, StateSpace, StepRule};
pub use smoother::{signal_of, signal_var_of, smooth, smooth_into, SmootherOutput};
pub use spec::{Component, ModelSpec, ParamKind};
