//! Kernel-weighted least squares with the efficiency constraint: sampled
//! with complementary pairs drawn from the kernel, sampled by leverage scores
//! without replacement, or fitted exactly over all coalitions.

use std::collections::HashSet;

use nalgebra::{DMatrix, DVector};
use rand::distr::Distribution;
use rand::distr::weighted::WeightedIndex;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

#[cfg(doc)]
use super::exact::ENUMERATION_LIMIT;
use super::exact::enumerate;
use super::fit::{Fit, NormalEquations, PairSample, solve_constrained, std_errors};
use super::sampling::{
    Budget, check_players, evaluate_round, require_evaluations, round_units, single_player,
};
use super::{Estimate, Pace, Stopping};
use crate::engine::coalition::{Coalition, random_of_size};
use crate::engine::error::{EngineError, Result};
use crate::engine::game::{CachedGame, Game};
use crate::engine::summary::Kernel;

/// The weighted fit by sampling: sizes `s` in `1..p` are drawn with
/// probability proportional to `C(p, s) k(s)` (the kernel's share of
/// coalitions of that size), a coalition of that size uniformly, and its
/// complement with it. Coalitions then enter the fit with equal weights, so
/// the fit estimates `argmin Σ_S k(S) (v(S) - v(∅) - Σ_{i∈S} phi_i)²` subject
/// to `Σ phi = v(all) - v(∅)`, which for the Shapley kernel is the Shapley
/// value ("A unified approach to interpreting model predictions", NeurIPS
/// 2017; pairing and the std errors follow "Practical Shapley value
/// estimation via linear regression", AISTATS 2021, PMLR 130).
///
/// Std errors linearise the constrained fit around the estimate: its error
/// is a sum of independent per-pair terms, whose sample variance gives the
/// std error (the sandwich form of a least-squares variance). Over a random
/// removal the pairs' own noise is in that spread, the noise of `v(∅)` and
/// `v(all)`, which every pair shares, is added through the constraint, and
/// so is the covariance of a pair drawn more than once (pairs are drawn with
/// replacement, and a repeat reuses the cached noisy values).
///
/// Needs at least `2p + 4` evaluations, or `2^p` if fewer; fails if the
/// sampled coalitions do not determine the fit.
pub fn paired(
    game: &CachedGame,
    kernel: Kernel,
    stopping: &Stopping,
    seed: u64,
) -> Result<Estimate> {
    check_kernel(kernel)?;
    let players = game.players();
    check_players(players)?;
    if players == 1 {
        return single_player(game, stopping);
    }
    let first_pairs = players as u64 + 1;
    require_evaluations(
        game,
        stopping,
        players,
        2 + 2 * first_pairs,
        "paired regression",
    )?;
    let masses: Vec<f64> = (1..players)
        .map(|size| size_mass(kernel, players, size))
        .collect();
    let sizes = WeightedIndex::new(&masses)
        .map_err(|e| EngineError::new("kernel", format!("gives no usable weights: {e}")))?;
    let full = Coalition::full(players);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut budget = Budget::new(game, stopping, first_pairs);
    let mut equations = NormalEquations::new(players);
    let mut samples: Vec<PairSample> = Vec::new();
    let mut scratch = Vec::with_capacity(players);
    let mut ends = (0.0, 0.0);
    let mut result = None;
    let mut converged = false;

    let mut coalitions = Vec::new();
    let mut values = Vec::new();
    let mut variances = Vec::new();
    let mut end_variances = (0.0, 0.0);
    let mut pace = Pace::start();
    loop {
        stopping.check_cancelled()?;
        let first = samples.is_empty();
        // Past the deadline, rounds go on only until there is a fit.
        if result.is_some() && stopping.past_deadline() {
            break;
        }
        coalitions.clear();
        if first {
            budget.reserve(&[Coalition::EMPTY, full]);
            coalitions.extend([Coalition::EMPTY, full]);
        }
        let offset = coalitions.len();
        let mut wanted = round_units(samples.len() as u64, first_pairs, 2);
        // Until there is a fit, rounds are not cut to the deadline.
        if result.is_some() {
            wanted = pace.fit(wanted, 2, stopping);
        }
        for _ in 0..wanted {
            let size = 1 + sizes.sample(&mut rng);
            let coalition = random_of_size(players, size, &mut scratch, &mut rng);
            let pair = [coalition, coalition.complement(players)];
            if !budget.admit(&pair) {
                break;
            }
            coalitions.extend(pair);
        }
        let admitted = ((coalitions.len() - offset) / 2) as u64;
        if admitted == 0 {
            break;
        }
        evaluate_round(game, &coalitions, &mut values, &mut variances);
        pace.record(coalitions.len() as u64);
        if first {
            ends = (values[0], values[1]);
            if let Some(v) = variances.get(..2) {
                end_variances = (v[0], v[1]);
            }
        }
        for (k, (pair, pair_values)) in coalitions[offset..]
            .chunks(2)
            .zip(values[offset..].chunks(2))
            .enumerate()
        {
            let sample = PairSample {
                coalition: pair[0],
                value: pair_values[0] - ends.0,
                complement_value: pair_values[1] - ends.0,
                stratum: 0,
                noise: pair_noise(&variances, offset + 2 * k),
            };
            equations.add_pair(1.0, &sample, players);
            samples.push(sample);
        }
        if let Some(fit) = solve_constrained(&equations, ends.1 - ends.0) {
            let n = samples.len() as f64;
            let factor = if samples.len() < 2 {
                f64::INFINITY
            } else {
                n / (n - 1.0)
            };
            // Independent pairs: their spread holds all of their own noise.
            let mut std_errors = std_errors(&fit, &samples, &[1.0], &[factor], &[0.0], players);
            with_end_noise(&fit, &equations, &mut std_errors, end_variances);
            let met = stopping.tolerance_met(&std_errors);
            result = Some((fit.values, std_errors));
            if met {
                converged = true;
                break;
            }
        }
        if admitted < wanted || budget.is_exhausted() {
            break;
        }
    }
    finish(result, ends, converged)
}

