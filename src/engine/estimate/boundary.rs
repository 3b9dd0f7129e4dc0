//! Effort where the listed reasons are still uncertain. After a sampler's
//! Shapley estimate, the players whose place in or out of the top-k reasons
//! is not yet clear get more samples of their own, until the listed set is
//! separated at the requested level or the budget ends.
//!
//! Each extra sample of player i is the mean of two marginal contributions
//! `v(S ∪ {i}) − v(S)`: S drawn from the Shapley distribution (a size
//! uniform in 0..p−1, then a uniform subset of the others of that size),
//! and its complement among the others, which has the same distribution
//! (an antithetic pair). Either is an unbiased estimate of φ_i, taken per
//! player ("Polynomial calculation of
//! the Shapley value based on sampling", Castro, Gómez and Tejada,
//! Computers & Operations Research 36(5), 2009) and spent on chosen players
//! rather than on all alike (as in "Improving polynomial estimation of the
//! Shapley value by stratified random sampling with optimum allocation",
//! Castro, Gómez, Molina and Tejada, Computers & Operations Research 82,
//! 2017). The per-player mean is combined with the sampler's estimate by
//! inverse-variance weights, the two being independent.

use std::collections::BTreeSet;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::{Estimate, Pace, Stopping};
use crate::engine::coalition::Coalition;
use crate::engine::error::Result;
use crate::engine::game::{CachedGame, Game};
use crate::reasons::{self, Attributions};

/// What the caller will list: the reasons' direction, how many, the level
/// the set must reach, and each player's reason code and statement.
#[derive(Debug, Clone, PartialEq)]
pub struct Goal {
    /// +1 when a larger value is adverse, −1 when a smaller one is.
    pub sign: f64,
    pub limit: usize,
    pub level: f64,
    pub codes: Vec<String>,
    pub statements: Vec<String>,
}

/// What the boundary phase did.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Boundary {
    /// Every player that got samples of its own, in player order.
    pub players: Vec<usize>,
    /// Coalition values it computed (those the cache already held are not
    /// counted).
    pub evaluations: u64,
    /// Whether the listed set reached the goal's level.
    pub separated: bool,
}

/// Std errors a unit's weight may be from the list's cut and still count
/// as on the boundary: wide, so a unit that only looks safe is checked.
const BOUNDARY_STD_ERRORS: f64 = 3.0;
/// Samples per boundary player in the first round; rounds then double up
/// to [`MOST_PER_ROUND`]. A player's own samples count once it has
/// [`FIRST_PER_PLAYER`] of them (fewer give too rough a variance).
const FIRST_PER_PLAYER: u64 = 8;
const MOST_PER_ROUND: u64 = 512;
/// Coalition values of one sample: an antithetic pair of contributions.
const PAIR_COST: u64 = 4;

/// Per player: count, mean and sum of squared deviations of its own
/// samples (Welford's update).
#[derive(Debug, Clone, Copy, Default)]
struct Own {
    count: u64,
    mean: f64,
    squares: f64,
}

impl Own {
    fn add(&mut self, x: f64) {
        self.count += 1;
        let delta = x - self.mean;
        self.mean += delta / self.count as f64;
        self.squares += delta * (x - self.mean);
    }

    fn std_error(&self) -> f64 {
        if self.count < 2 {
            f64::INFINITY
        } else {
            let n = self.count as f64;
            (self.squares / (n - 1.0) / n).sqrt()
        }
    }
}

/// The sampler's estimate with each player's own samples folded in.
fn combined(first: &Estimate, own: &[Own]) -> Estimate {
    let mut estimate = first.clone();
    for (player, own) in own.iter().enumerate() {
        if own.count < FIRST_PER_PLAYER {
            continue;
        }
        let (value, error) = (first.values[player], first.std_errors[player]);
        let (mean, own_error) = (own.mean, own.std_error());
        let (value, error) = if error == 0.0 {
            (value, 0.0)
        } else if own_error == 0.0 {
            (mean, 0.0)
        } else {
            let (w1, w2) = (error.powi(-2), own_error.powi(-2));
            (
                (w1 * value + w2 * mean) / (w1 + w2),
                (w1 + w2).sqrt().recip(),
            )
        };
        estimate.values[player] = value;
        estimate.std_errors[player] = error;
    }
    estimate
}

