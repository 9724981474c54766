//! Absorbing Markov chains: absorption probabilities, with and without
//! removed states (Kemeny and Snell 1960, ch. III).
//!
//! The transient states are numbered `0..n` (0 is START); `rows[s]` holds the
//! transitions between transient states (`Q`, sparse) and `r[s]` the
//! probability of moving from `s` straight into CONVERSION. The absorption
//! probability vector solves `(I - Q) x = r`.
//!
//! **Removal.** Redirecting every transition into the states of a set `R` to
//! NULL gives the same absorption probabilities (for the states outside `R`)
//! as keeping the transitions and pinning `x_j = 0` for `j` in `R`: a
//! transition into NULL and one into a state worth 0 contribute the same.
//! With `G = (I - Q)^{-1}` (the fundamental matrix) and `x` the unmodified
//! solution, the pinned solution is `x' = x - G[:, R] a` with
//! `G[R, R] a = x[R]`: it satisfies every equation outside `R` and has
//! `x'[R] = 0`. So one factorization of `I - Q` and one column of `G` per
//! state serve every removal; each removal then costs a |R| x |R| solve
//! instead of a new n x n factorization.
//!
//! **Solvers.** Up to [`DENSE_MAX`] transient states: dense LU with partial
//! pivoting plus one step of iterative refinement (direct, no iteration
//! count to tune). Above it (only higher Markov orders get there): sparse
//! Gauss-Seidel, sweeping states successors-first, self-loops solved in
//! place, warm-started removals; it stops when the error bound
//! `||residual||_inf * max expected steps to absorption` is below 1e-12
//! (`x - x* = -G res` and `||G||_inf` is the largest expected number of steps),
//! or after [`MAX_SWEEPS`] sweeps (fewer for big chains: [`WORK_BUDGET`]),
//! and reports the bound it reached.

use serde::{Deserialize, Serialize};

/// Largest number of transient states solved with dense LU.
pub const DENSE_MAX: usize = 1200;
/// Sweep limit of the iterative solver.
pub const MAX_SWEEPS: usize = 200_000;
/// Work limit of one iterative solve (sweeps x transitions), so that a
/// pathological chain (e.g. a near-certain cycle) cannot stall a refit; the
/// bound reached is reported instead.
pub const WORK_BUDGET: usize = 500_000_000;
/// Target error bound of the iterative solver.
const ITER_TOL: f64 = 1e-12;

/// A transient system of an absorbing chain.
#[derive(Debug, Clone)]
pub(crate) struct Chain {
    /// Sparse rows of `Q` (column, probability), columns in `0..n`.
    pub rows: Vec<Vec<(usize, f64)>>,
    /// Probability of entering CONVERSION from each transient state.
    pub r: Vec<f64>,
}

/// How a chain was solved.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SolveMethod {
    /// Dense LU with partial pivoting.
    DenseLu,
    /// Sparse Gauss-Seidel to the error bound.
    GaussSeidel,
}

/// Absorption probabilities from START with and without removed states.
#[derive(Debug, Clone)]
pub(crate) struct Absorption {
    /// From START, nothing removed.
    pub p: f64,
    /// From START, one per removal set.
    pub without: Vec<f64>,
    pub method: SolveMethod,
    /// Largest residual `||(I-Q)x - r||_inf` of the unmodified solve
    /// (dense), or the error bound reached (iterative).
    pub error_bound: f64,
}

impl Chain {
    fn n(&self) -> usize {
        self.r.len()
    }
}

/// Dense LU factorization with partial pivoting (row-major, rows swapped).
pub(crate) struct Lu {
    n: usize,
    a: Vec<f64>,
    piv: Vec<usize>,
}