/// Shapley values by leverage score sampling ("Provably accurate Shapley
/// value estimation via leverage score sampling", ICLR 2025). For the
/// Shapley-kernel regression every coalition size carries the same total
/// leverage, so the complementary pairs `{S, all ∖ S}` are split into strata
/// by size, each stratum gets pairs in proportion to the leverage it
/// carries (the middle size, when p is even, half as many), and within a
/// stratum pairs are drawn uniformly without replacement: no coalition is
/// evaluated twice. A pair of a stratum with `N` pairs of which `m` are
/// drawn enters the fit with weight `k(s) N / m`, the kernel weight over its
/// inclusion probability, so the normal equations are unbiased for the exact
/// ones; a stratum drawn completely enters with its exact weight, and when
/// every stratum is complete the answer is exact (std errors 0, converged).
///
/// Std errors linearise the fit as in [`paired`], with the stratified
/// without-replacement variance (finite population correction `1 - m/N`),
/// and the ends' removal noise as there. No pair repeats, so no cached noise
/// is shared between pairs, but the correction would shrink the pairs' own
/// noise with the sampling error, so the share it removes is put back: when
/// every stratum is complete the std errors are the removal noise alone, as
/// exact enumeration reports it.
///
/// Needs at least `2 + 2 max(p, Σ_s min(N_s, 2))` evaluations.
pub fn leverage(game: &CachedGame, stopping: &Stopping, seed: u64) -> Result<Estimate> {
    let players = game.players();
    check_players(players)?;
    if players == 1 {
        return single_player(game, stopping);
    }
    let mut strata = Stratum::all(players);
    let total_pairs: f64 = strata.iter().map(|s| s.pairs).sum();
    let floors: u64 = strata.iter().map(|s| s.floor()).sum();
    let first_pairs = if total_pairs <= players as f64 {
        total_pairs as u64
    } else {
        floors.max(players as u64)
    };
    require_evaluations(
        game,
        stopping,
        players,
        2 + 2 * first_pairs,
        "leverage regression",
    )?;
    let full = Coalition::full(players);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut budget = Budget::new(game, stopping, first_pairs);
    let mut samples: Vec<PairSample> = Vec::new();
    let mut scratch = Vec::with_capacity(players);
    let mut ends = (0.0, 0.0);
    let mut result = None;
    let mut converged = false;

    let mut coalitions = Vec::new();
    let mut values = Vec::new();
    let mut planned: Vec<u64> = vec![0; strata.len()];
    let mut variances = Vec::new();
    let mut end_variances = (0.0, 0.0);
    let mut pace = Pace::start();
    loop {
        stopping.check_cancelled()?;
        let first = samples.is_empty();
        // Past the deadline, rounds go on only until there is a fit.
        if result.is_some() && stopping.past_deadline() {
            break;
        }
        coalitions.clear();
        if first {
            budget.reserve(&[Coalition::EMPTY, full]);
            coalitions.extend([Coalition::EMPTY, full]);
        }
        let undrawn: f64 = strata.iter().map(|s| s.pairs - s.drawn as f64).sum();
        let mut wanted = round_units(samples.len() as u64, first_pairs, 2);
        // Until there is a fit, rounds are not cut to the deadline.
        if result.is_some() {
            wanted = pace.fit(wanted, 2, stopping);
        }
        let fits = (budget.remaining() / 2).min(wanted);
        let adding = if undrawn < fits as f64 {
            undrawn as u64
        } else {
            fits
        };
        if adding == 0 {
            break;
        }
        for (slot, stratum) in planned.iter_mut().zip(&strata) {
            *slot = stratum.drawn;
        }
        allocate(&strata, &mut planned, adding);
        let offset = coalitions.len();
        for (index, stratum) in strata.iter_mut().enumerate() {
            let extra = planned[index] - stratum.drawn;
            for coalition in stratum.draw(extra, players, &budget, &mut scratch, &mut rng) {
                let pair = [coalition, coalition.complement(players)];
                // Pairs are new to the run and two fit in what is left.
                budget.reserve(&pair);
                coalitions.extend(pair);
                samples.push(PairSample {
                    coalition,
                    value: 0.0,
                    complement_value: 0.0,
                    stratum: index,
                    noise: 0.0,
                });
            }
            stratum.drawn = planned[index];
        }
        evaluate_round(game, &coalitions, &mut values, &mut variances);
        pace.record(coalitions.len() as u64);
        if first {
            ends = (values[0], values[1]);
            if let Some(v) = variances.get(..2) {
                end_variances = (v[0], v[1]);
            }
        }
        let new_samples = samples.len() - (coalitions.len() - offset) / 2;
        for (k, (sample, pair_values)) in samples[new_samples..]
            .iter_mut()
            .zip(values[offset..].chunks(2))
            .enumerate()
        {
            sample.value = pair_values[0] - ends.0;
            sample.complement_value = pair_values[1] - ends.0;
            sample.noise = pair_noise(&variances, offset + 2 * k);
        }
        // The weights change with every stratum's draw count, so the normal
        // equations are rebuilt from the stored pairs each round.
        let weights: Vec<f64> = strata
            .iter()
            .map(|s| s.kernel_weight / s.drawn.max(1) as f64)
            .collect();
        let mut equations = NormalEquations::new(players);
        for sample in &samples {
            equations.add_pair(weights[sample.stratum], sample, players);
        }
        let complete = strata.iter().all(|s| s.drawn as f64 >= s.pairs);
        if let Some(fit) = solve_constrained(&equations, ends.1 - ends.0) {
            let factors: Vec<f64> = strata.iter().map(Stratum::variance_factor).collect();
            // The finite population correction shrinks the spread by
            // 1 - m/N, but the pairs' own removal noise does not shrink as
            // a stratum fills: the m/N it takes away is put back.
            let noise_shares: Vec<f64> = strata
                .iter()
                .map(|s| (s.drawn as f64 / s.pairs).min(1.0))
                .collect();
            let mut std_errors =
                std_errors(&fit, &samples, &weights, &factors, &noise_shares, players);
            with_end_noise(&fit, &equations, &mut std_errors, end_variances);
            // A stratum's spread needs two pairs to be seen at all: with
            // fewer, a std error of 0 says nothing, so no convergence is
            // claimed from it (seen at the minimum of 2p + 2 coalitions,
            // where one pair per stratum reported 0 beside a 23% error).
            let spread_seen = samples.len() as u64 >= PAIRS_TO_CONVERGE
                && strata
                    .iter()
                    .all(|s| s.drawn >= 2 || s.drawn as f64 >= s.pairs);
            let met = complete || (spread_seen && stopping.tolerance_met(&std_errors));
            result = Some((fit.values, std_errors));
            if met {
                converged = true;
                break;
            }
        }
        if adding < wanted {
            break;
        }
    }
    finish(result, ends, converged)
}

