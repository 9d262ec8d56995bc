//! Linear mixed models fitted by REML or ML, with Satterthwaite degrees of
//! freedom for any linear combination of the fixed effects.
//!
//! The formulation is that of Bates, Mächler, Bolker & Walker (2015),
//! "Fitting linear mixed-effects models using lme4", J Stat Softw 67(1):
//! `y = Xβ + Zb + ε`, `b = Λ_θ u`, `u ~ N(0, σ²I)`, `ε ~ N(0, σ²I)`. For a
//! given θ the penalised least-squares problem is solved through the
//! Cholesky factor `L L' = Λ'Z'ZΛ + I`, β and σ are profiled out, and the
//! profiled deviance is
//!
//! ```text
//! ML:   log|L|² + n·(1 + log(2π·r²/n))
//! REML: log|L|² + log|R_X|² + (n − p)·(1 + log(2π·r²/(n − p)))
//! ```
//!
//! with `r²` the penalised residual sum of squares and `R_X R_X' = X'X −
//! R_ZX'R_ZX`. θ holds the lower-triangular relative covariance factor of
//! each random-effects term; it is optimised with argmin's Nelder–Mead, with
//! the diagonal of each factor kept non-negative (a variance on the boundary
//! comes out as 0, not as an error).
//!
//! Satterthwaite's method follows lmerTest (Kuznetsova, Brockhoff &
//! Christensen 2017, J Stat Softw 82(13)): with φ = (θ, σ), the asymptotic
//! covariance of φ is `2·H⁻¹`, H the Hessian of the unprofiled deviance
//! −2ℓ(φ); for a contrast `l`, `df = 2·(l'C l)² / (g' A g)`, C = vcov(β)(φ),
//! `g = ∂(l'C l)/∂φ`. Derivatives are numerical (central differences with
//! Richardson extrapolation), as in lmerTest.

use argmin::core::{CostFunction, Executor, State};
use argmin::solver::neldermead::NelderMead;
use nalgebra::{DMatrix, DVector};

/// Why a mixed model could not be fitted.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum LmmError {
    #[error("the fixed effects are not estimable (check for empty or collinear columns)")]
    NotEstimable,
    #[error("the optimiser of the variance parameters failed: {0}")]
    Optimiser(String),
}

/// One random-effects term: a grouping factor and the columns whose
/// coefficients vary by group (an intercept, optionally slopes). The
/// coefficients of one group are correlated, with a full covariance.
#[derive(Debug, Clone)]
pub struct RandomTerm {
    pub name: String,
    pub levels: Vec<String>,
    /// Group of each observation (index into `levels`).
    pub group: Vec<usize>,
    /// Names of the varying columns (`(Intercept)` first when present).
    pub column_names: Vec<String>,
    /// Per column, the value for each observation.
    pub columns: Vec<Vec<f64>>,
}

impl RandomTerm {
    fn p(&self) -> usize {
        self.columns.len()
    }
    fn q(&self) -> usize {
        self.levels.len() * self.p()
    }
}

