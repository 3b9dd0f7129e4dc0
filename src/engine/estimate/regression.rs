//! Kernel-weighted least squares with the efficiency constraint: sampled
//! with complementary pairs drawn from the kernel, sampled by leverage scores
//! without replacement, or fitted exactly over all coalitions.

use std::collections::HashSet;

use nalgebra::DVector;
use rand::distr::Distribution;
use rand::distr::weighted::WeightedIndex;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::exact::ENUMERATION_LIMIT;
use super::fit::{NormalEquations, PairSample, solve_constrained, std_errors};
use super::sampling::{Budget, check_players, require_evaluations, round_units, single_player};
use super::{Estimate, Stopping};
use crate::engine::coalition::{Coalition, all_coalitions, random_of_size};
use crate::engine::error::{EngineError, Result};
use crate::engine::game::{CachedGame, Game};
use crate::engine::summary::Kernel;

/// Coalitions asked of the game per call while enumerating for [`fit_all`].
const ENUMERATION_BATCH: usize = 4096;

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
/// std error (the sandwich form of a least-squares variance).
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
    loop {
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
        let wanted = round_units(samples.len() as u64, first_pairs, 2);
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
        values.resize(coalitions.len(), 0.0);
        game.values(&coalitions, &mut values);
        if first {
            ends = (values[0], values[1]);
        }
        for (pair, pair_values) in coalitions[offset..]
            .chunks(2)
            .zip(values[offset..].chunks(2))
        {
            let sample = PairSample {
                coalition: pair[0],
                value: pair_values[0] - ends.0,
                complement_value: pair_values[1] - ends.0,
                stratum: 0,
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
            let std_errors = std_errors(&fit, &samples, &[1.0], &[factor], players);
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
/// without-replacement variance (finite population correction `1 - m/N`).
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
    loop {
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
        let wanted = round_units(samples.len() as u64, first_pairs, 2);
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
                });
            }
            stratum.drawn = planned[index];
        }
        values.resize(coalitions.len(), 0.0);
        game.values(&coalitions, &mut values);
        if first {
            ends = (values[0], values[1]);
        }
        let new_samples = samples.len() - (coalitions.len() - offset) / 2;
        for (sample, pair_values) in samples[new_samples..]
            .iter_mut()
            .zip(values[offset..].chunks(2))
        {
            sample.value = pair_values[0] - ends.0;
            sample.complement_value = pair_values[1] - ends.0;
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
            let std_errors = std_errors(&fit, &samples, &weights, &factors, players);
            let met = complete || stopping.tolerance_met(&std_errors);
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

/// The exact weighted fit over all `2^p` coalitions: minimises
/// `Σ_S k(S) (v(S) - v(∅) - Σ_{i∈S} phi_i)²` over the coalitions other than
/// ∅ and all, subject to `Σ phi = v(all) - v(∅)`. With the Shapley kernel
/// this is the Shapley value ("A unified approach to interpreting model
/// predictions", NeurIPS 2017). Takes at most
/// [`ENUMERATION_LIMIT`] players.
pub fn fit_all(game: &CachedGame, kernel: Kernel) -> Result<Estimate> {
    check_kernel(kernel)?;
    let players = game.players();
    check_players(players)?;
    if players > ENUMERATION_LIMIT {
        return Err(EngineError::new(
            "estimator",
            format!(
                "the exact linear fit of {players} players needs 2^{players} coalitions; \
                 the limit is {ENUMERATION_LIMIT} players: choose a sampled estimator"
            ),
        ));
    }
    let full = Coalition::full(players);
    let mut ends = [0.0; 2];
    game.values(&[Coalition::EMPTY, full], &mut ends);
    let [empty, all] = ends;
    if players == 1 {
        return Ok(Estimate::exact(vec![all - empty], all, empty));
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
    let coalitions: Vec<Coalition> = all_coalitions(players).collect();
    let mut values = vec![0.0; ENUMERATION_BATCH.min(coalitions.len())];
    for batch in coalitions.chunks(ENUMERATION_BATCH) {
        let out = &mut values[..batch.len()];
        game.values(batch, out);
        for (coalition, value) in batch.iter().zip(out.iter()) {
            let weight = weights[coalition.len()];
            if weight != 0.0 {
                for i in coalition.members() {
                    equations.moment[i] += weight * (value - empty);
                }
            }
        }
    }
    let fit = solve_constrained(&equations, all - empty).ok_or_else(|| {
        EngineError::new("kernel", "the weighted fit over all coalitions is singular")
    })?;
    Ok(Estimate::exact(
        fit.values.iter().copied().collect(),
        all,
        empty,
    ))
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