/// Fewest sampled pairs from which a leverage fit's std errors are read
/// as converged (as the row samplers require).
const PAIRS_TO_CONVERGE: u64 = 30;

/// The exact weighted fit over all `2^p` coalitions: minimises
/// `Σ_S k(S) (v(S) - v(∅) - Σ_{i∈S} phi_i)²` over the coalitions other than
/// ∅ and all, subject to `Σ phi = v(all) - v(∅)`. With the Shapley kernel
/// this is the Shapley value ("A unified approach to interpreting model
/// predictions", NeurIPS 2017). Takes at most
/// [`ENUMERATION_LIMIT`] players; fails at the deadline or when cancelled.
///
/// The fit is linear in the values: `phi = s + P (b - A s)` with
/// `s = (v(all) - v(∅)) / p · 1`, `b = Σ_S k(S) x_S (v(S) - v(∅))` and `P` the
/// fit's sensitivity, so `v(S)` enters with `P k(S) x_S`, `v(all)` with
/// `e = (1 - P A 1) / p` and `v(∅)` with `-P u - e`, `u = Σ_S k(S) x_S`;
/// the kernel depends on size alone, so `u` is a multiple of `1`, which `P`
/// annihilates, leaving `-e`. Over a noisy game the std errors are
/// `sqrt(Σ c² Var v)` over those.
pub fn fit_all(game: &CachedGame, kernel: Kernel) -> Result<Estimate> {
    fit_all_within(game, kernel, &Stopping::unbounded())
}

