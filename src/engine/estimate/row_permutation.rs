//! Joint sampling of permutations and background rows for marginal Shapley
//! values: the degraded path for when one coalition over the whole
//! background costs more than the budget. Each sample is an antithetic pair
//! of permutations with one background row, so a sample costs `2p - 1`
//! model rows whatever the background size.
//!
//! Why it is unbiased: under MARGINAL removal with the OUTPUT or
//! PROBABILITY target, `v(S) = mean_z g(x_S, z_rest)` with `g` the model's
//! output on the target's scale, so `v` is the mean over background rows of
//! the one-row games `v_z`; the Shapley value is linear in the game, so
//! `phi(v) = mean_z phi(v_z)`, and a random permutation with a uniformly
//! drawn row gives an unbiased estimate of it ("Explaining prediction models
//! and individual predictions with feature contributions", Knowledge and
//! Information Systems 41(3), 2014, samples permutations and instances
//! jointly). LOSS and DATASET_LOSS apply the loss to the averaged
//! prediction, and the loss of a mean is not the mean of the losses, so a
//! per-row value is biased for them: they are never sampled this way.

use ndarray::{Array2, ArrayView2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::sampling::{RunningMoments, check_players};
use super::{Estimate, Pace, Stopping, default_tolerance};
use crate::engine::coalition::random_permutation;
use crate::engine::error::{EngineError, Result};
use crate::engine::model::{Link, Model};
use crate::engine::players::Players;

/// Antithetic pairs in the first round: the fewest that give a std error.
pub const FIRST_PAIRS: u64 = 2;

/// Fewest pairs whose std error may declare convergence: a handful of
/// pairs can repeat a background row and agree exactly (an additive model's
/// contributions do not depend on the permutation), and a sample variance
/// of 0 from them says nothing (common practice, no source: about 30
/// samples before trusting a sample variance).
const PAIRS_TO_CONVERGE: u64 = 30;

/// Model rows one antithetic pair costs for `players` players: its
/// background row z alone (the empty coalition), then the `p - 1` proper
/// prefixes of the permutation and of its reverse mixed with z; the full
/// coalition is the instance itself, shared by every pair.
pub fn rows_per_pair(players: usize) -> u64 {
    2 * players.max(1) as u64 - 1
}

/// Fewest model rows a run needs: the instance and two pairs.
pub fn minimum_rows(players: usize) -> u64 {
    1 + FIRST_PAIRS * rows_per_pair(players)
}

/// What the joint sampler reads: the model, its players and background, the
/// instance, and the scale its per-row values are read on (identity for
/// OUTPUT, logistic for PROBABILITY).
pub struct RowSampling<'a> {
    pub model: &'a dyn Model,
    pub players: &'a Players,
    pub background: ArrayView2<'a, f64>,
    pub instance: &'a [f64],
    pub scale: Link,
    /// Most model rows per batched call: the planner sizes it from the
    /// measured row cost so the deadline is checked several times within
    /// the budget.
    pub round_rows: u64,
}

/// The estimate with its model rows (each one a value of a one-row game
/// `v_z(S)`, so it is also the count of coalition values computed).
#[derive(Debug, Clone)]
pub struct RowSampled {
    pub estimate: Estimate,
    pub model_rows: u64,
}

