//! Trust-region Newton minimisation with a finite-difference Hessian, for
//! the few free parameters of a tag's model.
//!
//! Each iteration evaluates the function on a fixed stencil around the
//! current point (x +- h_i e_i, and x + h_i e_i + h_j e_j for i < j), which
//! gives the central-difference gradient and a difference Hessian
//! (Nocedal & Wright 2006, Numerical Optimization, §8.1: eq. 8.7 for the
//! Hessian from function values). The stencil's points are known before any
//! of them is evaluated, so the caller evaluates them together (see
//! `Batch`). The step minimises the quadratic model inside a trust region
//! (Nocedal & Wright 2006, Algorithm 4.1 for the radius; §4.3 for the
//! subproblem, solved exactly in the Hessian's eigenbasis, including the
//! "hard case"). Near the optimum the iteration is Newton's method, which
//! converges quadratically: a handful of iterations from a fair start,
//! where a quasi-Newton method needs tens.

use nalgebra::{DMatrix, DVector};

/// Evaluates the objective at several points at once (`out[i]` = f(points[i])).
pub(crate) trait Batch {
    fn values(&self, points: &[Vec<f64>], out: &mut Vec<f64>);
}

/// How a run of [`minimise`] ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Ending {
    /// The stencil gradient met the tolerance.
    Converged,
    /// The last step and the next predicted one each gain less than
    /// `f_tol`: the function is flat there (typically a variance ratio
    /// running towards 0 or infinity, where f approaches its bound slowly).
    Flat,
    /// Left behind: even if every remaining iteration gained as much as the
    /// larger of the last two, the run would stay above the best value of
    /// another run (checked from the fifth iteration on).
    Behind,
    /// Iterations ran out, the function failed on the stencil, or the
    /// trust region collapsed.
    Stopped,
}

/// Result of one run of [`minimise`].
#[derive(Debug, Clone)]
pub(crate) struct NewtonResult {
    pub x: Vec<f64>,
    pub f: f64,
    pub iterations: u64,
    pub ending: Ending,
}

/// Objective values at or above this mark a failed evaluation.
const FAILED: f64 = 1e99;

/// True for a value that is neither failed nor NaN.
fn usable(v: f64) -> bool {
    v < FAILED
}

/// Where one run stands.
enum Phase {
    /// Needs the stencil around x.
    Stencil,
    /// Needs f at x + s.
    Trial {
        s: DVector<f64>,
        predicted: f64,
    },
    Done(Ending),
}

struct Run {
    x: Vec<f64>,
    fx: f64,
    radius: f64,
    /// Decrease of f in the last iteration and in the one before.
    last_gain: f64,
    prev_gain: f64,
    iter: u64,
    /// Step lengths of the current stencil.
    h: Vec<f64>,
    g: DVector<f64>,
    hess: DMatrix<f64>,
    eig: Option<nalgebra::SymmetricEigen<f64, nalgebra::Dyn>>,
    phase: Phase,
}