/// Players of the reason units whose weight is within
/// [`BOUNDARY_STD_ERRORS`] of the cut between the k-th and the next unit
/// (or of zero, with k or fewer units pushing the adverse way), the units
/// closest to the cut (in std errors) first.
fn boundary_players(estimate: &Estimate, goal: &Goal) -> Vec<Vec<usize>> {
    let units = reasons::units(&goal.codes, &goal.statements);
    let mut scored: Vec<(f64, f64, &Vec<usize>)> = units
        .iter()
        .map(|players| {
            let weight: f64 = players
                .iter()
                .map(|&p| goal.sign * estimate.values[p])
                .sum();
            let spread = players
                .iter()
                .map(|&p| estimate.std_errors[p].powi(2))
                .sum::<f64>()
                .sqrt();
            (weight, spread, players)
        })
        .collect();
    scored.sort_by(|a, b| b.0.total_cmp(&a.0));
    let adverse = scored.iter().filter(|(w, _, _)| *w > 0.0).count();
    let cut = if adverse > goal.limit && goal.limit > 0 {
        (scored[goal.limit - 1].0 + scored[goal.limit].0) / 2.0
    } else {
        0.0
    };
    let mut near: Vec<(f64, Vec<usize>)> = scored
        .iter()
        .filter(|(weight, spread, _)| {
            *spread > 0.0 && (weight - cut).abs() < BOUNDARY_STD_ERRORS * spread
        })
        .map(|(weight, spread, players)| {
            let uncertain = players
                .iter()
                .copied()
                .filter(|&p| estimate.std_errors[p] > 0.0)
                .collect();
            ((weight - cut).abs() / spread, uncertain)
        })
        .collect();
    near.sort_by(|a, b| a.0.total_cmp(&b.0));
    near.into_iter().map(|(_, players)| players).collect()
}

/// Whether the listed set is separated at the goal's level, its
/// probability drawn with the answer's seed as the answer's reasons are.
fn separated(estimate: &Estimate, goal: &Goal, seed: u64) -> bool {
    reasons::principal_reasons(
        &Attributions {
            values: &estimate.values,
            std_errors: &estimate.std_errors,
            codes: &goal.codes,
            statements: &goal.statements,
        },
        goal.sign,
        goal.limit,
        goal.level,
        seed,
    )
    .certain
}

/// Refines `first` (a Shapley estimate of `game`) toward `goal` within
/// `stopping` (the cap counts every evaluation of the run, the sampler's
/// included).
pub fn refine(
    game: &CachedGame,
    first: Estimate,
    goal: &Goal,
    stopping: &Stopping,
    seed: u64,
) -> Result<(Estimate, Boundary)> {
    let players = game.players();
    let mut own = vec![Own::default(); players];
    let mut report = Boundary::default();
    let mut targeted = BTreeSet::new();
    // Its own stream ("boundary" in ASCII), apart from the sampler's.
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x626f_756e_6461_7279);
    let mut pace = Pace::start();
    let mut per_player = FIRST_PER_PLAYER;
    let mut estimate = first.clone();
    let mut coalitions = Vec::new();
    let mut values = Vec::new();
    let mut others = Vec::with_capacity(players);
    let before = game.evaluations();
    let mut asked = false;
    loop {
        if separated(&estimate, goal, seed) {
            report.separated = true;
            break;
        }
        stopping.check_cancelled()?;
        if stopping.past_deadline() {
            break;
        }
        // The units closest to the cut first, as many as can each get a
        // round of samples from what is left of the cap.
        let left = stopping.max_evaluations.saturating_sub(game.evaluations());
        let mut boundary: Vec<usize> = Vec::new();
        for unit in boundary_players(&estimate, goal) {
            if boundary.is_empty()
                || PAIR_COST * (boundary.len() + unit.len()) as u64 * FIRST_PER_PLAYER <= left
            {
                boundary.extend(unit);
            }
        }
        if boundary.is_empty() {
            break;
        }
        let unit_cost = PAIR_COST * boundary.len() as u64;
        let rounds = pace.fit(per_player.min(left / unit_cost), unit_cost, stopping);
        if rounds == 0 {
            break;
        }
        coalitions.clear();
        for _ in 0..rounds {
            for &player in &boundary {
                others.clear();
                others.extend((0..players).filter(|&q| q != player));
                let size = rng.random_range(0..players);
                // A uniform subset of `size` of the others: the first
                // `size` of a partial shuffle. Its complement among the
                // others has the Shapley distribution too, and the two
                // contributions usually pull opposite ways (an antithetic
                // pair), so their mean is one sample.
                let mut set = Coalition::EMPTY;
                for k in 0..size {
                    let pick = rng.random_range(k..others.len());
                    others.swap(k, pick);
                    set = set.with(others[k]);
                }
                let mut rest = Coalition::EMPTY;
                for &other in &others[size..] {
                    rest = rest.with(other);
                }
                coalitions.extend([set.with(player), set, rest.with(player), rest]);
            }
        }
        values.resize(coalitions.len(), 0.0);
        game.values(&coalitions, &mut values);
        pace.record(coalitions.len() as u64);
        asked = true;
        for (k, pair) in values.chunks(PAIR_COST as usize).enumerate() {
            let contributions = (pair[0] - pair[1]) + (pair[2] - pair[3]);
            own[boundary[k % boundary.len()]].add(contributions / 2.0);
        }
        targeted.extend(boundary.iter().copied());
        estimate = combined(&first, &own);
        per_player = (per_player * 2).min(MOST_PER_ROUND);
    }
    report.players = targeted.into_iter().collect();
    report.evaluations = game.evaluations() - before;
    if asked {
        estimate.converged = stopping.tolerance_met(&estimate.std_errors);
    }
    Ok((estimate, report))
}
