//! Model specifications (`local-level`, `local-trend`, `arma(p,q)`, `const`,
//! `noise` and sums such as `local-level+arma(2,0)`), their parameters and the
//! state-space models they build.
//!
//! A sum stacks its components' states block-diagonally; y_t is the sum of
//! the components' first states plus observation noise (Harvey 1989, §2.3;
//! DK §3.2). Observation noise e_t ~ N(0, sigma2.obs) is part of the model
//! when it has a `local-level` or `local-trend` component (as in the
//! textbook local level model) or names `noise`; a lone `arma(p,q)` (plus
//! `const`) has none, since its own shocks play that part.
//!
//! | component | states | parameters (in order) | initial state |
//! |---|---|---|---|
//! | `const` | 1: mean | none | diffuse |
//! | `local-level` | 1: level mu | sigma2.level | diffuse |
//! | `local-trend` | 2: level mu, slope beta | sigma2.level, sigma2.slope | diffuse |
//! | `arma(p,q)` | max(p,q+1) (companion form) | phi.1..phi.p, theta.1..theta.q, sigma2.arma | stationary (Lyapunov) |
//! | `noise` | 0 | none (adds sigma2.obs) | |
//!
//! The parameter vector is `sigma2.obs` (when present) followed by the
//! components' parameters in the order written.

use std::fmt;
use std::str::FromStr;

use nalgebra::{DMatrix, DVector};

use super::arma::{self, MAX_ARMA_ORDER};
use super::lyapunov::solve_discrete_lyapunov;
use super::model::{StateBlock, StateSpace, StepRule};
use super::{Result, SsmError};

/// One additive component of a model.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Component {
    /// An unknown constant (diffuse).
    Constant,
    /// Random-walk level (diffuse).
    LocalLevel,
    /// Level and slope (diffuse).
    LocalTrend,
    /// Stationary ARMA(p,q) in companion form.
    Arma { p: usize, q: usize },
    /// Observation noise only.
    Noise,
}

impl Component {
    fn states(self) -> usize {
        match self {
            Component::Constant | Component::LocalLevel => 1,
            Component::LocalTrend => 2,
            Component::Arma { p, q } => arma::companion_dim(p, q),
            Component::Noise => 0,
        }
    }
}

impl fmt::Display for Component {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Component::Constant => write!(f, "const"),
            Component::LocalLevel => write!(f, "local-level"),
            Component::LocalTrend => write!(f, "local-trend"),
            Component::Arma { p, q } => write!(f, "arma({p},{q})"),
            Component::Noise => write!(f, "noise"),
        }
    }
}

/// What a parameter is, for transforms and reporting.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ParamKind {
    /// A variance (>= 0); optimised as its logarithm.
    Variance,
    /// An AR coefficient; the block is optimised through the stationarity transform.
    Ar,
    /// An MA coefficient; the block is optimised through the invertibility transform.
    Ma,
}

/// A validated model specification.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ModelSpec {
    components: Vec<Component>,
}

impl FromStr for ModelSpec {
    type Err = SsmError;

    fn from_str(s: &str) -> Result<Self> {
        let bad = |reason: String| SsmError::BadSpec { spec: s.to_string(), reason };
        let mut components = Vec::new();
        for part in s.split('+') {
            let part = part.trim();
            let c = match part {
                "const" => Component::Constant,
                "local-level" => Component::LocalLevel,
                "local-trend" => Component::LocalTrend,
                "noise" => Component::Noise,
                "" => return Err(bad("empty component (two `+` in a row, or a `+` at an end)".into())),
                _ => {
                    let inner = part.strip_prefix("arma(").and_then(|r| r.strip_suffix(')')).ok_or_else(|| {
                        bad(format!(
                            "unknown component `{part}`; expected local-level, local-trend, arma(p,q), const or noise"
                        ))
                    })?;
                    let (ps, qs) = inner
                        .split_once(',')
                        .ok_or_else(|| bad(format!("`{part}` needs two orders, as in arma(2,1)")))?;
                    let parse = |x: &str| {
                        x.trim()
                            .parse::<usize>()
                            .map_err(|_| bad(format!("`{}` in `{part}` is not a whole number", x.trim())))
                    };
                    let (p, q) = (parse(ps)?, parse(qs)?);
                    if p > MAX_ARMA_ORDER || q > MAX_ARMA_ORDER {
                        return Err(SsmError::OrderTooHigh { p, q, cap: MAX_ARMA_ORDER });
                    }
                    Component::Arma { p, q }
                }
            };
            components.push(c);
        }
        let count = |f: fn(&Component) -> bool| components.iter().filter(|c| f(c)).count();
        if count(|c| matches!(c, Component::LocalLevel | Component::LocalTrend)) > 1 {
            return Err(bad("at most one of local-level and local-trend (a trend already has a level)".into()));
        }
        if count(|c| matches!(c, Component::Arma { .. })) > 1 {
            return Err(bad("at most one arma component (two are not identifiable)".into()));
        }
        if count(|c| matches!(c, Component::Constant)) > 1 || count(|c| matches!(c, Component::Noise)) > 1 {
            return Err(bad("const and noise may appear once each".into()));
        }
        if count(|c| matches!(c, Component::Constant)) == 1
            && count(|c| matches!(c, Component::LocalLevel | Component::LocalTrend)) == 1
        {
            return Err(bad("const is redundant with a level (the level already has an unknown start)".into()));
        }
        if components.iter().all(|c| c.states() == 0) {
            return Err(bad("the model has no state; add local-level, local-trend, arma(p,q) or const".into()));
        }
        Ok(ModelSpec { components })
    }
}