impl Lu {
    /// Factors the n x n row-major matrix; `None` when it is singular.
    pub fn factor(mut a: Vec<f64>, n: usize) -> Option<Lu> {
        debug_assert_eq!(a.len(), n * n);
        let mut piv: Vec<usize> = (0..n).collect();
        for k in 0..n {
            let mut p = k;
            let mut best = a[k * n + k].abs();
            for i in k + 1..n {
                let v = a[i * n + k].abs();
                if v > best {
                    best = v;
                    p = i;
                }
            }
            if best == 0.0 || !best.is_finite() {
                return None;
            }
            if p != k {
                for j in 0..n {
                    a.swap(k * n + j, p * n + j);
                }
                piv.swap(k, p);
            }
            let d = a[k * n + k];
            let (top, bottom) = a.split_at_mut((k + 1) * n);
            let row_k = &top[k * n..k * n + n];
            for i in 0..n - k - 1 {
                let row_i = &mut bottom[i * n..i * n + n];
                let f = row_i[k] / d;
                row_i[k] = f;
                if f != 0.0 {
                    for j in k + 1..n {
                        row_i[j] -= f * row_k[j];
                    }
                }
            }
        }
        Some(Lu { n, a, piv })
    }

    /// Solves `A x = b`, returning x.
    pub fn solve(&self, b: &[f64]) -> Vec<f64> {
        let n = self.n;
        let mut x: Vec<f64> = self.piv.iter().map(|&p| b[p]).collect();
        for i in 0..n {
            let row = &self.a[i * n..i * n + i];
            let s: f64 = row.iter().zip(&x[..i]).map(|(a, b)| a * b).sum();
            x[i] -= s;
        }
        for i in (0..n).rev() {
            let row = &self.a[i * n..i * n + n];
            let s: f64 = row[i + 1..].iter().zip(&x[i + 1..]).map(|(a, b)| a * b).sum();
            x[i] = (x[i] - s) / row[i];
        }
        x
    }
}

/// `(I - Q) x - b`, infinity norm.
fn residual(chain: &Chain, x: &[f64], b: &[f64]) -> f64 {
    let mut worst = 0.0f64;
    for (s, row) in chain.rows.iter().enumerate() {
        let qx: f64 = row.iter().map(|&(t, p)| p * x[t]).sum();
        worst = worst.max((x[s] - qx - b[s]).abs());
    }
    worst
}

/// Absorption probabilities from START (state 0), unmodified and with each
/// set of `removals` pinned to 0 (see the module docs).
pub(crate) fn absorb(chain: &Chain, removals: &[Vec<usize>]) -> Absorption {
    if chain.n() <= DENSE_MAX {
        if let Some(a) = absorb_dense(chain, removals) {
            return a;
        }
    }
    absorb_iterative(chain, removals)
}

pub(crate) fn absorb_dense(chain: &Chain, removals: &[Vec<usize>]) -> Option<Absorption> {
    let n = chain.n();
    let mut a = vec![0.0; n * n];
    for (s, row) in chain.rows.iter().enumerate() {
        a[s * n + s] += 1.0;
        for &(t, p) in row {
            a[s * n + t] -= p;
        }
    }
    let lu = Lu::factor(a, n)?;
    let mut x = lu.solve(&chain.r);
    // One step of iterative refinement.
    let mut res = vec![0.0; n];
    for (s, row) in chain.rows.iter().enumerate() {
        let qx: f64 = row.iter().map(|&(t, p)| p * x[t]).sum();
        res[s] = chain.r[s] - (x[s] - qx);
    }
    let dx = lu.solve(&res);
    for (xi, d) in x.iter_mut().zip(dx) {
        *xi += d;
    }
    let error_bound = residual(chain, &x, &chain.r);
    if !x.iter().all(|v| v.is_finite()) {
        return None;
    }

    // Columns of G for every state in some removal set.
    let mut cols: Vec<Option<Vec<f64>>> = vec![None; n];
    let mut e = vec![0.0; n];
    for set in removals {
        for &j in set {
            if cols[j].is_none() {
                e[j] = 1.0;
                cols[j] = Some(lu.solve(&e));
                e[j] = 0.0;
            }
        }
    }
    let without = removals
        .iter()
        .map(|set| {
            let m = set.len();
            if m == 0 {
                return x[0];
            }
            if set.contains(&0) {
                return 0.0;
            }
            let mut g = vec![0.0; m * m];
            for (bi, &b) in set.iter().enumerate() {
                let col = cols[b].as_ref().expect("computed above");
                for (ai, &a) in set.iter().enumerate() {
                    g[ai * m + bi] = col[a];
                }
            }
            let rhs: Vec<f64> = set.iter().map(|&j| x[j]).collect();
            let alpha = match Lu::factor(g, m) {
                Some(lu) => lu.solve(&rhs),
                None => return f64::NAN,
            };
            let corr: f64 = set.iter().zip(&alpha).map(|(&j, al)| cols[j].as_ref().expect("computed")[0] * al).sum();
            x[0] - corr
        })
        .collect::<Vec<f64>>();
    if without.iter().any(|v| !v.is_finite()) {
        return None;
    }
    Some(Absorption { p: x[0], without, method: SolveMethod::DenseLu, error_bound })
}