#[derive(Debug, Clone)]
pub struct LmmData {
    pub y: Vec<f64>,
    pub x: DMatrix<f64>,
    pub x_names: Vec<String>,
    pub terms: Vec<RandomTerm>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Criterion {
    Reml,
    Ml,
}

/// Cross-products of one independent block of random effects: the levels
/// that share observations, directly or through a chain of them. Random
/// effects of different blocks never meet in an observation, so `Z'Z` and
/// with it `Λ'Z'ZΛ + I` are block diagonal and factorised block by block.
/// In the nested designs of a study (everything within a subject) a block
/// is one subject's effects, and the cost is linear in the subjects rather
/// than cubic in all levels.
struct Block {
    ztz: DMatrix<f64>,
    ztx: DMatrix<f64>,
    zty: DVector<f64>,
    /// For each local Z column: (term, start of its coefficient block, size), local positions.
    block_of: Vec<(usize, usize, usize)>,
}

/// Cross-products computed once per data set.
struct Cross {
    blocks: Vec<Block>,
    /// Blocks with the same layout and the same `Z'Z` and `Z'X` (every
    /// subject of a balanced design): the first of each class stands for
    /// the others, whose factor `L` and `R_ZX` are the same, so one
    /// factorisation per class and evaluation serves them all.
    classes: Vec<Vec<usize>>,
    xtx: DMatrix<f64>,
    xty: DVector<f64>,
    yty: f64,
    n: usize,
    p: usize,
}

fn find(parent: &mut [usize], mut i: usize) -> usize {
    while parent[i] != i {
        parent[i] = parent[parent[i]];
        i = parent[i];
    }
    i
}

/// Relative tolerance on the spread of the deviance over Nelder–Mead's
/// simplex. Loose enough that a variance heading for the boundary does not
/// keep the simplex creeping for thousands of steps; the Newton steps that
/// follow pin the free parameters to the deviance's rounding noise.
const NM_TOLERANCE: f64 = 1e-10;

/// Buffers of one block's factorisation, reused across evaluations.
#[derive(Default)]
struct Work {
    /// Nonzeros (row, value) of Λ's columns, column after column.
    lam: Vec<(usize, f64)>,
    lam_start: Vec<usize>,
    b: Vec<f64>,
    m: Vec<f64>,
    r: Vec<f64>,
    /// R_ZX'R_ZX and R_ZX'c_u summed over blocks (row-major p×p, p).
    acc: Vec<f64>,
    acc_cu: Vec<f64>,
    /// One block's c_u when it shares its class's factor.
    y: Vec<f64>,
}

/// Everything computed at one θ.
struct AtTheta {
    logdet_l: f64,
    logdet_rx: f64,
    pwrss: f64,
    beta: DVector<f64>,
    /// (R_X R_X')⁻¹, so vcov(β) = σ²·this.
    rx_inv: DMatrix<f64>,
}

pub struct Model {
    data: LmmData,
    cross: Cross,
    pub criterion: Criterion,
}

#[derive(Debug, Clone)]
pub struct Fit {
    pub criterion: Criterion,
    pub theta: Vec<f64>,
    pub sigma: f64,
    pub beta: Vec<f64>,
    pub vcov: DMatrix<f64>,
    /// −2 log-likelihood (REML or ML) at the optimum.
    pub deviance: f64,
    pub converged: bool,
    pub evaluations: u64,
    pub n_obs: usize,
    /// Asymptotic covariance of φ = (θ, σ), `2·H⁻¹` with H the Hessian of
    /// −2ℓ(φ) at the optimum; computed once per fit for Satterthwaite's df.
    pub varpar_cov: Option<DMatrix<f64>>,
}

/// A variance component as reported: per term, the covariance matrix of
/// its coefficients; and the residual variance.
#[derive(Debug, Clone)]
pub struct Components {
    pub terms: Vec<(String, Vec<String>, DMatrix<f64>)>,
    pub residual: f64,
}

impl Model {
    pub fn new(data: LmmData, criterion: Criterion) -> Self {
        let n = data.y.len();
        let p = data.x.ncols();
        let q: usize = data.terms.iter().map(|t| t.q()).sum();
        // Z as a list of nonzeros per observation.
        let mut offsets = Vec::new();
        let mut block_of = Vec::with_capacity(q);
        let mut off = 0;
        for (ti, t) in data.terms.iter().enumerate() {
            offsets.push(off);
            for l in 0..t.levels.len() {
                for _ in 0..t.p() {
                    block_of.push((ti, off + l * t.p(), t.p()));
                }
            }
            off += t.q();
        }
        let nonzeros = |i: usize, nz: &mut Vec<(usize, f64)>| {
            nz.clear();
            for (ti, t) in data.terms.iter().enumerate() {
                let base = offsets[ti] + t.group[i] * t.p();
                for c in 0..t.p() {
                    nz.push((base + c, t.columns[c][i]));
                }
            }
        };
        // Independent blocks: union of the effects each observation touches
        // (and of each level's own coefficients).
        let mut parent: Vec<usize> = (0..q).collect();
        let mut nz: Vec<(usize, f64)> = Vec::new();
        let union = |parent: &mut Vec<usize>, a: usize, b: usize| {
            let (ra, rb) = (find(parent, a), find(parent, b));
            if ra != rb {
                parent[ra.max(rb)] = ra.min(rb);
            }
        };
        for (j, &(_, start, _)) in block_of.iter().enumerate() {
            union(&mut parent, j, start);
        }
        for i in 0..n {
            nonzeros(i, &mut nz);
            for w in nz.windows(2) {
                union(&mut parent, w[0].0, w[1].0);
            }
        }
        let mut root_block = vec![usize::MAX; q];
        let mut local = vec![0usize; q];
        let mut which = vec![0usize; q];
        let mut members: Vec<Vec<usize>> = Vec::new();
        for j in 0..q {
            let r = find(&mut parent, j);
            if root_block[r] == usize::MAX {
                root_block[r] = members.len();
                members.push(Vec::new());
            }
            let b = root_block[r];
            which[j] = b;
            local[j] = members[b].len();
            members[b].push(j);
        }
        let mut blocks: Vec<Block> = members
            .iter()
            .map(|m| Block {
                ztz: DMatrix::zeros(m.len(), m.len()),
                ztx: DMatrix::zeros(m.len(), p),
                zty: DVector::zeros(m.len()),
                // A level's coefficients are contiguous globally and all in this block, so they stay contiguous locally.
                block_of: m
                    .iter()
                    .map(|&j| (block_of[j].0, local[block_of[j].1], block_of[j].2))
                    .collect(),
            })
            .collect();
        for i in 0..n {
            nonzeros(i, &mut nz);
            let Some(&(first, _)) = nz.first() else {
                continue;
            };
            let blk = &mut blocks[which[first]];
            for &(a, va) in &nz {
                let la = local[a];
                for &(b, vb) in &nz {
                    blk.ztz[(la, local[b])] += va * vb;
                }
                for k in 0..p {
                    blk.ztx[(la, k)] += va * data.x[(i, k)];
                }
                blk.zty[la] += va * data.y[i];
            }
        }
        let y = DVector::from_column_slice(&data.y);
        let mut classes: Vec<Vec<usize>> = Vec::new();
        for (i, b) in blocks.iter().enumerate() {
            let same = |c: &&mut Vec<usize>| {
                let r = &blocks[c[0]];
                r.block_of == b.block_of && r.ztz == b.ztz && r.ztx == b.ztx
            };
            match classes.iter_mut().find(same) {
                Some(c) => c.push(i),
                None => classes.push(vec![i]),
            }
        }
        let cross = Cross {
            classes,
            xtx: data.x.transpose() * &data.x,
            xty: data.x.transpose() * &y,
            yty: y.norm_squared(),
            blocks,
            n,
            p,
        };
        Model {
            data,
            cross,
            criterion,
        }
    }