impl fmt::Display for ModelSpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let parts: Vec<String> = self.components.iter().map(|c| c.to_string()).collect();
        write!(f, "{}", parts.join("+"))
    }
}

impl ModelSpec {
    /// The local-level model (random-walk level plus observation noise).
    pub fn local_level() -> Self {
        ModelSpec { components: vec![Component::LocalLevel] }
    }

    /// The components in the order written.
    pub fn components(&self) -> &[Component] {
        &self.components
    }

    /// True when the model has observation noise sigma2.obs.
    pub fn has_obs_noise(&self) -> bool {
        self.components.iter().any(|c| matches!(c, Component::LocalLevel | Component::LocalTrend | Component::Noise))
    }

    /// State dimension m.
    pub fn state_dim(&self) -> usize {
        self.components.iter().map(|c| c.states()).sum()
    }

    /// Number of diffuse initial states.
    pub fn n_diffuse(&self) -> usize {
        self.components
            .iter()
            .map(|c| match c {
                Component::Constant | Component::LocalLevel => 1,
                Component::LocalTrend => 2,
                _ => 0,
            })
            .sum()
    }

    /// Parameter names and kinds, in the order of the parameter vector.
    pub fn params(&self) -> Vec<(String, ParamKind)> {
        let mut out = Vec::new();
        if self.has_obs_noise() {
            out.push(("sigma2.obs".to_string(), ParamKind::Variance));
        }
        for c in &self.components {
            match *c {
                Component::LocalLevel => out.push(("sigma2.level".into(), ParamKind::Variance)),
                Component::LocalTrend => {
                    out.push(("sigma2.level".into(), ParamKind::Variance));
                    out.push(("sigma2.slope".into(), ParamKind::Variance));
                }
                Component::Arma { p, q } => {
                    out.extend((1..=p).map(|i| (format!("phi.{i}"), ParamKind::Ar)));
                    out.extend((1..=q).map(|i| (format!("theta.{i}"), ParamKind::Ma)));
                    out.push(("sigma2.arma".into(), ParamKind::Variance));
                }
                Component::Constant | Component::Noise => {}
            }
        }
        out
    }

    /// Parameter names only.
    pub fn param_names(&self) -> Vec<String> {
        self.params().into_iter().map(|(n, _)| n).collect()
    }

    /// Checks a parameter vector: length, finiteness, signs of variances,
    /// stationarity and invertibility of the ARMA part.
    pub fn validate(&self, params: &[f64]) -> Result<()> {
        let names = self.params();
        if params.len() != names.len() {
            return Err(SsmError::ParameterCount {
                model: self.to_string(),
                expected: names.len(),
                got: params.len(),
                names: self.param_names().join(", "),
            });
        }
        for ((name, kind), &value) in names.iter().zip(params) {
            if !value.is_finite() {
                return Err(SsmError::NonFiniteParameter { name: name.clone(), value });
            }
            if *kind == ParamKind::Variance && value < 0.0 {
                return Err(SsmError::NegativeVariance { name: name.clone(), value });
            }
        }
        let mut i = usize::from(self.has_obs_noise());
        for c in &self.components {
            match *c {
                Component::LocalLevel => i += 1,
                Component::LocalTrend => i += 2,
                Component::Arma { p, q } => {
                    arma::check_stationary(&params[i..i + p])?;
                    arma::check_invertible(&params[i + p..i + p + q])?;
                    i += p + q + 1;
                }
                _ => {}
            }
        }
        Ok(())
    }

