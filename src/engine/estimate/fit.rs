//! The constrained weighted least-squares fit behind the regression
//! estimators: normal equations accumulated from complementary pairs, the
//! fit under the efficiency constraint, and its std errors.

use std::collections::HashMap;

use nalgebra::{DMatrix, DVector};

use crate::engine::coalition::Coalition;

/// One sampled complementary pair: a coalition, `v(S) - v(∅)` and
/// `v(all ∖ S) - v(∅)`, the stratum it was drawn from, and
/// `Var v(S) + Var v(all ∖ S)` over the removal's draws.
pub(super) struct PairSample {
    pub(super) coalition: Coalition,
    pub(super) value: f64,
    pub(super) complement_value: f64,
    pub(super) stratum: usize,
    pub(super) noise: f64,
}

/// `A = Σ w x xᵀ` and `b = Σ w x y` over fitted coalitions, `x` being the
/// coalition's indicator vector and `y = v(S) - v(∅)`.
pub(super) struct NormalEquations {
    pub(super) gram: DMatrix<f64>,
    pub(super) moment: DVector<f64>,
}

impl NormalEquations {
    pub(super) fn new(players: usize) -> NormalEquations {
        NormalEquations {
            gram: DMatrix::zeros(players, players),
            moment: DVector::zeros(players),
        }
    }

    pub(super) fn add(&mut self, weight: f64, coalition: Coalition, y: f64) {
        for i in coalition.members() {
            self.moment[i] += weight * y;
            for j in coalition.members() {
                self.gram[(i, j)] += weight;
            }
        }
    }

    pub(super) fn add_pair(&mut self, weight: f64, sample: &PairSample, players: usize) {
        self.add(weight, sample.coalition, sample.value);
        self.add(
            weight,
            sample.coalition.complement(players),
            sample.complement_value,
        );
    }
}

/// A constrained fit and its sensitivity `P`: a change `δb` of the normal
/// equations' right-hand side moves the fit by `P δb`.
pub(super) struct Fit {
    pub(super) values: DVector<f64>,
    pub(super) sensitivity: DMatrix<f64>,
}

/// Minimises `φᵀAφ - 2bᵀφ` subject to `Σ φ = total` by eliminating the
/// constraint: `φ = total/p · 1 + Q θ` with `Q = [I; -1ᵀ]`, whose columns span
/// the vectors summing to zero, leaving the positive definite system
/// `QᵀAQ θ = Qᵀ(b - A φ₀)`, solved by Cholesky. `None` when that system is
/// singular to working precision (the samples do not determine the fit).
pub(super) fn solve_constrained(equations: &NormalEquations, total: f64) -> Option<Fit> {
    let players = equations.moment.len();
    let mut basis = DMatrix::<f64>::zeros(players, players - 1);
    for k in 0..players - 1 {
        basis[(k, k)] = 1.0;
        basis[(players - 1, k)] = -1.0;
    }
    let reduced = basis.transpose() * &equations.gram * &basis;
    let largest = reduced.diagonal().max();
    if !(largest > 0.0 && largest.is_finite()) {
        return None;
    }
    let cholesky = reduced.cholesky()?;
    // A pivot (squared diagonal of L) tiny next to the largest diagonal
    // entry means a direction the samples hardly constrain.
    let smallest_pivot = cholesky.l_dirty().diagonal().map(|d| d * d).min();
    if smallest_pivot.is_nan() || smallest_pivot <= 1e-10 * largest {
        return None;
    }
    let start = DVector::from_element(players, total / players as f64);
    let rhs = basis.transpose() * (&equations.moment - &equations.gram * &start);
    let values = start + &basis * cholesky.solve(&rhs);
    let sensitivity = &basis * cholesky.inverse() * basis.transpose();
    if values.iter().any(|v| !v.is_finite()) {
        return None;
    }
    Some(Fit {
        values,
        sensitivity,
    })
}