/// [`fit_all`], failing at the deadline or when cancelled; noisy std errors
/// are within `stopping.tolerance` when it has converged.
pub fn fit_all_within(game: &CachedGame, kernel: Kernel, stopping: &Stopping) -> Result<Estimate> {
    check_kernel(kernel)?;
    let players = game.players();
    check_players(players)?;
    let (values, variances) = enumerate(game, stopping, "the exact linear fit")?;
    let (empty, all) = (values[0], values[values.len() - 1]);
    if players == 1 {
        let std_errors = variances.iter().sum::<f64>().sqrt();
        return Ok(Estimate::exact_with_noise(
            vec![all - empty],
            vec![std_errors],
            all,
            empty,
            stopping.tolerance,
        ));
    }
    let weights: Vec<f64> = (0..=players)
        .map(|size| match size {
            0 => 0.0,
            s if s == players => 0.0,
            s => coalition_weight(kernel, players, s),
        })
        .collect();
    let mut equations = NormalEquations::new(players);
    // Σ_{|S|=s} [i∈S][j∈S] is C(p-1, s-1) on the diagonal and C(p-2, s-2)
    // off it, so the weighted Gram matrix needs no pass over coalitions.
    for (size, weight) in (1..players).zip(&weights[1..players]) {
        let diagonal = weight * binomial(players - 1, size - 1);
        let off_diagonal = if size >= 2 {
            weight * binomial(players - 2, size - 2)
        } else {
            0.0
        };
        for i in 0..players {
            for j in 0..players {
                equations.gram[(i, j)] += if i == j { diagonal } else { off_diagonal };
            }
        }
    }
    for (bits, value) in values.iter().enumerate() {
        let coalition = Coalition::from_bits(bits as u128);
        let weight = weights[coalition.len()];
        if weight != 0.0 {
            for i in coalition.members() {
                equations.moment[i] += weight * (value - empty);
            }
        }
    }
    let fit = solve_constrained(&equations, all - empty).ok_or_else(|| {
        EngineError::new("kernel", "the weighted fit over all coalitions is singular")
    })?;
    let phi: Vec<f64> = fit.values.iter().copied().collect();
    if variances.is_empty() {
        return Ok(Estimate::exact(phi, all, empty));
    }
    // Σ_S k(S)² Var v(S) x_S x_Sᵀ, whose P · P diagonal is the proper
    // coalitions' share of the variance.
    let mut spread = DMatrix::<f64>::zeros(players, players);
    for (bits, variance) in variances.iter().enumerate() {
        let coalition = Coalition::from_bits(bits as u128);
        let weight = weights[coalition.len()];
        let scaled = weight * weight * variance;
        if scaled != 0.0 {
            for i in coalition.members() {
                for j in coalition.members() {
                    spread[(i, j)] += scaled;
                }
            }
        }
    }
    let sensitivity = &fit.sensitivity;
    let proper = sensitivity * spread * sensitivity;
    let ends = end_coefficients(&fit, &equations);
    let (variance_empty, variance_all) = (variances[0], variances[variances.len() - 1]);
    let std_errors = (0..players)
        .map(|i| {
            (proper[(i, i)] + ends[i] * ends[i] * variance_all + ends[i] * ends[i] * variance_empty)
                .max(0.0)
                .sqrt()
        })
        .collect();
    Ok(Estimate::exact_with_noise(
        phi,
        std_errors,
        all,
        empty,
        stopping.tolerance,
    ))
}