/// Shapley values of the marginal game by joint (permutation, background
/// row) sampling with antithetic pairs: for each pair, one seeded row z and
/// one permutation; each player's contribution on joining its predecessors
/// (in the permutation and in its reverse, "Polynomial calculation of the
/// Shapley value based on sampling", Computers & Operations Research 36(5),
/// 2009) is `g` of the row with it present minus without, the rows mixing x
/// (present) and z (absent); the two are averaged. Pairs are i.i.d.
/// unbiased estimates of the marginal Shapley values, so the std error
/// from their sample variance covers both the permutations and the rows.
///
/// `value_full` is `g(x)`, exact; `value_empty` is the mean of `g(z)` over
/// the rows drawn, an estimate of `v(∅)` (one row's contributions sum to
/// `g(x) - g(z)`, so the values sum to `value_full - value_empty` exactly).
/// `stopping.max_evaluations` counts model rows. A tolerance of 0 takes
/// [`default_tolerance`] from the ends as estimated after each round.
pub fn shapley(input: &RowSampling<'_>, stopping: &Stopping, seed: u64) -> Result<RowSampled> {
    let players = input.players.len();
    check_players(players)?;
    let background_rows = input.background.nrows();
    let features = input.model.inputs();
    if background_rows == 0 || input.background.ncols() != features {
        return Err(EngineError::new(
            "background",
            "joint row sampling needs at least one background row of the model's width",
        ));
    }
    let pair_rows = rows_per_pair(players);
    let needed = minimum_rows(players);
    if stopping.max_evaluations < needed {
        return Err(EngineError::new(
            "max_evaluations",
            format!(
                "joint row sampling needs at least {needed} model rows for {players} players \
                 (the instance and two antithetic pairs of {pair_rows}); {} allowed",
                stopping.max_evaluations
            ),
        ));
    }
    stopping.check_cancelled()?;

    let mut full_output = [0.0];
    let instance = ArrayView2::from_shape((1, features), input.instance)
        .map_err(|_| EngineError::new("instance", "could not be read as one row"))?;
    input.model.predict(instance, &mut full_output);
    let value_full = input.scale.apply(full_output[0]);
    let mut rows_used = 1u64;

    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut moments = RunningMoments::new(players);
    let mut empty_total = 0.0;
    let mut std_errors = vec![f64::INFINITY; players];
    let mut converged = false;
    let most_pairs_per_round = (input.round_rows / pair_rows).max(FIRST_PAIRS);
    let mut rows = Array2::<f64>::zeros((0, features));
    let mut outputs = Vec::new();
    let mut orders: Vec<usize> = Vec::new();
    let mut order = Vec::with_capacity(players);
    let mut contribution = vec![0.0; players];
    let mut pace = Pace::start();
    loop {
        stopping.check_cancelled()?;
        let drawn = moments.count();
        if drawn > 0 && stopping.past_deadline() {
            break;
        }
        // Double while rounds are small, as the other samplers do.
        let wanted = if drawn == 0 {
            FIRST_PAIRS
        } else {
            drawn.clamp(FIRST_PAIRS, most_pairs_per_round)
        };
        let affordable = stopping.max_evaluations.saturating_sub(rows_used) / pair_rows;
        let pairs = pace.fit(wanted.min(affordable), pair_rows, stopping) as usize;
        if pairs == 0 {
            break;
        }
        let batch = pairs * pair_rows as usize;
        if rows.nrows() < batch {
            rows = Array2::zeros((batch, features));
            outputs.resize(batch, 0.0);
        }
        orders.clear();
        for k in 0..pairs {
            random_permutation(players, &mut order, &mut rng);
            let z = input.background.row(rng.random_range(0..background_rows));
            let start = k * pair_rows as usize;
            rows.row_mut(start).assign(&z);
            // Forward prefixes in rows start+1.., reverse prefixes after
            // them; each adds one player's features from x to the last.
            for (offset, reversed) in [(1, false), (players, true)] {
                let mut previous = start;
                for step in 0..players - 1 {
                    let player = if reversed {
                        order[players - 1 - step]
                    } else {
                        order[step]
                    };
                    let row = start + offset + step;
                    let (done, mut rest) = rows.view_mut().split_at(ndarray::Axis(0), row);
                    let mut target = rest.row_mut(0);
                    target.assign(&done.row(previous));
                    for &feature in input.players.members(player) {
                        target[feature] = input.instance[feature];
                    }
                    previous = row;
                }
            }
            orders.extend_from_slice(&order);
        }
        input
            .model
            .predict(rows.slice(ndarray::s![..batch, ..]), &mut outputs[..batch]);
        pace.record(batch as u64);
        rows_used += batch as u64;
        for (k, order) in orders.chunks(players).enumerate() {
            let values = &outputs[k * pair_rows as usize..(k + 1) * pair_rows as usize];
            let g = |i: usize| input.scale.apply(values[i]);
            let empty = g(0);
            empty_total += empty;
            // g of the forward prefix of length l, and of the reverse one.
            let forward = |l: usize| match l {
                0 => empty,
                l if l == players => value_full,
                l => g(l),
            };
            let backward = |l: usize| match l {
                0 => empty,
                l if l == players => value_full,
                l => g(players - 1 + l),
            };
            for (position, &player) in order.iter().enumerate() {
                let joins_forward = forward(position + 1) - forward(position);
                let before = players - 1 - position;
                let joins_backward = backward(before + 1) - backward(before);
                contribution[player] = 0.5 * (joins_forward + joins_backward);
            }
            moments.add(&contribution);
        }
        moments.std_errors_into(&mut std_errors);
        let value_empty = empty_total / moments.count() as f64;
        let tolerance = if stopping.tolerance > 0.0 {
            stopping.tolerance
        } else {
            default_tolerance(value_empty, value_full)
        };
        if moments.count() >= PAIRS_TO_CONVERGE && std_errors.iter().all(|s| *s <= tolerance) {
            converged = true;
            break;
        }
        if (pairs as u64) < wanted {
            break;
        }
    }
    let count = moments.count().max(1) as f64;
    Ok(RowSampled {
        estimate: Estimate {
            values: moments.means().to_vec(),
            std_errors,
            value_full,
            value_empty: empty_total / count,
            converged,
            selection: None,
        },
        model_rows: rows_used,
    })
}