/// Minimises f from each start in `starts`, the runs side by side: each
/// round evaluates what every unfinished run needs (a stencil, or a trial
/// point with the stencil around it) in one [`Batch::values`] call. A run ends when max |gradient| <=
/// `grad_tol`, when f is flat to `f_tol` (see [`Ending::Flat`]), when it
/// falls behind another run (see [`Ending::Behind`]), or after `max_iter`
/// iterations.
pub(crate) fn minimise(
    f: &impl Batch,
    starts: Vec<Vec<f64>>,
    max_iter: u64,
    grad_tol: f64,
    f_tol: f64,
) -> Vec<NewtonResult> {
    let mut vals = Vec::new();
    f.values(&starts, &mut vals);
    let mut runs: Vec<Run> = starts
        .into_iter()
        .zip(vals.iter())
        .map(|(x, &fx)| {
            let k = x.len();
            let phase = if k == 0 {
                Phase::Done(Ending::Converged)
            } else if !usable(fx) {
                Phase::Done(Ending::Stopped)
            } else {
                Phase::Stencil
            };
            Run {
                x,
                fx,
                radius: 1.0,
                last_gain: f64::INFINITY,
                prev_gain: f64::INFINITY,
                iter: 0,
                h: vec![],
                g: DVector::zeros(k),
                hess: DMatrix::zeros(k, k),
                eig: None,
                phase,
            }
        })
        .collect();
    let mut points: Vec<Vec<f64>> = Vec::new();
    let mut owner: Vec<usize> = Vec::new();
    loop {
        // A run that cannot catch up with the best value so far stops.
        let best = runs.iter().map(|r| r.fx).fold(f64::INFINITY, f64::min);
        for r in runs.iter_mut() {
            if !matches!(r.phase, Phase::Done(_)) && r.iter >= 5 {
                let reach = r.fx - (max_iter - r.iter) as f64 * r.last_gain.max(r.prev_gain);
                if reach > best {
                    r.phase = Phase::Done(Ending::Behind);
                }
            }
        }
        points.clear();
        owner.clear();
        for (i, r) in runs.iter_mut().enumerate() {
            let centre: Vec<f64> = match &r.phase {
                Phase::Stencil => r.x.clone(),
                Phase::Trial { s, .. } => {
                    // The trial point, and (speculatively: most trials are
                    // taken) the stencil around it, so that a taken step
                    // needs no round of its own for the next stencil.
                    let trial: Vec<f64> = r.x.iter().zip(s.iter()).map(|(a, b)| a + b).collect();
                    points.push(trial.clone());
                    owner.push(i);
                    trial
                }
                Phase::Done(_) => continue,
            };
            let k = centre.len();
            r.h = centre.iter().map(|v| 1e-4 * v.abs().max(1.0)).collect();
            for j in 0..k {
                for sign in [1.0, -1.0] {
                    let mut p = centre.clone();
                    p[j] += sign * r.h[j];
                    points.push(p);
                    owner.push(i);
                }
            }
            for a in 0..k {
                for b in 0..a {
                    let mut p = centre.clone();
                    p[a] += r.h[a];
                    p[b] += r.h[b];
                    points.push(p);
                    owner.push(i);
                }
            }
        }
        if points.is_empty() {
            break;
        }
        f.values(&points, &mut vals);
        let mut from = 0;
        while from < owner.len() {
            let i = owner[from];
            let to = from + owner[from..].iter().take_while(|&&o| o == i).count();
            let r = &mut runs[i];
            match std::mem::replace(&mut r.phase, Phase::Stencil) {
                Phase::Stencil => r.take_stencil(&vals[from..to], grad_tol, f_tol),
                Phase::Trial { s, predicted } => {
                    r.take_trial(s, predicted, &points[from], vals[from], max_iter, f_tol);
                    if matches!(r.phase, Phase::Stencil) {
                        // Taken: the stencil around the new point is at hand.
                        r.take_stencil(&vals[from + 1..to], grad_tol, f_tol);
                    }
                }
                Phase::Done(e) => r.phase = Phase::Done(e),
            }
            from = to;
        }
    }
    runs.into_iter()
        .map(|r| NewtonResult {
            x: r.x,
            f: r.fx,
            iterations: r.iter,
            ending: match r.phase {
                Phase::Done(e) => e,
                _ => Ending::Stopped,
            },
        })
        .collect()
}

impl Run {
    /// Gradient and Hessian from the stencil's values; then the first trial step.
    fn take_stencil(&mut self, vals: &[f64], grad_tol: f64, f_tol: f64) {
        let k = self.x.len();
        if !vals.iter().all(|&v| usable(v)) {
            self.phase = Phase::Done(Ending::Stopped);
            return;
        }
        let (h, fx) = (&self.h, self.fx);
        for i in 0..k {
            let (fp, fm) = (vals[2 * i], vals[2 * i + 1]);
            self.g[i] = (fp - fm) / (2.0 * h[i]);
            self.hess[(i, i)] = (fp - 2.0 * fx + fm) / (h[i] * h[i]);
        }
        let mut next = 2 * k;
        for i in 0..k {
            for j in 0..i {
                let v = (vals[next] - vals[2 * i] - vals[2 * j] + fx) / (h[i] * h[j]);
                self.hess[(i, j)] = v;
                self.hess[(j, i)] = v;
                next += 1;
            }
        }
        if self.g.amax() <= grad_tol {
            self.phase = Phase::Done(Ending::Converged);
            return;
        }
        if !self.hess.iter().all(|v| v.is_finite()) {
            self.phase = Phase::Done(Ending::Stopped);
            return;
        }
        self.eig = Some(self.hess.clone().symmetric_eigen());
        self.next_trial(true, f_tol);
    }

    /// The step inside the current region, or the end of the run.
    fn next_trial(&mut self, first: bool, f_tol: f64) {
        let Some(eig) = &self.eig else {
            self.phase = Phase::Done(Ending::Stopped);
            return;
        };
        let (s, predicted) = subproblem(&self.g, &self.hess, eig, self.radius);
        if first && self.last_gain < f_tol && -predicted < f_tol {
            self.phase = Phase::Done(Ending::Flat);
            return;
        }
        let size = 1e-12 * (1.0 + self.x.iter().map(|v| v * v).sum::<f64>().sqrt());
        if predicted.is_nan() || predicted >= 0.0 || s.norm() <= size {
            // No predicted decrease left at the stencil's resolution.
            self.iter += 1;
            self.phase = Phase::Done(Ending::Flat);
            return;
        }
        self.phase = Phase::Trial { s, predicted };
    }

