//! Maximum sample reuse for raw Banzhaf values: uniformly random coalitions,
//! each one used for every player, either on the side that contains the
//! player or on the side that does not.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::sampling::{
    Budget, RunningMoments, check_players, require_evaluations, round_units, single_player,
};
use super::{Estimate, Stopping};
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
/// side, whose value is then 0 if a side has none.
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
    loop {
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
        let wanted = round_units(drawn, FIRST_SAMPLES, 1);
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
        values.resize(coalitions.len(), 0.0);
        game.values(&coalitions, &mut values);
        if first {
            value_empty = values[0];
            value_full = values[1];
        }
        for (sample, value) in coalitions[offset..].iter().zip(&values[offset..]) {
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
