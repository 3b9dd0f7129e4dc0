//! Maximum sample reuse for raw Banzhaf values: uniformly random coalitions,
//! each one used for every player, either on the side that contains the
//! player or on the side that does not.

use std::collections::HashMap;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::sampling::{
    Budget, RunningMoments, check_players, evaluate_round, require_evaluations, round_units,
    single_player,
};
use super::{Estimate, Pace, Stopping};
use crate::engine::coalition::Coalition;
use crate::engine::error::Result;
use crate::engine::game::{CachedGame, Game};

/// Coalitions in the first round: with 32 samples a player misses one side
/// of the split (or has only one sample there) with probability 33/2^32.
const FIRST_SAMPLES: u64 = 32;

/// Raw Banzhaf values by maximum sample reuse: coalitions are drawn
/// uniformly (each player in with probability 1/2, independently) and
/// `phi_i = mean{v(S) : i ∈ S} - mean{v(S) : i ∉ S}` ("Data Banzhaf: a robust
/// data valuation framework for machine learning", AISTATS 2023). The std
/// error is `sqrt(var_in / n_in + var_out / n_out)` from the two sample
/// variances; it is infinite for a player with fewer than two samples on a
/// side, whose value is then 0 if a side has none. Over a random removal a
/// coalition drawn again reuses its cached noisy value; the covariance that
/// adds is put back (see `SharedNoise` in `sampling.rs`: a coalition drawn
/// `m` times adds `m (m - 1) Var v(S)` to its side).
///
/// Needs at least 34 evaluations (the two ends and 32 samples), or `2^p` if
/// fewer.
pub fn banzhaf(game: &CachedGame, stopping: &Stopping, seed: u64) -> Result<Estimate> {
    let players = game.players();
    check_players(players)?;
    if players == 1 {
        return single_player(game, stopping);
    }
    require_evaluations(
        game,
        stopping,
        players,
        2 + FIRST_SAMPLES,
        "maximum sample reuse",
    )?;
    let full = Coalition::full(players);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut budget = Budget::new(game, stopping, FIRST_SAMPLES);
    let mut inside: Vec<RunningMoments> = (0..players).map(|_| RunningMoments::new(1)).collect();
    let mut outside: Vec<RunningMoments> = (0..players).map(|_| RunningMoments::new(1)).collect();
    let (mut value_empty, mut value_full) = (0.0, 0.0);
    let mut estimates = vec![0.0; players];
    let mut std_errors = vec![f64::INFINITY; players];
    let mut converged = false;
    let mut drawn = 0u64;

    let mut coalitions = Vec::new();
    let mut values = Vec::new();
    let mut variances = Vec::new();
    // Times each coalition was drawn, and per player and side the
    // covariance repeats add: Σ_S m_S (m_S - 1) Var v(S).
    let noisy = game.is_noisy();
    let mut times: HashMap<Coalition, u64> = HashMap::new();
    let mut repeated_inside = vec![0.0; players];
    let mut repeated_outside = vec![0.0; players];
    let mut pace = Pace::start();
    loop {
        stopping.check_cancelled()?;
        let first = drawn == 0;
        if !first && stopping.past_deadline() {
            break;
        }
        coalitions.clear();
        if first {
            budget.reserve(&[Coalition::EMPTY, full]);
            coalitions.extend([Coalition::EMPTY, full]);
        }
        let offset = coalitions.len();
        let wanted = pace.fit(round_units(drawn, FIRST_SAMPLES, 1), 1, stopping);
        for _ in 0..wanted {
            let sample = Coalition::from_bits(rng.random::<u128>() & full.bits());
            if !budget.admit(&[sample]) {
                break;
            }
            coalitions.push(sample);
        }
        let admitted = (coalitions.len() - offset) as u64;
        if admitted == 0 {
            break;
        }
        drawn += admitted;
        evaluate_round(game, &coalitions, &mut values, &mut variances);
        pace.record(coalitions.len() as u64);
        if first {
            value_empty = values[0];
            value_full = values[1];
        }
        for (k, (sample, value)) in coalitions[offset..]
            .iter()
            .zip(&values[offset..])
            .enumerate()
        {
            if noisy {
                let variance = variances[offset + k];
                let seen = times.entry(*sample).or_insert(0);
                // m (m + 1) - (m - 1) m = 2 m.
                let added = 2.0 * *seen as f64 * variance;
                *seen += 1;
                if added != 0.0 {
                    for player in 0..players {
                        if sample.contains(player) {
                            repeated_inside[player] += added;
                        } else {
                            repeated_outside[player] += added;
                        }
                    }
                }
            }
            for player in 0..players {
                if sample.contains(player) {
                    inside[player].add(&[*value]);
                } else {
                    outside[player].add(&[*value]);
                }
            }
        }
        for player in 0..players {
            let (with, without) = (&inside[player], &outside[player]);
            estimates[player] = if with.count() == 0 || without.count() == 0 {
                0.0
            } else {
                with.means()[0] - without.means()[0]
            };
            let (mut se_with, mut se_without) = ([0.0], [0.0]);
            with.std_errors_into(&mut se_with);
            without.std_errors_into(&mut se_without);
            for (se, moments, repeated) in [
                (&mut se_with[0], with, repeated_inside[player]),
                (&mut se_without[0], without, repeated_outside[player]),
            ] {
                let n = moments.count() as f64;
                if repeated != 0.0 && n >= 2.0 {
                    *se = (*se * *se + repeated / (n * (n - 1.0))).sqrt();
                }
            }
            std_errors[player] = se_with[0].hypot(se_without[0]);
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
        values: estimates,
        std_errors,
        value_full,
        value_empty,
        converged,
        selection: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::game::FnGame;

    /// For an additive game `v(S) = Σ_{i∈S} a_i` the Banzhaf value is `a_i`
    /// (closed form: every marginal contribution of i is a_i). The estimate
    /// is noisy through the other players, so check within 4 std errors.
    #[test]
    fn additive_game_within_its_std_errors() {
        let weights = [1.0, -2.0, 0.5, 3.0, 0.0];
        let game = FnGame::new(5, |c: Coalition| c.members().map(|i| weights[i]).sum());
        let cached = CachedGame::new(&game);
        let estimate = banzhaf(&cached, &Stopping::evaluations(32), 3).unwrap();
        for (i, weight) in weights.iter().enumerate() {
            let (value, se) = (estimate.values[i], estimate.std_errors[i]);
            assert!(
                (value - weight).abs() <= 4.0 * se + 1e-12,
                "player {i}: {value} ± {se}"
            );
        }
        assert!(cached.evaluations() <= 32);
    }
}