/// States in successors-first order (DFS post-order from START, then any
/// state not reached from START).
fn sweep_order(chain: &Chain) -> Vec<usize> {
    let n = chain.n();
    let mut seen = vec![false; n];
    let mut order = Vec::with_capacity(n);
    for root in 0..n {
        if seen[root] {
            continue;
        }
        seen[root] = true;
        let mut stack: Vec<(usize, usize)> = vec![(root, 0)];
        while let Some(&mut (s, ref mut i)) = stack.last_mut() {
            if let Some(&(t, _)) = chain.rows[s].get(*i) {
                *i += 1;
                if !seen[t] {
                    seen[t] = true;
                    stack.push((t, 0));
                }
            } else {
                order.push(s);
                stack.pop();
            }
        }
    }
    order
}

/// Gauss-Seidel sweeps of `x = Q x + b` with `pinned` states held at 0,
/// until `||residual|| * tau_max <= tol` (or the sweep limit). Returns the
/// bound reached.
fn gauss_seidel(
    chain: &Chain,
    b: &[f64],
    order: &[usize],
    pinned: &[bool],
    x: &mut [f64],
    tau_max: f64,
    tol: f64,
) -> f64 {
    let mut bound = f64::INFINITY;
    let nnz: usize = chain.rows.iter().map(|r| r.len() + 1).sum();
    let max_sweeps = (WORK_BUDGET / nnz.max(1)).clamp(100, MAX_SWEEPS);
    for sweep in 0..max_sweeps {
        for &s in order {
            if pinned[s] {
                x[s] = 0.0;
                continue;
            }
            let mut acc = b[s];
            let mut stay = 0.0;
            for &(t, p) in &chain.rows[s] {
                if t == s {
                    stay += p;
                } else if !pinned[t] {
                    acc += p * x[t];
                }
            }
            x[s] = if stay < 1.0 { acc / (1.0 - stay) } else { 0.0 };
        }
        if sweep % 4 == 3 || sweep + 1 == max_sweeps {
            let mut worst = 0.0f64;
            for s in 0..x.len() {
                if pinned[s] {
                    continue;
                }
                let qx: f64 = chain.rows[s].iter().filter(|(t, _)| !pinned[*t]).map(|&(t, p)| p * x[t]).sum();
                worst = worst.max((x[s] - qx - b[s]).abs());
            }
            bound = worst * tau_max;
            if bound <= tol {
                break;
            }
        }
    }
    bound
}