    /// Number of θ elements: a lower triangle per term.
    pub fn n_theta(&self) -> usize {
        self.data
            .terms
            .iter()
            .map(|t| t.p() * (t.p() + 1) / 2)
            .sum()
    }

    /// Positions in θ that are diagonal elements (kept ≥ 0).
    fn diagonal_positions(&self) -> Vec<usize> {
        let mut out = Vec::new();
        let mut k = 0;
        for t in &self.data.terms {
            for c in 0..t.p() {
                for r in c..t.p() {
                    if r == c {
                        out.push(k);
                    }
                    k += 1;
                }
            }
        }
        out
    }

    /// The lower-triangular factor of each term from θ (column-major lower triangle, as lme4).
    fn factors(&self, theta: &[f64]) -> Vec<DMatrix<f64>> {
        let mut k = 0;
        self.data
            .terms
            .iter()
            .map(|t| {
                let mut m = DMatrix::zeros(t.p(), t.p());
                for c in 0..t.p() {
                    for r in c..t.p() {
                        m[(r, c)] = theta[k];
                        k += 1;
                    }
                }
                m
            })
            .collect()
    }

    /// Everything at θ; `full` adds β and `(R_X R_X')⁻¹`, which the
    /// deviance does not need.
    fn at(&self, theta: &[f64], full: bool) -> Option<AtTheta> {
        let cr = &self.cross;
        let p = cr.p;
        let lam = self.factors(theta);
        // Every evaluation of the deviance comes here, hundreds of times per
        // fit: the per-block work runs in one reused buffer per thread.
        thread_local! {
            static WORK: std::cell::RefCell<Work> = std::cell::RefCell::new(Work::default());
        }
        let mut logdet_l = 0.0;
        let mut rzx_t_rzx: DMatrix<f64> = DMatrix::zeros(p, p);
        let mut rzx_t_cu: DVector<f64> = DVector::zeros(p);
        let mut cu2 = 0.0;
        let scalar = self.data.terms.iter().all(|t| t.p() == 1);
        let ok = WORK.with_borrow_mut(|w| {
            w.acc.clear();
            w.acc.resize(p * p, 0.0);
            w.acc_cu.clear();
            w.acc_cu.resize(p, 0.0);
            for class in &cr.classes {
                let blk = &cr.blocks[class[0]];
                let count = class.len() as f64;
                let q = blk.ztz.nrows();
                let ztz = blk.ztz.as_slice();
                let ztx = blk.ztx.as_slice();
                w.m.clear();
                w.m.resize(q * q, 0.0);
                w.r.clear();
                w.r.resize(q * (p + 1), 0.0);
                if scalar {
                    // Every term has one column, so Λ is diagonal: M = I + D Z'Z D.
                    w.lam.clear();
                    w.lam
                        .extend(blk.block_of.iter().map(|&(t, _, _)| (0, lam[t][(0, 0)])));
                    for i in 0..q {
                        let li = w.lam[i].1;
                        for j in 0..=i {
                            w.m[i * q + j] = li * w.lam[j].1 * ztz[j * q + i];
                        }
                        w.m[i * q + i] += 1.0;
                        for c in 0..p {
                            w.r[i * (p + 1) + c] = li * ztx[c * q + i];
                        }
                        w.r[i * (p + 1) + p] = li * blk.zty[i];
                    }
                } else {
                    // Λ by columns: the nonzeros of column j lie within its level's coefficients.
                    w.lam.clear();
                    w.lam_start.clear();
                    for j in 0..q {
                        w.lam_start.push(w.lam.len());
                        let (t, start, size) = blk.block_of[j];
                        for k in start..start + size {
                            let l = lam[t][(k - start, j - start)];
                            if l != 0.0 {
                                w.lam.push((k, l));
                            }
                        }
                    }
                    w.lam_start.push(w.lam.len());
                    let col = |w: &Work, j: usize| w.lam_start[j]..w.lam_start[j + 1];
                    // B = Z'Z Λ (column-major, q×q).
                    w.b.clear();
                    w.b.resize(q * q, 0.0);
                    for j in 0..q {
                        for e in col(w, j) {
                            let (k, l) = w.lam[e];
                            for i in 0..q {
                                w.b[j * q + i] += ztz[k * q + i] * l;
                            }
                        }
                    }
                    // M = Λ'B + I (lower triangle, row-major), Λ'Z'X and Λ'Z'y.
                    for i in 0..q {
                        for e in col(w, i) {
                            let (k, l) = w.lam[e];
                            for j in 0..=i {
                                w.m[i * q + j] += l * w.b[j * q + k];
                            }
                            for c in 0..p {
                                w.r[i * (p + 1) + c] += l * ztx[c * q + k];
                            }
                            w.r[i * (p + 1) + p] += l * blk.zty[k];
                        }
                        w.m[i * q + i] += 1.0;
                    }
                }
                // Cholesky L L' = M in place (lower, row-major). M ⪰ I, so
                // every pivot is ≥ 1 and their product is taken before one log.
                let mut pivots = 1.0;
                let m = &mut w.m[..q * q];
                for i in 0..q {
                    let (done, rest) = m.split_at_mut(i * q);
                    let row_i = &mut rest[..=i];
                    for j in 0..=i {
                        let dot: f64 = if j < i {
                            let row_j = &done[j * q..j * q + j];
                            row_i[..j].iter().zip(row_j).map(|(a, b)| a * b).sum()
                        } else {
                            row_i[..j].iter().map(|a| a * a).sum()
                        };
                        let s = row_i[j] - dot;
                        if i == j {
                            if !(s > 0.0) {
                                return false;
                            }
                            row_i[i] = s.sqrt();
                        } else {
                            row_i[j] = s / done[j * q + j];
                        }
                    }
                    pivots *= row_i[i];
                    if pivots > 1e100 {
                        logdet_l += 2.0 * count * pivots.ln();
                        pivots = 1.0;
                    }
                }
                logdet_l += 2.0 * count * pivots.ln();
                // Forward substitution: [R_ZX | c_u] = L⁻¹ [Λ'Z'X | Λ'Z'y],
                // row by row (each row of the right-hand side is contiguous).
                let wr = p + 1;
                let r = &mut w.r[..q * wr];
                for i in 0..q {
                    let (done, rest) = r.split_at_mut(i * wr);
                    let row = &mut rest[..wr];
                    for (k, l) in m[i * q..i * q + i].iter().enumerate() {
                        for (x, y) in row.iter_mut().zip(&done[k * wr..(k + 1) * wr]) {
                            *x -= l * y;
                        }
                    }
                    let d = m[i * q + i];
                    row.iter_mut().for_each(|x| *x /= d);
                }
                for row in r.chunks_exact(wr) {
                    for a in 0..p {
                        for b in 0..p {
                            w.acc[a * p + b] += count * row[a] * row[b];
                        }
                        w.acc_cu[a] += row[a] * row[p];
                    }
                    cu2 += row[p] * row[p];
                }
                // The class's other blocks differ only in Z'y: c_u = L⁻¹ Λ'Z'y.
                for &other in &class[1..] {
                    let zty = &cr.blocks[other].zty;
                    w.y.clear();
                    if scalar {
                        w.y.extend((0..q).map(|i| w.lam[i].1 * zty[i]));
                    } else {
                        for i in 0..q {
                            let v = w.lam[w.lam_start[i]..w.lam_start[i + 1]]
                                .iter()
                                .map(|&(k, l)| l * zty[k])
                                .sum();
                            w.y.push(v);
                        }
                    }
                    for i in 0..q {
                        let dot: f64 = m[i * q..i * q + i]
                            .iter()
                            .zip(&w.y[..i])
                            .map(|(l, y)| l * y)
                            .sum();
                        w.y[i] = (w.y[i] - dot) / m[i * q + i];
                    }
                    for (i, cu) in w.y.iter().enumerate() {
                        let row = &r[i * wr..i * wr + p];
                        for a in 0..p {
                            w.acc_cu[a] += row[a] * cu;
                        }
                        cu2 += cu * cu;
                    }
                }
            }
            for a in 0..p {
                for b in 0..p {
                    rzx_t_rzx[(a, b)] = w.acc[a * p + b];
                }
                rzx_t_cu[a] = w.acc_cu[a];
            }
            true
        });
        if !ok {
            return None;
        }
        let xtx_adj = &cr.xtx - rzx_t_rzx;
        let rx = xtx_adj.cholesky()?;
        let logdet_rx = 2.0 * rx.l().diagonal().iter().map(|d: &f64| d.ln()).sum::<f64>();
        let rhs = &cr.xty - rzx_t_cu;
        let cbeta = rx.l().solve_lower_triangular(&rhs)?;
        let pwrss = cr.yty - cu2 - cbeta.norm_squared();
        // The deviance needs neither β nor the inverse; only a fit's result does.
        let (beta, rx_inv) = if full {
            (rx.solve(&rhs), rx.inverse())
        } else {
            (DVector::zeros(0), DMatrix::zeros(0, 0))
        };
        Some(AtTheta {
            logdet_l,
            logdet_rx,
            pwrss: pwrss.max(0.0),
            beta,
            rx_inv,
        })
    }