/// `e = (1 - P A 1) / p`: how the fit moves with `v(all) - v(∅)` through
/// the efficiency constraint. A sampled fit's pair-based std errors hold
/// the constraint fixed, so the ends' own noise enters through this.
fn end_coefficients(fit: &Fit, equations: &NormalEquations) -> DVector<f64> {
    let players = equations.moment.len();
    let ones = DVector::from_element(players, 1.0);
    (&ones - &fit.sensitivity * (&equations.gram * &ones)) / players as f64
}

/// Adds the ends' removal noise to a sampled fit's std errors: `v(∅)` and
/// `v(all)` are shared by every pair, so their noise is not in the pairs'
/// spread. `v(∅)` enters with `-e` here, since every pair's `v(S) - v(∅)`
/// and `v(all ∖ S) - v(∅)` move together and `P` annihilates `1`.
fn with_end_noise(
    fit: &Fit,
    equations: &NormalEquations,
    std_errors: &mut [f64],
    end_variances: (f64, f64),
) {
    let noise = end_variances.0 + end_variances.1;
    if noise == 0.0 {
        return;
    }
    let ends = end_coefficients(fit, equations);
    for (se, e) in std_errors.iter_mut().zip(ends.iter()) {
        *se = (*se * *se + e * e * noise).sqrt();
    }
}

fn check_kernel(kernel: Kernel) -> Result<()> {
    match kernel {
        Kernel::Shapley => Ok(()),
        Kernel::Exponential { width } if width.is_finite() && width > 0.0 => Ok(()),
        Kernel::Exponential { width } => Err(EngineError::new(
            "kernel_width",
            format!("must be a positive finite number, got {width}"),
        )),
    }
}

/// The kernel weight `k(s)` of one coalition of `size` players (see
/// [`Kernel`]), for `0 < size < players`.
fn coalition_weight(kernel: Kernel, players: usize, size: usize) -> f64 {
    match kernel {
        Kernel::Shapley => shapley_size_mass(players, size) / binomial(players, size),
        Kernel::Exponential { width } => exponential_weight(width, players, size),
    }
}

/// `C(p, s) k(s)`: the kernel's total weight on coalitions of `size`.
fn size_mass(kernel: Kernel, players: usize, size: usize) -> f64 {
    match kernel {
        Kernel::Shapley => shapley_size_mass(players, size),
        Kernel::Exponential { width } => {
            binomial(players, size) * exponential_weight(width, players, size)
        }
    }
}

/// `(p - 1) / (s (p - s))`: the Shapley kernel summed over one size.
fn shapley_size_mass(players: usize, size: usize) -> f64 {
    (players - 1) as f64 / (size * (players - size)) as f64
}

fn exponential_weight(width: f64, players: usize, size: usize) -> f64 {
    (-(size as f64 - players as f64 / 2.0).abs() / width).exp()
}

/// `C(n, k)` in floating point: exact while it is below 2^53, since every
/// partial product `C(n - k + i, i)` is an integer.
fn binomial(n: usize, k: usize) -> f64 {
    if k > n {
        return 0.0;
    }
    let k = k.min(n - k);
    let mut value = 1.0;
    for i in 1..=k {
        value = value * (n - k + i) as f64 / i as f64;
    }
    value
}

