//! Permutation sampling of Shapley values with antithetic (reversed)
//! permutations.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::sampling::{
    Budget, RunningMoments, SharedNoise, check_players, evaluate_round, require_evaluations,
    round_units, single_player,
};
use super::{Estimate, Pace, Stopping};
use crate::engine::coalition::{Coalition, random_permutation};
use crate::engine::error::Result;
use crate::engine::game::{CachedGame, Game};

/// Antithetic pairs in the first round: the fewest that give a std error.
const FIRST_PAIRS: u64 = 2;

/// Shapley values by antithetic permutation sampling: each sample is a
/// random permutation and its reverse, every player's marginal contribution
/// on joining its predecessors is averaged over the two, and the estimate is
/// the mean over pairs ("Polynomial calculation of the Shapley value based on
/// sampling", Computers & Operations Research 36(5), 2009; the reversed
/// permutation as antithetic variate is common practice). Each permutation's
/// contributions sum to `v(all) - v(none)`, so the estimate is efficient.
/// The std error of a player is the sample std deviation of its per-pair
/// averages over the square root of the number of pairs; over a random
/// removal, with the noise that cached values shared between pairs add
/// (see `SharedNoise` in `sampling.rs`).
///
/// Needs at least `4p - 2` evaluations (two pairs), or `2^p` if fewer.
pub fn shapley(game: &CachedGame, stopping: &Stopping, seed: u64) -> Result<Estimate> {
    let players = game.players();
    check_players(players)?;
    if players == 1 {
        return single_player(game, stopping);
    }
    // A pair asks for the p - 1 proper prefixes of the permutation and their
    // complements, which are the proper prefixes of the reversed one.
    let unit_cost = 2 * (players as u64 - 1);
    require_evaluations(
        game,
        stopping,
        players,
        2 + FIRST_PAIRS * unit_cost,
        "permutation sampling",
    )?;
    let full = Coalition::full(players);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut budget = Budget::new(game, stopping, FIRST_PAIRS);
    let mut averages = RunningMoments::new(players);
    let (mut value_empty, mut value_full) = (0.0, 0.0);
    let mut std_errors = vec![f64::INFINITY; players];
    let mut converged = false;

    let mut order = Vec::with_capacity(players);
    let mut orders: Vec<usize> = Vec::new();
    let mut unit = Vec::with_capacity(unit_cost as usize);
    let mut coalitions = Vec::new();
    let mut values = Vec::new();
    let mut variances = Vec::new();
    let mut shared = game.is_noisy().then(|| SharedNoise::new(players));
    let (mut variance_empty, mut variance_full) = (0.0, 0.0);
    let mut contribution = vec![0.0; players];
    let mut pace = Pace::start();
    loop {
        stopping.check_cancelled()?;
        let first = averages.count() == 0;
        if !first && stopping.past_deadline() {
            break;
        }
        coalitions.clear();
        orders.clear();
        if first {
            budget.reserve(&[Coalition::EMPTY, full]);
            coalitions.extend([Coalition::EMPTY, full]);
        }
        let offset = coalitions.len();
        let wanted = pace.fit(
            round_units(averages.count(), FIRST_PAIRS, unit_cost),
            unit_cost,
            stopping,
        );
        for _ in 0..wanted {
            random_permutation(players, &mut order, &mut rng);
            unit.clear();
            let mut prefix = Coalition::EMPTY;
            for &player in &order[..players - 1] {
                prefix = prefix.with(player);
                unit.push(prefix);
                unit.push(prefix.complement(players));
            }
            if !budget.admit(&unit) {
                break;
            }
            coalitions.extend_from_slice(&unit);
            orders.extend_from_slice(&order);
        }
        let admitted = (orders.len() / players) as u64;
        if admitted == 0 {
            break;
        }
        evaluate_round(game, &coalitions, &mut values, &mut variances);
        pace.record(coalitions.len() as u64);
        if first {
            value_empty = values[0];
            value_full = values[1];
            if let Some(v) = variances.get(..2) {
                (variance_empty, variance_full) = (v[0], v[1]);
            }
        }
        let unit_len = unit_cost as usize;
        for (k, order) in orders.chunks(players).enumerate() {
            let unit_values = &values[offset + k * unit_len..offset + (k + 1) * unit_len];
            // v of the forward prefix of length `l`, and of its complement,
            // which is the reversed permutation's prefix of length p - l.
            let forward = |l: usize| match l {
                0 => value_empty,
                l if l == players => value_full,
                l => unit_values[2 * (l - 1)],
            };
            let backward = |l: usize| match l {
                0 => value_empty,
                l if l == players => value_full,
                l => unit_values[2 * (players - l - 1) + 1],
            };
            for (position, &player) in order.iter().enumerate() {
                let joins_forward = forward(position + 1) - forward(position);
                // In the reversed order this player comes after the
                // p - 1 - position players that followed it.
                let before = players - 1 - position;
                let joins_backward = backward(before + 1) - backward(before);
                contribution[player] = 0.5 * (joins_forward + joins_backward);
            }
            averages.add(&contribution);
            if let Some(shared) = shared.as_mut() {
                let unit = &coalitions[offset + k * unit_len..offset + (k + 1) * unit_len];
                let unit_variances = &variances[offset + k * unit_len..offset + (k + 1) * unit_len];
                // The prefix of length l (∅ and all at the ends) and its
                // complement, with their variances.
                let prefix = |l: usize| match l {
                    0 => (Coalition::EMPTY, variance_empty),
                    l if l == players => (full, variance_full),
                    l => (unit[2 * (l - 1)], unit_variances[2 * (l - 1)]),
                };
                let complement = |l: usize| match l {
                    0 => (full, variance_full),
                    l if l == players => (Coalition::EMPTY, variance_empty),
                    l => (unit[2 * (l - 1) + 1], unit_variances[2 * (l - 1) + 1]),
                };
                // The four values behind the player's contribution, which
                // are distinct coalitions for p ≥ 2.
                for (position, &player) in order.iter().enumerate() {
                    for ((coalition, variance), c) in [
                        (prefix(position + 1), 0.5),
                        (prefix(position), -0.5),
                        (complement(position), 0.5),
                        (complement(position + 1), -0.5),
                    ] {
                        shared.add(coalition, player, c, variance);
                    }
                }
            }
        }
        averages.std_errors_into(&mut std_errors);
        if let Some(shared) = &shared {
            shared.widen(averages.count(), &mut std_errors);
        }
        if stopping.tolerance_met(&std_errors) {
            converged = true;
            break;
        }
        if admitted < wanted || budget.is_exhausted() {
            break;
        }
    }
    Ok(Estimate {
        values: averages.means().to_vec(),
        std_errors,
        value_full,
        value_empty,
        converged,
        selection: None,
    })
}