/// Std errors of a fit from its pairs. The fit's error is, to first order,
/// `P Σ_j w_j g_j` with `g_j = x r + x̄ r̄` (residuals `r` of the pair's two
/// coalitions); `P` annihilates the all-ones vector and `x̄ = 1 - x`, so each
/// pair contributes `ψ_j = w_j (r - r̄) P x`. Their variance is estimated per
/// stratum: `Var φ_i ≈ Σ_strata factor · Σ_{j∈stratum} (ψ_ji - mean)²`, with
/// `factor = n / (n - 1)` for independent pairs and `(1 - m/N) m / (m - 1)`
/// for `m` of `N` pairs drawn without replacement (any text on stratified
/// sampling, e.g. Cochran, "Sampling Techniques", Wiley, 1977). The removal
/// noise of a pair enters `ψ_j` as `w_j (ε_S - ε_S̄) P x`, of variance
/// `w_j² noise_j (P x)²`; `noise_shares[s]` of it is added per pair of
/// stratum `s`, for the part the factor takes away. A pair drawn `m` times
/// reuses its cached values, so its noise enters `m` times at once: the
/// spread misses `factor · m (m - 1)` times its variance (the covariance of
/// reused values, as for the sample means in `sampling.rs`), added here.
pub(super) fn std_errors(
    fit: &Fit,
    samples: &[PairSample],
    weights: &[f64],
    factors: &[f64],
    noise_shares: &[f64],
    players: usize,
) -> Vec<f64> {
    let strata = factors.len();
    let mut own_noise = vec![0.0; players];
    let mut count = vec![0u64; strata];
    let mut mean = vec![vec![0.0; players]; strata];
    let mut squares = vec![vec![0.0; players]; strata];
    let mut direction = vec![0.0; players];
    // Draws of each pair, keyed by the smaller bit pattern of its two sides.
    let key = |sample: &PairSample| {
        let bits = sample.coalition.bits();
        bits.min(sample.coalition.complement(players).bits())
    };
    let mut draws: HashMap<u128, u64> = HashMap::new();
    if samples.iter().any(|sample| sample.noise != 0.0) {
        for sample in samples {
            *draws.entry(key(sample)).or_insert(0) += 1;
        }
    }
    for sample in samples {
        let complement = sample.coalition.complement(players);
        let predicted: f64 = sample.coalition.members().map(|i| fit.values[i]).sum();
        let predicted_complement: f64 = complement.members().map(|i| fit.values[i]).sum();
        let residual_gap =
            (sample.value - predicted) - (sample.complement_value - predicted_complement);
        // P x = -P x̄: sum the columns of the smaller side.
        let (side, sign) = if sample.coalition.len() <= complement.len() {
            (sample.coalition, 1.0)
        } else {
            (complement, -1.0)
        };
        direction.fill(0.0);
        for j in side.members() {
            for (i, slot) in direction.iter_mut().enumerate() {
                *slot += fit.sensitivity[(i, j)];
            }
        }
        let scale = sign * weights[sample.stratum] * residual_gap;
        let s = sample.stratum;
        let repeats = draws.get(&key(sample)).map_or(0, |m| m - 1) as f64;
        let reused = if repeats > 0.0 && factors[s].is_finite() {
            factors[s] * repeats
        } else {
            0.0
        };
        let noise = (noise_shares[s] + reused) * sample.noise * weights[s] * weights[s];
        if noise != 0.0 {
            for (slot, d) in own_noise.iter_mut().zip(&direction) {
                *slot += noise * d * d;
            }
        }
        count[s] += 1;
        let n = count[s] as f64;
        for i in 0..players {
            let term = scale * direction[i];
            let delta = term - mean[s][i];
            mean[s][i] += delta / n;
            squares[s][i] += delta * (term - mean[s][i]);
        }
    }
    (0..players)
        .map(|i| {
            let variance: f64 = (0..strata)
                .filter(|&s| factors[s] != 0.0)
                .map(|s| {
                    // Too few pairs to estimate a stratum's spread.
                    if factors[s].is_infinite() {
                        f64::INFINITY
                    } else {
                        factors[s] * squares[s][i]
                    }
                })
                .sum::<f64>()
                + own_noise[i];
            variance.sqrt()
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// With `A = I` the constrained minimiser has the closed form
    /// `φ = b - (Σb - total)/p · 1` (Lagrange multipliers by hand; common
    /// practice, no source), and the sensitivity is the projection
    /// `I - 11ᵀ/p`.
    #[test]
    fn identity_gram_matches_the_lagrange_closed_form() {
        let players = 4;
        let mut equations = NormalEquations::new(players);
        equations.gram = DMatrix::identity(players, players);
        equations.moment = DVector::from_vec(vec![1.0, -2.0, 0.5, 4.0]);
        let fit = solve_constrained(&equations, 2.0).unwrap();
        let shift = (3.5 - 2.0) / 4.0;
        for (i, b) in [1.0, -2.0, 0.5, 4.0].iter().enumerate() {
            assert!((fit.values[i] - (b - shift)).abs() < 1e-12);
            for j in 0..players {
                let projection = if i == j { 0.75 } else { -0.25 };
                assert!((fit.sensitivity[(i, j)] - projection).abs() < 1e-12);
            }
        }
    }

    /// A fit the samples do not determine is refused: a Gram matrix that only
    /// involves player 0 leaves players 1 and 2 free (common practice, no
    /// source).
    #[test]
    fn an_undetermined_fit_is_refused() {
        let mut equations = NormalEquations::new(3);
        equations.add(1.0, Coalition::singleton(0), 1.0);
        assert!(solve_constrained(&equations, 1.0).is_none());
    }
}