    /// Builds the state-space model for a parameter vector.
    pub fn build(&self, params: &[f64]) -> Result<StateSpace> {
        self.validate(params)?;
        let m = self.state_dim();
        let g: usize = self
            .components
            .iter()
            .map(|c| match c {
                Component::LocalLevel | Component::Arma { .. } => 1,
                Component::LocalTrend => 2,
                _ => 0,
            })
            .sum();
        let mut z = DMatrix::zeros(1, m);
        let mut t = DMatrix::zeros(m, m);
        let mut r = DMatrix::zeros(m, g.max(1));
        let mut q = DMatrix::zeros(g.max(1), g.max(1));
        let mut p1_star = DMatrix::zeros(m, m);
        let mut p1_inf = DMatrix::zeros(m, m);
        let mut blocks = Vec::new();
        let mut h = 0.0;
        let mut i = 0;
        if self.has_obs_noise() {
            h = params[0];
            i = 1;
        }
        let (mut o, mut e) = (0, 0); // state offset, disturbance offset
        for c in &self.components {
            match *c {
                Component::Constant => {
                    z[(0, o)] = 1.0;
                    t[(o, o)] = 1.0;
                    p1_inf[(o, o)] = 1.0;
                    blocks.push(StateBlock { offset: o, dim: 1, rule: StepRule::Constant });
                }
                Component::LocalLevel => {
                    z[(0, o)] = 1.0;
                    t[(o, o)] = 1.0;
                    r[(o, e)] = 1.0;
                    q[(e, e)] = params[i];
                    p1_inf[(o, o)] = 1.0;
                    blocks.push(StateBlock { offset: o, dim: 1, rule: StepRule::RandomWalk { q: params[i] } });
                    i += 1;
                    e += 1;
                }
                Component::LocalTrend => {
                    z[(0, o)] = 1.0;
                    t[(o, o)] = 1.0;
                    t[(o, o + 1)] = 1.0;
                    t[(o + 1, o + 1)] = 1.0;
                    r[(o, e)] = 1.0;
                    r[(o + 1, e + 1)] = 1.0;
                    q[(e, e)] = params[i];
                    q[(e + 1, e + 1)] = params[i + 1];
                    p1_inf[(o, o)] = 1.0;
                    p1_inf[(o + 1, o + 1)] = 1.0;
                    blocks.push(StateBlock {
                        offset: o,
                        dim: 2,
                        rule: StepRule::Trend { q_level: params[i], q_slope: params[i + 1] },
                    });
                    i += 2;
                    e += 2;
                }
                Component::Arma { p: ap, q: aq } => {
                    let phi = &params[i..i + ap];
                    let theta = &params[i + ap..i + ap + aq];
                    let sigma2 = params[i + ap + aq];
                    let (tb, rb) = arma::companion(phi, theta);
                    let k = tb.nrows();
                    z[(0, o)] = 1.0;
                    t.view_mut((o, o), (k, k)).copy_from(&tb);
                    r.view_mut((o, e), (k, 1)).copy_from(&rb);
                    q[(e, e)] = sigma2;
                    let w = &rb * rb.transpose() * sigma2;
                    let pst = solve_discrete_lyapunov(&tb, &w)?;
                    p1_star.view_mut((o, o), (k, k)).copy_from(&pst);
                    blocks.push(StateBlock { offset: o, dim: k, rule: StepRule::WholePeriods });
                    i += ap + aq + 1;
                    e += 1;
                }
                Component::Noise => {}
            }
            o += c.states();
        }
        let mut model = StateSpace::new(z, DVector::from_element(1, h), t, r, q, DVector::zeros(m), p1_star, p1_inf);
        model.blocks = blocks;
        model.check_shapes();
        Ok(model)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_and_prints() {
        for s in
            ["local-level", "local-trend", "arma(2,1)", "local-level+arma(2,0)", "const+arma(1,1)", "arma(1,0)+noise"]
        {
            let spec: ModelSpec = s.parse().unwrap();
            assert_eq!(spec.to_string(), s);
        }
        let spec: ModelSpec = "local-level+arma(2,1)".parse().unwrap();
        assert_eq!(spec.param_names(), ["sigma2.obs", "sigma2.level", "phi.1", "phi.2", "theta.1", "sigma2.arma"]);
        assert_eq!(spec.state_dim(), 3);
        assert_eq!(spec.n_diffuse(), 1);
    }

    #[test]
    fn rejects_nonsense() {
        for s in [
            "",
            "level",
            "arma(2)",
            "arma(a,1)",
            "arma(11,0)",
            "local-level+local-trend",
            "arma(1,0)+arma(1,0)",
            "noise",
            "const+local-level",
            "local-level++noise",
        ] {
            assert!(s.parse::<ModelSpec>().is_err(), "{s} should be rejected");
        }
    }

    #[test]
    fn build_checks_parameters() {
        let spec: ModelSpec = "arma(2,1)".parse().unwrap();
        assert!(spec.build(&[0.5, -0.3, 0.4, 2.0]).is_ok());
        assert!(matches!(spec.build(&[0.5, 0.6, 0.4, 2.0]), Err(SsmError::NonStationary { .. })));
        assert!(matches!(spec.build(&[0.5, -0.3, 1.4, 2.0]), Err(SsmError::NonInvertible { .. })));
        assert!(matches!(spec.build(&[0.5, -0.3, 0.4, -2.0]), Err(SsmError::NegativeVariance { .. })));
        assert!(matches!(spec.build(&[f64::NAN, -0.3, 0.4, 2.0]), Err(SsmError::NonFiniteParameter { .. })));
        assert!(matches!(spec.build(&[0.5]), Err(SsmError::ParameterCount { .. })));
    }
}