/// `Var v(S) + Var v(all ∖ S)` of the pair at `index` (0 for a
/// deterministic game, whose round has no variances).
fn pair_noise(variances: &[f64], index: usize) -> f64 {
    variances
        .get(index..index + 2)
        .map_or(0.0, |pair| pair[0] + pair[1])
}

/// Ends a regression run: the last fit, or an error if no round produced
/// one.
fn finish(
    result: Option<(DVector<f64>, Vec<f64>)>,
    (empty, all): (f64, f64),
    converged: bool,
) -> Result<Estimate> {
    let (values, std_errors) = result.ok_or_else(|| {
        EngineError::new(
            "max_evaluations",
            "the coalitions sampled within the cap do not determine the fit; allow more \
             evaluations",
        )
    })?;
    Ok(Estimate {
        values: values.iter().copied().collect(),
        std_errors,
        value_full: all,
        value_empty: empty,
        converged,
        selection: None,
    })
}

/// The complementary pairs whose smaller side has `size` players. When `p`
/// is even the middle size pairs coalitions of equal size; each pair is then
/// represented by its side that contains the last player.
struct Stratum {
    size: usize,
    middle: bool,
    /// Pairs in the stratum: `C(p, s)`, or `C(p, s) / 2` in the middle.
    pairs: f64,
    /// Leverage the stratum carries: two sizes, or one in the middle.
    share: f64,
    /// `k(s) N`: the Shapley-kernel weight of one coalition times the
    /// stratum's pair count.
    kernel_weight: f64,
    drawn: u64,
}

impl Stratum {
    fn all(players: usize) -> Vec<Stratum> {
        (1..=players / 2)
            .map(|size| {
                let middle = 2 * size == players;
                let half = if middle { 0.5 } else { 1.0 };
                Stratum {
                    size,
                    middle,
                    pairs: binomial(players, size) * half,
                    share: if middle { 1.0 } else { 2.0 },
                    kernel_weight: shapley_size_mass(players, size) * half,
                    drawn: 0,
                }
            })
            .collect()
    }

    /// Pairs every round keeps at least: two, so the stratum's variance can
    /// be estimated, unless it has fewer.
    fn floor(&self) -> u64 {
        if self.pairs < 2.0 {
            self.pairs as u64
        } else {
            2
        }
    }

    /// The stratified without-replacement variance factor for this stratum.
    fn variance_factor(&self) -> f64 {
        let m = self.drawn as f64;
        if m >= self.pairs {
            0.0
        } else if self.drawn < 2 {
            f64::INFINITY
        } else {
            (1.0 - m / self.pairs) * m / (m - 1.0)
        }
    }

    /// `extra` representatives not drawn before, uniformly without
    /// replacement: by rejection while at most half the stratum would be
    /// drawn, otherwise by listing the stratum (then at most twice the
    /// pairs drawn) and choosing among the rest.
    fn draw(
        &self,
        extra: u64,
        players: usize,
        budget: &Budget,
        scratch: &mut Vec<usize>,
        rng: &mut ChaCha8Rng,
    ) -> Vec<Coalition> {
        let mut chosen: Vec<Coalition> = Vec::with_capacity(extra as usize);
        if extra == 0 {
            return chosen;
        }
        if (self.drawn + extra) as f64 <= self.pairs / 2.0 {
            let mut fresh = HashSet::with_capacity(extra as usize);
            while (chosen.len() as u64) < extra {
                let candidate = self.random_member(players, scratch, rng);
                if !budget.has_seen(candidate) && fresh.insert(candidate) {
                    chosen.push(candidate);
                }
            }
        } else {
            let mut rest: Vec<Coalition> = self
                .members(players)
                .into_iter()
                .filter(|c| !budget.has_seen(*c))
                .collect();
            for k in 0..extra as usize {
                let j = rng.random_range(k..rest.len());
                rest.swap(k, j);
            }
            rest.truncate(extra as usize);
            chosen = rest;
        }
        chosen
    }

    fn random_member(
        &self,
        players: usize,
        scratch: &mut Vec<usize>,
        rng: &mut ChaCha8Rng,
    ) -> Coalition {
        if self.middle {
            random_of_size(players - 1, self.size - 1, scratch, rng).with(players - 1)
        } else {
            random_of_size(players, self.size, scratch, rng)
        }
    }

