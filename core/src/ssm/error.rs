//! The error type of the state-space library.

/// What can go wrong when building, filtering or fitting a state-space model.
///
/// Dimension mismatches between matrices are programmer errors and panic
/// through `assert!`; everything that depends on data or on user-supplied
/// parameters is reported here.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum SsmError {
    /// A parameter is NaN or infinite.
    #[error("parameter `{name}` is not finite ({value})")]
    NonFiniteParameter { name: String, value: f64 },
    /// A variance parameter is negative.
    #[error("variance `{name}` must be >= 0, got {value}")]
    NegativeVariance { name: String, value: f64 },
    /// The AR polynomial 1 - phi_1 z - ... - phi_p z^p has a root on or inside the unit circle.
    #[error(
        "AR coefficients {phi:?} are not stationary (partial autocorrelation {pacf} at lag {lag} is outside (-1, 1))"
    )]
    NonStationary { phi: Vec<f64>, lag: usize, pacf: f64 },
    /// The MA polynomial 1 + theta_1 z + ... + theta_q z^q has a root on or inside the unit circle.
    #[error(
        "MA coefficients {theta:?} are not invertible (partial autocorrelation {pacf} at lag {lag} is outside (-1, 1))"
    )]
    NonInvertible { theta: Vec<f64>, lag: usize, pacf: f64 },
    /// An ARMA order above [`crate::ssm::MAX_ARMA_ORDER`].
    #[error("ARMA order ({p},{q}) exceeds the cap of {cap} for p and q")]
    OrderTooHigh { p: usize, q: usize, cap: usize },
    /// A model specification string that does not parse or makes no sense.
    #[error("model spec `{spec}`: {reason}")]
    BadSpec { spec: String, reason: String },
    /// A parameter vector of the wrong length for the model.
    #[error("model `{model}` takes {expected} parameters ({names}), got {got}")]
    ParameterCount { model: String, expected: usize, got: usize, names: String },
    /// Fewer observations than the fit needs.
    #[error("series has {n_obs} usable observations; fitting {n_params} parameters with {n_diffuse} diffuse states needs at least {needed}")]
    TooShort { n_obs: usize, n_params: usize, n_diffuse: usize, needed: usize },
    /// No observation at all.
    #[error("series has no observed (finite) values")]
    AllMissing,
    /// Every observation has the same value, so no variance can be estimated.
    #[error("series is constant (every observation equals {value}); its variances cannot be estimated")]
    Constant { value: f64 },
    /// An observation that is infinite (NaN marks a missing value and is allowed).
    #[error("observation {index} is not finite ({value}); use NaN for a missing value")]
    NonFiniteObservation { index: usize, value: f64 },
    /// The time step to the next observation is not a positive finite number.
    #[error("time step {index} is {value}; steps must be finite and > 0")]
    BadTimeStep { index: usize, value: f64 },
    /// The discrete Lyapunov equation P = T P T' + RQR' has no unique solution.
    #[error("the stationary covariance does not exist (I - T kron T is singular)")]
    LyapunovSingular,
    /// The optimiser stopped with an error (not merely without converging).
    #[error("the optimiser failed: {0}")]
    Optimiser(String),
    /// The model cannot be fitted as specified.
    #[error("model `{model}` cannot be fitted: {reason}")]
    NotFittable { model: String, reason: String },
}

/// Shorthand for results of this module.
pub type Result<T> = std::result::Result<T, SsmError>;