    /// Accepts or rejects the trial point (Nocedal & Wright 2006, Algorithm 4.1).
    fn take_trial(&mut self, s: DVector<f64>, predicted: f64, trial: &[f64], ft: f64, max_iter: u64, f_tol: f64) {
        let s_norm = s.norm();
        let rho = if usable(ft) { (ft - self.fx) / predicted } else { -1.0 };
        if rho < 0.25 {
            self.radius = 0.25 * s_norm;
        } else if rho > 0.75 && s_norm >= 0.99 * self.radius {
            self.radius = (2.0 * self.radius).min(1e3);
        }
        if rho > 1e-4 && ft < self.fx {
            self.prev_gain = self.last_gain;
            self.last_gain = self.fx - ft;
            self.x = trial.to_vec();
            self.fx = ft;
            self.iter += 1;
            self.phase = if self.iter >= max_iter { Phase::Done(Ending::Stopped) } else { Phase::Stencil };
            return;
        }
        if self.radius < 1e-10 {
            self.iter += 1;
            self.phase = Phase::Done(Ending::Stopped);
            return;
        }
        self.next_trial(false, f_tol);
    }
}

/// The step s minimising g's + s'Hs/2 subject to |s| <= radius, and the
/// predicted change g's + s'Hs/2.
fn subproblem(
    g: &DVector<f64>,
    hess: &DMatrix<f64>,
    eig: &nalgebra::SymmetricEigen<f64, nalgebra::Dyn>,
    radius: f64,
) -> (DVector<f64>, f64) {
    let lam = &eig.eigenvalues;
    let q = &eig.eigenvectors;
    let gt = q.transpose() * g; // g in the eigenbasis
    let (i_min, lam_min) =
        lam.iter().enumerate().fold((0, f64::INFINITY), |m, (i, &l)| if l < m.1 { (i, l) } else { m });
    let scale = lam.amax().max(g.norm()).max(f64::MIN_POSITIVE);
    let norm_at = |mu: f64| gt.iter().zip(lam.iter()).map(|(gi, li)| (gi / (li + mu)).powi(2)).sum::<f64>().sqrt();
    let step_at = |mu: f64| {
        let st = DVector::from_iterator(gt.len(), gt.iter().zip(lam.iter()).map(|(gi, li)| -gi / (li + mu)));
        q * st
    };
    let floor = (-lam_min).max(0.0);
    let s = if lam_min > 1e-12 * scale && norm_at(0.0) <= radius {
        step_at(0.0) // the Newton step
    } else {
        let lo0 = floor + 1e-12 * scale;
        if norm_at(lo0) < radius && lam_min >= -1e-12 * scale {
            // Positive semi-definite, singular: the regularised Newton step
            // (no move along a direction without gradient or curvature).
            step_at(lo0)
        } else if norm_at(lo0) < radius {
            // Hard case: the step along the lowest eigenvector reaches the boundary.
            let s = step_at(lo0);
            let tau = (radius * radius - s.norm_squared()).max(0.0).sqrt();
            s + q.column(i_min) * tau
        } else {
            // |s(mu)| falls as mu grows; bisect |s(mu)| = radius.
            let (mut lo, mut hi) = (lo0, floor + g.norm() / radius + 1e-12 * scale);
            for _ in 0..100 {
                let mid = 0.5 * (lo + hi);
                if norm_at(mid) > radius {
                    lo = mid;
                } else {
                    hi = mid;
                }
                if hi - lo <= 1e-12 * hi {
                    break;
                }
            }
            step_at(hi)
        }
    };
    let predicted = g.dot(&s) + 0.5 * s.dot(&(hess * &s));
    (s, predicted)
}

#[cfg(test)]
mod tests {
    use super::*;

    struct Rosenbrock(std::cell::Cell<u64>);
    impl Batch for Rosenbrock {
        fn values(&self, points: &[Vec<f64>], out: &mut Vec<f64>) {
            self.0.set(self.0.get() + points.len() as u64);
            out.clear();
            out.extend(points.iter().map(|p| (1.0 - p[0]).powi(2) + 100.0 * (p[1] - p[0] * p[0]).powi(2)));
        }
    }

