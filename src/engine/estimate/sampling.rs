//! What every sampled estimator shares: the round schedule, the
//! evaluation budget that keeps the cache within its cap, the refusals of
//! games no sampler can take, and running moments for std errors.

use std::collections::{HashMap, HashSet};

use super::{Estimate, Stopping};
use crate::engine::coalition::{Coalition, MAX_PLAYERS};
use crate::engine::error::{EngineError, Result};
use crate::engine::game::{CachedGame, Game};

/// Coalitions asked of the game per round after the first: enough for a
/// well-filled batched model call, few enough that the deadline and the
/// tolerance are checked often.
pub(super) const ROUND_COALITIONS: u64 = 4096;

/// Sample units (permutation pairs, coalition pairs, coalitions) for the next
/// round: `first` to start, then as many as were drawn so far (so the work
/// doubles while rounds are small), at most about [`ROUND_COALITIONS`]
/// coalitions.
pub(super) fn round_units(drawn: u64, first: u64, unit_cost: u64) -> u64 {
    if drawn == 0 {
        return first;
    }
    let most = (ROUND_COALITIONS / unit_cost.max(1)).max(first);
    drawn.clamp(first, most)
}

/// The round's values, and their variances when the game is noisy (left
/// empty otherwise).
pub(super) fn evaluate_round(
    game: &CachedGame,
    coalitions: &[Coalition],
    values: &mut Vec<f64>,
    variances: &mut Vec<f64>,
) {
    values.resize(coalitions.len(), 0.0);
    if game.is_noisy() {
        variances.resize(coalitions.len(), 0.0);
        game.values_and_variances(coalitions, values, variances);
    } else {
        variances.clear();
        game.values(coalitions, values);
    }
}

/// The removal noise a sample mean's std error misses when samples share
/// cached coalition values. A sample `k` is `X_k = Σ_S c_kS v(S)`; over the
/// noise of the `v(S)` (independent across coalitions, fixed across the
/// samples that reuse them) the mean's variance is
/// `Σ_S C_S² Var v(S) / n²` with `C_S = Σ_k c_kS`, while the sample variance
/// over `n` estimates only `Σ_S (Σ_k c_kS² - C_S² / n) Var v(S) / (n (n-1))`
/// of it; the difference is `Σ_S (C_S² - Σ_k c_kS²) Var v(S) / (n (n-1))`,
/// the covariance that reuse creates (derived here from the expectation of
/// the sample variance; common practice, no source). Kept per player,
/// updated one coefficient at a time.
pub(super) struct SharedNoise {
    /// `C_S` so far, per (coalition, player).
    totals: HashMap<(Coalition, u8), f64>,
    /// `Σ_S (C_S² - Σ_k c_kS²) Var v(S)` per player.
    cross: Vec<f64>,
}

impl SharedNoise {
    pub(super) fn new(players: usize) -> SharedNoise {
        SharedNoise {
            totals: HashMap::new(),
            cross: vec![0.0; players],
        }
    }

    /// Sample coefficient `c` of `coalition`'s value (of variance
    /// `variance`) in `player`'s sample. Each (sample, coalition, player)
    /// must come once, with its whole coefficient.
    pub(super) fn add(&mut self, coalition: Coalition, player: usize, c: f64, variance: f64) {
        if variance == 0.0 {
            return;
        }
        let total = self.totals.entry((coalition, player as u8)).or_insert(0.0);
        // (C + c)² - C² - c² = 2 c C: the new cross terms.
        self.cross[player] += 2.0 * c * *total * variance;
        *total += c;
    }

    /// Adds the missing term to std errors of means over `samples` samples.
    pub(super) fn widen(&self, samples: u64, std_errors: &mut [f64]) {
        if samples < 2 {
            return;
        }
        let n = samples as f64;
        for (se, cross) in std_errors.iter_mut().zip(&self.cross) {
            *se = (*se * *se + cross / (n * (n - 1.0))).max(0.0).sqrt();
        }
    }
}

/// Refuses games no sampler can take.
pub(super) fn check_players(players: usize) -> Result<()> {
    if players == 0 {
        return Err(EngineError::new("players", "the game has no players"));
    }
    if players > MAX_PLAYERS {
        return Err(EngineError::new(
            "players",
            format!("{players} players; at most {MAX_PLAYERS} are supported"),
        ));
    }
    Ok(())
}