    /// The profiled deviance at θ.
    pub fn profiled_deviance(&self, theta: &[f64]) -> f64 {
        let Some(a) = self.at(theta, false) else {
            return f64::INFINITY;
        };
        let (n, p) = (self.cross.n as f64, self.cross.p as f64);
        let two_pi = 2.0 * std::f64::consts::PI;
        match self.criterion {
            Criterion::Ml => a.logdet_l + n * (1.0 + (two_pi * a.pwrss / n).ln()),
            Criterion::Reml => {
                a.logdet_l + a.logdet_rx + (n - p) * (1.0 + (two_pi * a.pwrss / (n - p)).ln())
            }
        }
    }

    /// −2ℓ at (θ, σ), not profiled over σ (used for Satterthwaite).
    pub fn deviance_at(&self, theta: &[f64], sigma: f64) -> f64 {
        let Some(a) = self.at(theta, false) else {
            return f64::INFINITY;
        };
        let (n, p) = (self.cross.n as f64, self.cross.p as f64);
        let s2 = sigma * sigma;
        let two_pi = 2.0 * std::f64::consts::PI;
        match self.criterion {
            Criterion::Ml => a.logdet_l + n * (two_pi * s2).ln() + a.pwrss / s2,
            Criterion::Reml => {
                a.logdet_l + a.logdet_rx + (n - p) * (two_pi * s2).ln() + a.pwrss / s2
            }
        }
    }

