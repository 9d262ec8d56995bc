//! The Levenberg–Marquardt loop with bounds.
//!
//! Damping follows Nielsen (1999): after a successful step
//! `λ ← λ·max(1/3, 1 − (2ρ − 1)³)`, after a failed one `λ ← λ·ν, ν ← 2ν`,
//! where ρ is the ratio of actual to predicted reduction. The damping
//! matrix is Moré's (1978) scaling: the running maximum of the diagonal of
//! JᵀJ, so that the method is invariant to the units of each parameter.
//! Bounds are kept by projecting each trial point onto the box; the step
//! actually taken is the projected one.

/// Why a fit stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Termination {
    /// The scaled gradient (cosine between residuals and Jacobian columns) is below `gtol`.
    SmallGradient,
    /// The step is below `xtol` relative to the parameters.
    SmallStep,
    /// The cost fell by less than `ftol` relative in an accepted step.
    SmallCostChange,
    /// The residuals are zero (to rounding).
    ZeroResidual,
    MaxIterations,
    /// The damping grew without finding a better point.
    NoProgress,
    /// The model gave a non-finite value at the start.
    NonFinite,
}

impl Termination {
    pub fn as_str(&self) -> &'static str {
        match self {
            Termination::SmallGradient => "small-gradient",
            Termination::SmallStep => "small-step",
            Termination::SmallCostChange => "small-cost-change",
            Termination::ZeroResidual => "zero-residual",
            Termination::MaxIterations => "max-iterations",
            Termination::NoProgress => "no-progress",
            Termination::NonFinite => "non-finite",
        }
    }

    /// Did the fit reach a minimum (as opposed to giving up)?
    pub fn converged(&self) -> bool {
        matches!(
            self,
            Termination::SmallGradient
                | Termination::SmallStep
                | Termination::SmallCostChange
                | Termination::ZeroResidual
        )
    }
}

#[derive(Debug, Clone, Copy)]
pub struct Options {
    pub max_iterations: usize,
    pub ftol: f64,
    pub xtol: f64,
    pub gtol: f64,
    /// Initial damping relative to the largest diagonal element of JᵀJ.
    pub tau: f64,
}

impl Default for Options {
    fn default() -> Self {
        Options {
            max_iterations: 500,
            ftol: 1e-14,
            xtol: 1e-14,
            gtol: 1e-14,
            tau: 1e-3,
        }
    }
}

/// A linearisation of the residuals at the current point: what the loop
/// needs to take a damped step.
pub trait Linearization {
    /// Diagonal of JᵀJ.
    fn jtj_diagonal(&self) -> Vec<f64>;
    /// Jᵀr.
    fn gradient(&self) -> Vec<f64>;
    /// The step δ minimising ‖Jδ + r‖² + λ Σ dⱼ δⱼ², or `None` if singular.
    fn step(&self, lambda: f64, damping: &[f64]) -> Option<Vec<f64>>;
    /// ½(‖r‖² − ‖r + Jδ‖²), the reduction the linear model predicts.
    fn predicted_reduction(&self, delta: &[f64]) -> f64;
}

/// A least-squares problem: residuals and their linearisation.
pub trait Problem {
    type Lin: Linearization;
    fn n_params(&self) -> usize;
    /// ½‖r(x)‖², or `None` where the model is not finite.
    fn cost(&self, x: &[f64]) -> Option<f64>;
    fn linearize(&self, x: &[f64]) -> Self::Lin;
    /// The cost at a trial point and, for problems where the two come
    /// cheaper together than apart, the linearisation there too (used if
    /// the step is taken). The cost must equal [`Problem::cost`]'s.
    fn cost_and_linearize(&self, x: &[f64]) -> (Option<f64>, Option<Self::Lin>) {
        (self.cost(x), None)
    }
    fn lower(&self) -> Vec<f64> {
        vec![f64::NEG_INFINITY; self.n_params()]
    }
    fn upper(&self) -> Vec<f64> {
        vec![f64::INFINITY; self.n_params()]
    }
}

#[derive(Debug, Clone, serde::Serialize)]
pub struct FitReport {
    pub x: Vec<f64>,
    /// ½‖r‖² at `x`.
    pub cost: f64,
    pub iterations: usize,
    /// Cost evaluations plus linearisations.
    pub evaluations: usize,
    pub termination: Termination,
}

fn project(x: &mut [f64], lo: &[f64], hi: &[f64]) {
    for i in 0..x.len() {
        x[i] = x[i].clamp(lo[i], hi[i]);
    }
}