pub(crate) fn absorb_iterative(chain: &Chain, removals: &[Vec<usize>]) -> Absorption {
    let n = chain.n();
    let order = sweep_order(chain);
    let none = vec![false; n];
    // Expected steps to absorption: tau = 1 + Q tau. Its own bound is
    // relative (tau >= 1), so iterate it to a relative 1e-9 and add margin.
    let ones = vec![1.0; n];
    let mut tau = vec![0.0; n];
    let mut tau_max = 1.0;
    for _ in 0..8 {
        gauss_seidel(chain, &ones, &order, &none, &mut tau, tau_max, 1e-9 * tau_max);
        let m = tau.iter().cloned().fold(1.0, f64::max);
        if m <= tau_max * 1.000001 {
            tau_max = m;
            break;
        }
        tau_max = m;
    }
    let tau_max = tau_max * 1.01;
    let mut x = vec![0.0; n];
    let bound = gauss_seidel(chain, &chain.r, &order, &none, &mut x, tau_max, ITER_TOL);
    let mut worst = bound;
    let without = removals
        .iter()
        .map(|set| {
            if set.contains(&0) {
                return 0.0;
            }
            let mut pinned = vec![false; n];
            for &j in set {
                pinned[j] = true;
            }
            let mut y = x.clone();
            let b = gauss_seidel(chain, &chain.r, &order, &pinned, &mut y, tau_max, ITER_TOL);
            worst = worst.max(b);
            y[0]
        })
        .collect();
    Absorption { p: x[0], without, method: SolveMethod::GaussSeidel, error_bound: worst }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn random_chain(n: usize, seed: u64) -> Chain {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut rows = Vec::new();
        let mut r = Vec::new();
        for _ in 0..n {
            let k = rng.gen_range(1..5);
            let mut w: Vec<(usize, f64)> = (0..k).map(|_| (rng.gen_range(0..n), rng.gen_range(0.1..1.0))).collect();
            let absorb_w: f64 = rng.gen_range(0.05..0.5);
            let conv_share: f64 = rng.gen_range(0.0..1.0);
            let total: f64 = w.iter().map(|x| x.1).sum::<f64>() + absorb_w;
            for x in &mut w {
                x.1 /= total;
            }
            rows.push(w);
            r.push(absorb_w * conv_share / total);
        }
        Chain { rows, r }
    }

    #[test]
    fn dense_and_iterative_agree() {
        for seed in 0..5 {
            let c = random_chain(60, seed);
            let removals: Vec<Vec<usize>> = vec![vec![1], vec![2, 3], vec![5, 7, 11], vec![0]];
            let d = absorb_dense(&c, &removals).unwrap();
            let it = absorb_iterative(&c, &removals);
            assert!(it.error_bound <= 1e-12, "{}", it.error_bound);
            assert!((d.p - it.p).abs() < 1e-10, "{} {}", d.p, it.p);
            for (a, b) in d.without.iter().zip(&it.without) {
                assert!((a - b).abs() < 1e-10, "{a} {b}");
            }
            assert_eq!(d.without[3], 0.0);
        }
    }

    #[test]
    fn near_certain_cycle_terminates_with_its_bound() {
        // START -> A; A <-> B with probability 1 - 1e-9, else CONVERSION.
        // Exact: x_A = x_B = 1 (every exit converts), so x_START = 1.
        let e = 1e-9;
        let c = Chain { rows: vec![vec![(1, 1.0)], vec![(2, 1.0 - e)], vec![(1, 1.0 - e)]], r: vec![0.0, e, e] };
        let it = absorb_iterative(&c, &[vec![1]]);
        assert!(it.p > 0.0 && it.p <= 1.0 + 1e-12);
        assert!(it.error_bound > ITER_TOL, "cannot have converged: {}", it.error_bound);
        assert_eq!(it.without, vec![0.0]);
        let d = absorb_dense(&c, &[vec![1]]).unwrap();
        assert!((d.p - 1.0).abs() < 1e-6, "{}", d.p);
    }

    #[test]
    fn removal_matches_a_fresh_solve() {
        // Pinning via the fundamental matrix equals solving the modified system.
        let c = random_chain(40, 9);
        let set = vec![4usize, 9, 17];
        let d = absorb_dense(&c, std::slice::from_ref(&set)).unwrap();
        let mut m = c.clone();
        for row in &mut m.rows {
            row.retain(|(t, _)| !set.contains(t));
        }
        let fresh = absorb_dense(&m, &[]).unwrap();
        assert!((d.without[0] - fresh.p).abs() < 1e-12);
    }
}