    fn vcov_at(&self, theta: &[f64], sigma: f64) -> Option<DMatrix<f64>> {
        self.at(theta, true).map(|a| a.rx_inv * (sigma * sigma))
    }

    /// Fits the model.
    pub fn fit(&self) -> Result<Fit, LmmError> {
        let nt = self.n_theta();
        let diag = self.diagonal_positions();
        let start: Vec<f64> = (0..nt)
            .map(|k| if diag.contains(&k) { 1.0 } else { 0.0 })
            .collect();
        let count = std::sync::atomic::AtomicU64::new(0);
        let cost = DevianceCost {
            model: self,
            diag: &diag,
            count: &count,
        };
        let mut simplex = vec![start.clone()];
        for k in 0..nt {
            let mut v = start.clone();
            v[k] += if diag.contains(&k) { 0.5 } else { 0.25 };
            simplex.push(v);
        }
        let mut best = start;
        let mut converged = false;
        // Nelder–Mead restarted from its own optimum until it stops moving,
        // which guards against a premature collapse of the simplex.
        let mut best_cost = cost.model.profiled_deviance(&best);
        for round in 0..6 {
            // The deviance is a sum over all observations, so its rounding noise
            // grows with its size: an absolute tolerance of 1e-12 is below that
            // noise on large data and would never be met.
            let tol = (NM_TOLERANCE * best_cost.abs()).max(NM_TOLERANCE);
            let solver = NelderMead::new(simplex.clone())
                .with_sd_tolerance(tol)
                .map_err(|e| LmmError::Optimiser(e.to_string()))?;
            let res = Executor::new(cost.clone(), solver)
                .configure(|s| s.max_iters(4000))
                .run()
                .map_err(|e| LmmError::Optimiser(e.to_string()))?;
            let x = res
                .state()
                .get_best_param()
                .ok_or_else(|| LmmError::Optimiser("no best point".into()))?
                .clone();
            let moved = x
                .iter()
                .zip(&best)
                .map(|(a, b)| (a - b).abs())
                .fold(0.0, f64::max);
            let new_cost = res.state().get_best_cost();
            let gained = best_cost - new_cost;
            best = x;
            best_cost = new_cost;
            // Converged when a restart neither moves θ nor lowers the
            // deviance by more than its rounding noise.
            if round > 0 && (moved < 1e-9 || gained.abs() <= NM_TOLERANCE * new_cost.abs().max(1.0))
            {
                converged = true;
                break;
            }
            simplex = vec![best.clone()];
            for k in 0..nt {
                let mut v = best.clone();
                v[k] += 0.05 * best[k].abs().max(0.1);
                simplex.push(v);
            }
        }
        // A variance whose optimum is on the boundary leaves Nelder–Mead
        // creeping towards θ = 0 along a direction where the deviance is
        // flat (it depends on θ²); set such a θ to 0 exactly, as lme4's
        // bounded optimiser does, when that is no worse.
        for k in diag.iter().copied() {
            if best[k].abs() < 1e-4 && best[k] != 0.0 {
                let mut x = best.clone();
                x[k] = 0.0;
                let c = cost.cost(&x).unwrap_or(f64::INFINITY);
                if c <= best_cost + 1e-12 * best_cost.abs().max(1.0) {
                    best = x;
                    best_cost = c.min(best_cost);
                }
            }
        }
        // Nelder–Mead stops within the deviance's rounding noise, where a
        // flat direction can leave θ loose in the sixth digit. Newton steps
        // on the free coordinates (numerical gradient and Hessian, as for
        // Satterthwaite's df; variances on the boundary held at zero) pin it.
        let free: Vec<usize> = (0..nt)
            .filter(|k| !diag.contains(k) || best[*k].abs() >= 1e-4)
            .collect();
        for _ in 0..3 {
            if free.is_empty() {
                break;
            }
            let sub = |v: &[f64]| {
                let mut x = best.clone();
                for (i, k) in free.iter().enumerate() {
                    x[*k] = v[i];
                }
                cost.cost(&x).unwrap_or(f64::INFINITY)
            };
            let x0: Vec<f64> = free.iter().map(|k| best[*k]).collect();
            let g = DVector::from_vec(gradient(&sub, &x0));
            let Some(chol) = hessian_plain(&sub, &x0).cholesky() else {
                break;
            };
            let step = chol.solve(&g);
            let x1: Vec<f64> = x0.iter().zip(step.iter()).map(|(a, d)| a - d).collect();
            let f1 = sub(&x1);
            if !(f1 < best_cost) {
                break;
            }
            for (i, k) in free.iter().enumerate() {
                best[*k] = x1[i];
            }
            let gained = best_cost - f1;
            best_cost = f1;
            // A step this small, or a gain within the deviance's rounding
            // noise, leaves nothing for another (costly) Newton step to pin.
            let largest = step.iter().fold(0.0f64, |m, d| m.max(d.abs()));
            if largest < 1e-9 || gained <= 1e-13 * best_cost.abs().max(1.0) {
                break;
            }
        }
        let theta: Vec<f64> = best
            .iter()
            .enumerate()
            .map(|(k, v)| if diag.contains(&k) { v.abs() } else { *v })
            .collect();
        let a = self.at(&theta, true).ok_or(LmmError::NotEstimable)?;
        let (n, p) = (self.cross.n as f64, self.cross.p as f64);
        let s2 = match self.criterion {
            Criterion::Ml => a.pwrss / n,
            Criterion::Reml => a.pwrss / (n - p),
        };
        let mut phi = theta.clone();
        phi.push(s2.sqrt());
        let np = phi.len();
        let dev = |v: &[f64]| self.deviance_at(&v[..np - 1], v[np - 1]);
        let varpar_cov = hessian(&dev, &phi).try_inverse().map(|h| h * 2.0);
        Ok(Fit {
            varpar_cov,
            criterion: self.criterion,
            sigma: s2.sqrt(),
            beta: a.beta.iter().copied().collect(),
            vcov: a.rx_inv * s2,
            deviance: self.profiled_deviance(&theta),
            theta,
            converged,
            evaluations: count.load(std::sync::atomic::Ordering::Relaxed),
            n_obs: self.cross.n,
        })
    }