/// Minimises ½‖r(x)‖² from `x0` within the problem's bounds.
pub fn minimize<P: Problem>(p: &P, x0: &[f64], opt: &Options) -> FitReport {
    let (lo, hi) = (p.lower(), p.upper());
    let mut x = x0.to_vec();
    project(&mut x, &lo, &hi);
    let mut evaluations = 1;
    let Some(mut cost) = p.cost(&x) else {
        return FitReport {
            x,
            cost: f64::NAN,
            iterations: 0,
            evaluations,
            termination: Termination::NonFinite,
        };
    };
    let n = x.len();
    let mut lin = p.linearize(&x);
    evaluations += 1;
    let mut damping = lin
        .jtj_diagonal()
        .iter()
        .map(|d| d.max(f64::MIN_POSITIVE))
        .collect::<Vec<_>>();
    let mut lambda = opt.tau * damping.iter().cloned().fold(0.0, f64::max);
    let mut nu = 2.0;
    let mut iterations = 0;
    let termination = loop {
        if cost <= f64::MIN_POSITIVE {
            break Termination::ZeroResidual;
        }
        if iterations >= opt.max_iterations {
            break Termination::MaxIterations;
        }
        let g = lin.gradient();
        // A parameter on a bound whose gradient pushes it outwards is held
        // there for this step (its damping made enormous), so the others are
        // solved properly instead of zig-zagging against the bound.
        let held: Vec<bool> = (0..n)
            .map(|j| (x[j] <= lo[j] && g[j] > 0.0) || (x[j] >= hi[j] && g[j] < 0.0))
            .collect();
        // Scaled projected gradient: the cosine between r and each free (scaled) column of J.
        let rnorm = (2.0 * cost).sqrt();
        let diag = lin.jtj_diagonal();
        let gmax = (0..n)
            .filter(|j| !held[*j])
            .map(|j| {
                if diag[j] > 0.0 {
                    g[j].abs() / (diag[j].sqrt() * rnorm)
                } else {
                    0.0
                }
            })
            .fold(0.0, f64::max);
        if gmax <= opt.gtol {
            break Termination::SmallGradient;
        }
        for j in 0..n {
            damping[j] = damping[j].max(diag[j]);
        }
        iterations += 1;
        let mut accepted = false;
        let mut stop = None;
        let held_damping: Vec<f64> = (0..n)
            .map(|j| {
                if held[j] {
                    damping[j] * 1e24
                } else {
                    damping[j]
                }
            })
            .collect();
        while !accepted {
            let Some(step) = lin.step(lambda, &held_damping) else {
                lambda *= nu;
                nu *= 2.0;
                if !lambda.is_finite() || nu > 1e30 {
                    stop = Some(Termination::NoProgress);
                    break;
                }
                continue;
            };
            let mut trial: Vec<f64> = x.iter().zip(&step).map(|(a, b)| a + b).collect();
            project(&mut trial, &lo, &hi);
            let delta: Vec<f64> = trial.iter().zip(&x).map(|(a, b)| a - b).collect();
            let dnorm = delta.iter().map(|d| d * d).sum::<f64>().sqrt();
            let xnorm = x.iter().map(|d| d * d).sum::<f64>().sqrt();
            if dnorm <= opt.xtol * (xnorm + opt.xtol) {
                stop = Some(Termination::SmallStep);
                break;
            }
            evaluations += 1;
            let (new_cost, new_lin) = p.cost_and_linearize(&trial);
            let new_cost = new_cost.unwrap_or(f64::INFINITY);
            let pred = lin.predicted_reduction(&delta);
            let actual = cost - new_cost;
            let rho = if pred > 0.0 { actual / pred } else { -1.0 };
            if new_cost.is_finite() && actual > 0.0 && rho > 0.0 {
                x = trial;
                let old = cost;
                cost = new_cost;
                lin = match new_lin {
                    Some(l) => l,
                    None => {
                        evaluations += 1;
                        p.linearize(&x)
                    }
                };
                lambda *= (1.0f64 / 3.0).max(1.0 - (2.0 * rho - 1.0).powi(3));
                nu = 2.0;
                accepted = true;
                if actual <= opt.ftol * old {
                    stop = Some(Termination::SmallCostChange);
                }
            } else {
                lambda *= nu;
                nu *= 2.0;
                if !lambda.is_finite() || nu > 1e30 {
                    stop = Some(Termination::NoProgress);
                    break;
                }
            }
        }
        if let Some(t) = stop {
            break t;
        }
    };
    FitReport {
        x,
        cost,
        iterations,
        evaluations,
        termination,
    }
}