/// The two ends of the game that it has already evaluated (the job looks
/// them up early for the default tolerance).
fn held_ends<'g>(game: &'g CachedGame) -> impl Iterator<Item = Coalition> + 'g {
    [Coalition::EMPTY, Coalition::full(game.players())]
        .into_iter()
        .filter(|end| game.holds(*end))
}

/// Refuses a cap below `need` evaluations (or below `2^p`, which always
/// suffices because no coalition is counted twice). Every sampler's `need`
/// counts the two ends; an end the game already holds is counted in its
/// evaluations, so it is taken off the need rather than counted twice.
pub(super) fn require_evaluations(
    game: &CachedGame,
    stopping: &Stopping,
    players: usize,
    need: u64,
    estimator: &str,
) -> Result<()> {
    let need = if players < 64 {
        need.min(1u64 << players)
    } else {
        need
    };
    let ends_held = held_ends(game).count() as u64;
    let allowed = stopping.max_evaluations.saturating_sub(game.evaluations());
    if allowed < need.saturating_sub(ends_held) {
        return Err(EngineError::new(
            "max_evaluations",
            format!(
                "{estimator} needs at least {need} coalition evaluations for {players} players; \
                 {} allowed",
                allowed + ends_held
            ),
        ));
    }
    Ok(())
}

/// A one-player game has one answer for every summary here:
/// `v({0}) - v(∅)`.
pub(super) fn single_player(game: &CachedGame, stopping: &Stopping) -> Result<Estimate> {
    require_evaluations(game, stopping, 1, 2, "a one-player game")?;
    let mut ends = [0.0; 2];
    game.values(&[Coalition::EMPTY, Coalition::full(1)], &mut ends);
    Ok(Estimate::exact(vec![ends[1] - ends[0]], ends[1], ends[0]))
}

/// The evaluation cap of one sampled run. It remembers every coalition the
/// run has asked for, so a sample unit is charged only for coalitions that
/// are new to the run: an upper bound on what the cache will evaluate, which
/// keeps `game.evaluations()` within the cap. Sample units drawn are capped
/// too (at the evaluation cap, or the first round if larger), so a small game
/// whose coalitions are all cached still ends.
pub(super) struct Budget {
    cap: u64,
    charged: u64,
    seen: HashSet<Coalition>,
    draws: u64,
    draw_limit: u64,
    exhausted: bool,
}

impl Budget {
    pub(super) fn new(game: &CachedGame, stopping: &Stopping, first_units: u64) -> Budget {
        Budget {
            cap: stopping.max_evaluations,
            // The ends the game already holds are in its evaluations, so
            // they are charged already.
            charged: game.evaluations(),
            seen: held_ends(game).collect(),
            draws: 0,
            draw_limit: stopping.max_evaluations.max(first_units),
            exhausted: false,
        }
    }

    /// Evaluations still allowed.
    pub(super) fn remaining(&self) -> u64 {
        self.cap.saturating_sub(self.charged)
    }

    /// Whether the run has asked for `coalition` before.
    pub(super) fn has_seen(&self, coalition: Coalition) -> bool {
        self.seen.contains(&coalition)
    }

    /// Charges one sample unit asking for `coalitions`; false, with nothing
    /// charged and the budget marked exhausted, if it would pass the cap.
    pub(super) fn admit(&mut self, coalitions: &[Coalition]) -> bool {
        if self.draws >= self.draw_limit || !self.reserve(coalitions) {
            self.exhausted = true;
            return false;
        }
        self.draws += 1;
        true
    }

    /// Charges coalitions that are not a sample unit (the two ends).
    pub(super) fn reserve(&mut self, coalitions: &[Coalition]) -> bool {
        let mut fresh = Vec::new();
        for c in coalitions {
            if self.seen.insert(*c) {
                fresh.push(*c);
            }
        }
        if fresh.len() as u64 > self.remaining() {
            for c in &fresh {
                self.seen.remove(c);
            }
            return false;
        }
        self.charged += fresh.len() as u64;
        true
    }

    /// Whether a unit has been refused: the run should end after this round.
    pub(super) fn is_exhausted(&self) -> bool {
        self.exhausted
    }
}

/// Per-player running mean and sum of squared deviations (Welford's update,
/// "Note on a method for calculating corrected sums of squares and
/// products", Technometrics 4(3), 1962).
pub(super) struct RunningMoments {
    count: u64,
    mean: Vec<f64>,
    squares: Vec<f64>,
}

impl RunningMoments {
    pub(super) fn new(players: usize) -> RunningMoments {
        RunningMoments {
            count: 0,
            mean: vec![0.0; players],
            squares: vec![0.0; players],
        }
    }