    pub fn fixed_names(&self) -> &[String] {
        &self.data.x_names
    }

    pub fn components(&self, fit: &Fit) -> Components {
        let s2 = fit.sigma * fit.sigma;
        let terms = self
            .factors(&fit.theta)
            .into_iter()
            .zip(&self.data.terms)
            .map(|(l, t)| {
                (
                    t.name.clone(),
                    t.column_names.clone(),
                    &l * l.transpose() * s2,
                )
            })
            .collect();
        Components {
            terms,
            residual: s2,
        }
    }

    /// Satterthwaite degrees of freedom for `l'β`.
    pub fn satterthwaite(&self, fit: &Fit, l: &[f64]) -> f64 {
        let Some(a) = &fit.varpar_cov else {
            return f64::NAN;
        };
        let mut phi = fit.theta.clone();
        phi.push(fit.sigma);
        let np = phi.len();
        let lv = DVector::from_column_slice(l);
        let var = |v: &[f64]| {
            self.vcov_at(&v[..np - 1], v[np - 1])
                .map(|c| (lv.transpose() * c * &lv)[0])
                .unwrap_or(f64::NAN)
        };
        let gv = DVector::from_vec(gradient(&var, &phi));
        let denom = (gv.transpose() * a * &gv)[0];
        let v0 = var(&phi);
        2.0 * v0 * v0 / denom
    }
}

#[derive(Clone)]
struct DevianceCost<'a> {
    model: &'a Model,
    diag: &'a [usize],
    count: &'a std::sync::atomic::AtomicU64,
}