    /// Every representative of the stratum, in increasing bit order.
    fn members(&self, players: usize) -> Vec<Coalition> {
        let (among, size, extra_bit) = if self.middle {
            (players - 1, self.size - 1, Some(players - 1))
        } else {
            (players, self.size, None)
        };
        let count = binomial(among, size) as usize;
        let mut out = Vec::with_capacity(count);
        let mut bits: u128 = if size == 0 {
            0
        } else {
            u128::MAX >> (128 - size)
        };
        for index in 0..count {
            let coalition = Coalition::from_bits(bits);
            out.push(match extra_bit {
                Some(bit) => coalition.with(bit),
                None => coalition,
            });
            if index + 1 < count {
                bits = next_with_same_count(bits);
            }
        }
        out
    }
}

/// The next larger integer with as many set bits ("Gosper's hack", HAKMEM
/// item 175, MIT AI Memo 239, 1972). Only called on a set that is not the
/// last of its size, so the addition does not overflow.
fn next_with_same_count(bits: u128) -> u128 {
    let lowest = bits & bits.wrapping_neg();
    let ripple = bits + lowest;
    (((ripple ^ bits) >> 2) / lowest) | ripple
}

/// Raises `planned` (each stratum's pairs after this round) by `adding` in
/// all, one pair at a time: first up to each stratum's floor, then to the
/// stratum with the fewest pairs per unit of leverage, so counts follow the
/// leverage shares while no stratum exceeds its size.
fn allocate(strata: &[Stratum], planned: &mut [u64], adding: u64) {
    for _ in 0..adding {
        let mut best: Option<(usize, f64)> = None;
        for (index, stratum) in strata.iter().enumerate() {
            let have = planned[index];
            if have as f64 >= stratum.pairs {
                continue;
            }
            let priority = if have < stratum.floor() {
                -1.0
            } else {
                have as f64 / stratum.share
            };
            if best.is_none_or(|(_, p)| priority < p) {
                best = Some((index, priority));
            }
        }
        match best {
            Some((index, _)) => planned[index] += 1,
            None => return,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Stratum listing against brute force over all bit patterns: every
    /// representative has the right size, appears once, and there are
    /// `C(p, s)` (or half that in the middle) of them.
    #[test]
    fn strata_list_every_pair_once() {
        for players in 2..=9 {
            let mut seen = HashSet::new();
            for stratum in Stratum::all(players) {
                let members = stratum.members(players);
                assert_eq!(members.len() as f64, stratum.pairs);
                for c in members {
                    assert_eq!(c.len(), stratum.size);
                    assert!(seen.insert(c) && seen.insert(c.complement(players)));
                }
            }
            // Every coalition but ∅ and all belongs to exactly one pair.
            assert_eq!(seen.len(), (1usize << players) - 2);
        }
    }

    /// `C(n, k)` against Pascal's rule, and `C(128, 64) ≈ 2.3951e37` (value
    /// from memory).
    #[test]
    fn binomials_follow_pascals_rule() {
        for n in 1..60 {
            for k in 1..n {
                let pascal = binomial(n - 1, k - 1) + binomial(n - 1, k);
                assert!((binomial(n, k) - pascal).abs() <= 1e-15 * pascal);
            }
        }
        assert!(binomial(128, 64) > 2.39e37 && binomial(128, 64) < 2.40e37);
    }

    /// Allocation follows the leverage shares: equal per size, so half as
    /// many pairs in the middle stratum, capped at each stratum's size
    /// (counts worked by hand from the rule in the ICLR 2025 leverage score
    /// paper that every size carries the same leverage).
    #[test]
    fn allocation_follows_the_leverage_shares() {
        let strata = Stratum::all(6);
        let mut planned = vec![0; strata.len()];
        allocate(&strata, &mut planned, 15);
        // Sizes: 6 pairs of sizes 1|5, 15 of 2|4, 10 of 3|3.
        assert_eq!(planned, vec![6, 6, 3]);
        allocate(&strata, &mut planned, 100);
        assert_eq!(planned, vec![6, 15, 10]);
    }
}