    pub(super) fn add(&mut self, sample: &[f64]) {
        self.count += 1;
        let n = self.count as f64;
        for ((mean, squares), x) in self.mean.iter_mut().zip(&mut self.squares).zip(sample) {
            let delta = x - *mean;
            *mean += delta / n;
            *squares += delta * (x - *mean);
        }
    }

    pub(super) fn count(&self) -> u64 {
        self.count
    }

    pub(super) fn means(&self) -> &[f64] {
        &self.mean
    }

    /// Std error of each mean; infinite with fewer than two samples.
    pub(super) fn std_errors_into(&self, out: &mut [f64]) {
        for (slot, squares) in out.iter_mut().zip(&self.squares) {
            *slot = if self.count < 2 {
                f64::INFINITY
            } else {
                let n = self.count as f64;
                (squares / (n - 1.0) / n).sqrt()
            };
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::estimate::EstimatorKind;
    use crate::engine::game::FnGame;

    /// The budget's charge is an upper bound on what the cache evaluates, so
    /// the cache's own counter never passes the cap (common practice, no
    /// source: the counter is the cache's, not the budget's).
    #[test]
    fn the_budget_keeps_the_cache_within_the_cap() {
        let game = FnGame::new(4, |c: Coalition| c.len() as f64);
        let cached = CachedGame::new(&game);
        let stopping = Stopping::evaluations(5);
        let mut budget = Budget::new(&cached, &stopping, 1);
        let a = Coalition::singleton(0);
        let b = Coalition::singleton(1);
        let c = Coalition::singleton(2);
        assert!(budget.admit(&[a, b, a]));
        assert!(budget.admit(&[a, b]), "repeats cost nothing");
        assert!(budget.admit(&[c, a.union(b)]));
        assert!(!budget.admit(&[Coalition::full(4), Coalition::EMPTY]));
        assert!(budget.is_exhausted());
        assert!(budget.admit(&[b]), "a unit of known coalitions still fits");
        let mut out = [0.0; 4];
        cached.values(&[a, b, c, a.union(b)], &mut out);
        assert!(cached.evaluations() <= 5);
        assert_eq!(cached.evaluations(), 4);
    }

    /// A cap of exactly a sampler's smallest run is enough when the ends
    /// were evaluated before it (as the job does for the default
    /// tolerance): they are part of its need, not extra to it. The load
    /// bench found AUTO's plans at that cap refused on `max_evaluations`.
    #[test]
    fn ends_evaluated_first_count_once_towards_the_smallest_run() {
        use crate::engine::plan::sampler_minimum;
        let players = 20;
        let game = FnGame::new(players, |c: Coalition| c.len() as f64);
        for estimator in [
            EstimatorKind::LeverageRegression,
            EstimatorKind::Permutation,
            EstimatorKind::MaximumSampleReuse,
        ] {
            let cached = CachedGame::new(&game);
            let mut ends = [0.0; 2];
            cached.values(&[Coalition::EMPTY, Coalition::full(players)], &mut ends);
            let cap = sampler_minimum(estimator, players);
            let stopping = Stopping::evaluations(cap);
            let result = match estimator {
                EstimatorKind::LeverageRegression => {
                    super::super::regression::leverage(&cached, &stopping, 1)
                }
                EstimatorKind::Permutation => {
                    super::super::permutation::shapley(&cached, &stopping, 1)
                }
                _ => super::super::msr::banzhaf(&cached, &stopping, 1),
            };
            assert!(result.is_ok(), "{estimator:?} at {cap}: {result:?}");
            assert!(
                cached.evaluations() <= cap,
                "{estimator:?}: {}",
                cached.evaluations()
            );
        }
    }

    /// Welford's running variance equals the two-pass textbook formula
    /// (Technometrics 4(3), 1962).
    #[test]
    fn running_moments_match_the_two_pass_formula() {
        let samples = [1.5, -2.0, 7.25, 0.5, 3.0];
        let mut moments = RunningMoments::new(1);
        for x in samples {
            moments.add(&[x]);
        }
        let n = samples.len() as f64;
        let mean = samples.iter().sum::<f64>() / n;
        let variance = samples.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
        let mut se = [0.0];
        moments.std_errors_into(&mut se);
        assert!((moments.means()[0] - mean).abs() < 1e-14);
        assert!((se[0] - (variance / n).sqrt()).abs() < 1e-14);
    }
}