    /// The Rosenbrock function (Nocedal & Wright 2006, eq. 2.22; minimum
    /// at (1, 1)) from the textbook start (-1.2, 1).
    #[test]
    fn finds_the_rosenbrock_minimum() {
        let f = Rosenbrock(std::cell::Cell::new(0));
        // (Central differences with h = 1e-4 are accurate to about h^2 f''' / 6,
        // some 1e-6 here, so the tolerance is 1e-5.)
        let r = minimise(&f, vec![vec![-1.2, 1.0]], 200, 1e-5, 0.0).remove(0);
        assert!(r.ending == Ending::Converged, "{:?} after {} iterations", r.ending, r.iterations);
        assert!((r.x[0] - 1.0).abs() < 1e-5 && (r.x[1] - 1.0).abs() < 1e-5, "{:?}", r.x);
        assert!(r.iterations < 60, "{} iterations", r.iterations);
    }

    struct Quadratic;
    impl Batch for Quadratic {
        fn values(&self, points: &[Vec<f64>], out: &mut Vec<f64>) {
            out.clear();
            // Indefinite far from the origin would be wrong; this one is convex
            // with very different curvatures, and flat (zero curvature) in x2.
            out.extend(points.iter().map(|p| 1e3 * (p[0] - 2.0).powi(2) + 1e-3 * (p[1] + 1.0).powi(2) + 0.0 * p[2]));
        }
    }

    #[test]
    fn a_flat_direction_and_bad_scaling_do_not_stall_it() {
        let r = minimise(&Quadratic, vec![vec![0.0, 0.0, 5.0]], 100, 1e-9, 0.0).remove(0);
        assert_eq!(r.ending, Ending::Converged);
        assert!((r.x[0] - 2.0).abs() < 1e-6 && (r.x[1] + 1.0).abs() < 1e-4, "{:?}", r.x);
        assert_eq!(r.x[2], 5.0, "no gradient, no move");
    }

    struct Saddle;
    impl Batch for Saddle {
        fn values(&self, points: &[Vec<f64>], out: &mut Vec<f64>) {
            out.clear();
            // A saddle at the origin; minima at x1 = +-1.
            out.extend(points.iter().map(|p| p[0] * p[0] + (p[1] * p[1] - 1.0).powi(2)));
        }
    }

    #[test]
    fn leaves_a_saddle_through_negative_curvature() {
        // At (0.5, 0) the gradient has no x1 part; the Hessian's negative
        // curvature in x1 (the hard case) must still move it off the ridge.
        let r = minimise(&Saddle, vec![vec![0.5, 0.0]], 100, 1e-9, 0.0).remove(0);
        assert_eq!(r.ending, Ending::Converged);
        assert!(r.x[0].abs() < 1e-6 && (r.x[1].abs() - 1.0).abs() < 1e-6, "{:?}", r.x);
    }

    struct Fn2(fn(&[f64]) -> f64);
    impl Batch for Fn2 {
        fn values(&self, points: &[Vec<f64>], out: &mut Vec<f64>) {
            out.clear();
            out.extend(points.iter().map(|p| (self.0)(p)));
        }
    }

    /// Two wells, the left one lower; one start in each. The left run
    /// converges; the right one converges too or is left behind, and never
    /// wins.
    #[test]
    fn side_by_side_runs_keep_the_better_well() {
        let f = Fn2(|p| (p[0] * p[0] - 1.0).powi(2) + 0.3 * p[0] + p[1] * p[1]);
        let r = minimise(&f, vec![vec![-1.5, 1.0], vec![1.5, 1.0]], 100, 1e-7, 1e-12);
        assert_eq!(r[0].ending, Ending::Converged);
        assert!(r[0].x[0] < -1.0 && r[0].f < -0.29, "{:?}", r[0].x);
        assert!(matches!(r[1].ending, Ending::Converged | Ending::Behind), "{:?}", r[1].ending);
        assert!(r[1].f > r[0].f);
    }

    /// A function that decreases towards a bound without reaching it (as a
    /// likelihood does when a variance ratio runs to zero) ends as flat,
    /// not by running out of iterations.
    #[test]
    fn a_slow_approach_to_a_bound_ends_flat() {
        let f = Fn2(|p| (-p[0]).exp() + (p[1] - 2.0).powi(2));
        let r = minimise(&f, vec![vec![0.0, 0.0]], 150, 1e-12, 1e-9);
        assert_eq!(r[0].ending, Ending::Flat);
        assert!(r[0].iterations < 60, "{} iterations", r[0].iterations);
        assert!((-r[0].x[0]).exp() < 1e-6 && (r[0].x[1] - 2.0).abs() < 1e-6, "{:?}", r[0].x);
    }
}