impl CostFunction for DevianceCost<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, x: &Vec<f64>) -> Result<f64, argmin::core::Error> {
        // The diagonal of each factor enters through |·|: the optimiser may
        // cross zero, and a variance at zero is a valid estimate.
        let t: Vec<f64> = x
            .iter()
            .enumerate()
            .map(|(k, v)| if self.diag.contains(&k) { v.abs() } else { *v })
            .collect();
        self.count
            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        Ok(self.model.profiled_deviance(&t))
    }
}

/// Richardson-extrapolated central difference derivative of `f` along one coordinate.
fn derivative(f: &dyn Fn(&[f64]) -> f64, x: &[f64], k: usize) -> f64 {
    let h0 = 1e-3 * x[k].abs().max(1e-2);
    let d = |h: f64| {
        let (mut a, mut b) = (x.to_vec(), x.to_vec());
        a[k] += h;
        b[k] -= h;
        (f(&a) - f(&b)) / (2.0 * h)
    };
    let (d1, d2) = (d(h0), d(h0 / 2.0));
    (4.0 * d2 - d1) / 3.0
}

fn gradient(f: &dyn Fn(&[f64]) -> f64, x: &[f64]) -> Vec<f64> {
    (0..x.len()).map(|k| derivative(f, x, k)).collect()
}

/// Hessian by central second differences with steps `scale` times
/// `h = 1e-3·max(|x|, 0.01)`: 2 evaluations per diagonal and 4 per
/// off-diagonal element (plus one at `x`), the upper triangle mirrored.
fn hessian_step(f: &dyn Fn(&[f64]) -> f64, x: &[f64], scale: f64) -> DMatrix<f64> {
    let n = x.len();
    let h: Vec<f64> = x.iter().map(|v| 1e-3 * v.abs().max(1e-2) * scale).collect();
    let f0 = f(x);
    let at = |moves: &[(usize, f64)]| {
        let mut v = x.to_vec();
        for (k, d) in moves {
            v[*k] += d;
        }
        f(&v)
    };
    let mut m = DMatrix::zeros(n, n);
    for i in 0..n {
        m[(i, i)] = (at(&[(i, h[i])]) - 2.0 * f0 + at(&[(i, -h[i])])) / (h[i] * h[i]);
        for j in 0..i {
            m[(i, j)] = (at(&[(i, h[i]), (j, h[j])])
                - at(&[(i, h[i]), (j, -h[j])])
                - at(&[(i, -h[i]), (j, h[j])])
                + at(&[(i, -h[i]), (j, -h[j])]))
                / (4.0 * h[i] * h[j]);
            m[(j, i)] = m[(i, j)];
        }
    }
    m
}

/// A plain central-difference Hessian: enough to steer Newton steps,
/// whose end point the gradient alone decides.
fn hessian_plain(f: &dyn Fn(&[f64]) -> f64, x: &[f64]) -> DMatrix<f64> {
    hessian_step(f, x, 1.0)
}

/// The Hessian Richardson-extrapolated from steps h and h/2 (error O(h⁴),
/// as [`derivative`]), for the covariance of the variance parameters.
fn hessian(f: &dyn Fn(&[f64]) -> f64, x: &[f64]) -> DMatrix<f64> {
    (hessian_step(f, x, 0.5) * 4.0 - hessian_step(f, x, 1.0)) / 3.0
}
