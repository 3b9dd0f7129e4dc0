//! Exact summaries by evaluating the coalitions each one needs: all 2^p for
//! Shapley, Banzhaf and the linear fit; p + 2 for leave-one-out and
//! include-one; a greedy walk for selection.
//!
//! Over a random removal each coalition value is a noisy mean, so an exact
//! summary is exact only for the game as drawn. Every summary here is linear
//! in the coalition values, `phi_i = Σ_S c_iS v(S)`, and the draws of
//! different coalitions are seeded apart, so its std error is
//! `sqrt(Σ_S c_iS² Var v(S))`. Work goes in batches sized by model rows,
//! and the deadline and the cancel flag are checked between batches: an
//! exact answer cut short would be wrong, so it fails instead.

use super::{Estimate, Selection, Stopping, regression};
use crate::engine::coalition::Coalition;
use crate::engine::error::{EngineError, Result};
use crate::engine::game::{CachedGame, Game};
use crate::engine::summary::Summary;

/// Most players full enumeration will ever take: 2^26 values are 512 MiB.
/// The planner's configurable cap (default 20) sits below this.
pub const ENUMERATION_LIMIT: usize = 26;

/// Most coalitions evaluated per call to the game.
const ENUMERATION_BATCH: usize = 4096;

/// Model rows per batch between two checks of the deadline: a few
/// milliseconds of a cheap model, so a stop is prompt and the checks cost
/// nothing next to the rows.
const ROWS_PER_CHECK: usize = 1 << 16;

/// Coalitions per batch for `game`: as many as fit [`ROWS_PER_CHECK`], at
/// least one, at most [`ENUMERATION_BATCH`].
pub(super) fn batch_coalitions(game: &dyn Game) -> usize {
    (ROWS_PER_CHECK / game.rows_per_coalition().max(1)).clamp(1, ENUMERATION_BATCH)
}

/// The exact value of `summary` for `game`, with no deadline.
pub fn explain(game: &CachedGame, summary: Summary) -> Result<Estimate> {
    explain_within(game, summary, &Stopping::unbounded())
}

/// The exact value of `summary` for `game`, failing at the deadline or when
/// cancelled. Std errors carry the removal's noise; the answer has
/// converged when every one is within `stopping.tolerance` (always, for a
/// deterministic removal). The cap on evaluations is the planner's to
/// check.
pub fn explain_within(
    game: &CachedGame,
    summary: Summary,
    stopping: &Stopping,
) -> Result<Estimate> {
    let players = game.players();
    match summary {
        Summary::Shapley | Summary::Banzhaf => {
            let (values, variances) = enumerate(game, stopping, "exact enumeration")?;
            Ok(from_all_values(
                &values,
                &variances,
                players,
                summary,
                stopping.tolerance,
            ))
        }
        Summary::LeaveOneOut | Summary::IncludeOne => one_at_a_time(game, summary, stopping),
        Summary::LinearFit(kernel) => regression::fit_all_within(game, kernel, stopping),
        Summary::Selection { fraction } => select(game, fraction, stopping),
    }
}

/// `v(S)` and `Var v(S)` for every coalition, indexed by the coalition's
/// bits (the variances empty for a deterministic game).
pub(super) fn enumerate(
    game: &CachedGame,
    stopping: &Stopping,
    estimator: &str,
) -> Result<(Vec<f64>, Vec<f64>)> {
    let players = game.players();
    if players > ENUMERATION_LIMIT {
        return Err(EngineError::new(
            "estimator",
            format!(
                "{estimator} of {players} players needs 2^{players} coalitions; \
                 the limit is {ENUMERATION_LIMIT} players: choose a sampled estimator"
            ),
        ));
    }
    let total = 1usize << players;
    let noisy = game.is_noisy();
    let batch = batch_coalitions(game);
    let mut values = vec![0.0; total];
    let mut variances = vec![0.0; if noisy { total } else { 0 }];
    let mut coalitions = Vec::with_capacity(batch);
    let mut start = 0;
    while start < total {
        stopping.check_exact(estimator, || format!("{start} of {total} coalitions"))?;
        let end = (start + batch).min(total);
        coalitions.clear();
        coalitions.extend((start..end).map(|bits| Coalition::from_bits(bits as u128)));
        if noisy {
            game.values_and_variances(
                &coalitions,
                &mut values[start..end],
                &mut variances[start..end],
            );
        } else {
            game.values(&coalitions, &mut values[start..end]);
        }
        start = end;
    }
    Ok((values, variances))
}

/// Shapley or raw Banzhaf values from the full table of coalition values,
/// with std errors from the table of variances (none: a deterministic
/// game).
fn from_all_values(
    values: &[f64],
    variances: &[f64],
    players: usize,
    summary: Summary,
    tolerance: f64,
) -> Estimate {
    // Shapley weight of a coalition of size s not containing i:
    // s! (p - s - 1)! / p! = 1 / (p · C(p - 1, s)).
    // ("A value for n-person games", Contributions to the Theory of Games II, 1953.)
    let weight: Vec<f64> = match summary {
        Summary::Shapley => {
            let mut binomial = 1.0;
            (0..players)
                .map(|s| {
                    let w = 1.0 / (players as f64 * binomial);
                    binomial = binomial * (players - 1 - s) as f64 / (s + 1) as f64;
                    w
                })
                .collect()
        }
        _ => vec![0.5f64.powi(players as i32 - 1); players],
    };
    let mut phi = vec![0.0; players];
    for (bits, v) in values.iter().enumerate() {
        let size = (bits as u64).count_ones() as usize;
        for (i, slot) in phi.iter_mut().enumerate() {
            if bits >> i & 1 == 0 {
                *slot += weight[size] * (values[bits | 1 << i] - v);
            }
        }
    }
    let (full, empty) = (values[values.len() - 1], values[0]);
    if variances.is_empty() {
        return Estimate::exact(phi, full, empty);
    }
    // v(T) enters phi_i with weight w(|T| - 1) when i ∈ T (as S ∪ {i}) and
    // with -w(|T|) when not (as S).
    let mut phi_variance = vec![0.0; players];
    for (bits, variance) in variances.iter().enumerate() {
        let size = (bits as u64).count_ones() as usize;
        for (i, slot) in phi_variance.iter_mut().enumerate() {
            let coefficient = if bits >> i & 1 == 1 {
                weight[size - 1]
            } else {
                weight[size]
            };
            *slot += coefficient * coefficient * variance;
        }
    }
    let std_errors = phi_variance.iter().map(|v| v.sqrt()).collect();
    Estimate::exact_with_noise(phi, std_errors, full, empty, tolerance)
}

/// Values and variances of `coalitions` in batches between checks.
fn evaluate_checked(
    game: &CachedGame,
    coalitions: &[Coalition],
    stopping: &Stopping,
    estimator: &str,
) -> Result<(Vec<f64>, Vec<f64>)> {
    let mut values = vec![0.0; coalitions.len()];
    let mut variances = vec![0.0; coalitions.len()];
    let batch = batch_coalitions(game);
    for (k, ((chunk, out), var)) in coalitions
        .chunks(batch)
        .zip(values.chunks_mut(batch))
        .zip(variances.chunks_mut(batch))
        .enumerate()
    {
        stopping.check_exact(estimator, || {
            format!("{} of {} coalitions", k * batch, coalitions.len())
        })?;
        game.values_and_variances(chunk, out, var);
    }
    Ok((values, variances))
}

fn one_at_a_time(game: &CachedGame, summary: Summary, stopping: &Stopping) -> Result<Estimate> {
    let players = game.players();
    let full = Coalition::full(players);
    let mut coalitions = vec![Coalition::EMPTY, full];
    coalitions.extend((0..players).map(|i| match summary {
        Summary::LeaveOneOut => full.without(i),
        _ => Coalition::singleton(i),
    }));
    let name = summary.name().to_lowercase().replace('_', "-");
    let (values, variances) = evaluate_checked(game, &coalitions, stopping, &name)?;
    let (empty, all) = (values[0], values[1]);
    let phi = values[2..]
        .iter()
        .map(|v| match summary {
            Summary::LeaveOneOut => all - v,
            _ => v - empty,
        })
        .collect();
    if !game.is_noisy() {
        return Ok(Estimate::exact(phi, all, empty));
    }
    // Each value is a difference of two coalition values.
    let end = match summary {
        Summary::LeaveOneOut => variances[1],
        _ => variances[0],
    };
    let std_errors = variances[2..].iter().map(|v| (v + end).sqrt()).collect();
    Ok(Estimate::exact_with_noise(
        phi,
        std_errors,
        all,
        empty,
        stopping.tolerance,
    ))
}

/// Greedy selection: repeatedly add the player that moves `v` furthest
/// towards `v(all)`, until `fraction` of `v(all) - v(none)` is reached.
/// Each player's value is its gain when added (0 if never chosen).
///
/// Over a noisy game the std error of a gain is that of the difference of
/// the two coalition values it is read from, given the path the walk took;
/// the noise can also change which player is chosen at a step, and that is
/// not in the std errors (a greedy choice is not a linear function of the
/// values).
fn select(game: &CachedGame, fraction: f64, stopping: &Stopping) -> Result<Estimate> {
    if !(fraction > 0.0 && fraction <= 1.0) {
        return Err(EngineError::new(
            "selection_fraction",
            format!("must be in (0, 1], got {fraction}"),
        ));
    }
    let players = game.players();
    let full = Coalition::full(players);
    let mut ends = [0.0; 2];
    let mut end_variances = [0.0; 2];
    game.values_and_variances(&[Coalition::EMPTY, full], &mut ends, &mut end_variances);
    let [empty, all] = ends;
    // Progress is measured in the direction of v(all) - v(none), so the walk
    // works for games that decrease as players join, too.
    let direction = if all >= empty { 1.0 } else { -1.0 };
    let goal = fraction * (all - empty) * direction;

    let mut chosen = Coalition::EMPTY;
    let mut order = Vec::new();
    let mut phi = vec![0.0; players];
    let mut variance = vec![0.0; players];
    let mut current = empty;
    let mut current_variance = end_variances[0];
    let mut candidates = Vec::with_capacity(players);
    while (current - empty) * direction < goal && chosen != full {
        candidates.clear();
        candidates.extend(chosen.complement(players).members().map(|i| chosen.with(i)));
        let (values, variances) = evaluate_checked(game, &candidates, stopping, "selection")?;
        let best = (0..candidates.len())
            .max_by(|&a, &b| (values[a] * direction).total_cmp(&(values[b] * direction)))
            .expect("a player remains while the coalition is not full");
        let player = (candidates[best].bits() & !chosen.bits()).trailing_zeros() as usize;
        phi[player] = values[best] - current;
        variance[player] = variances[best] + current_variance;
        current = values[best];
        current_variance = variances[best];
        chosen = candidates[best];
        order.push(player);
    }
    let mut estimate = if game.is_noisy() {
        let std_errors = variance.iter().map(|v| v.sqrt()).collect();
        Estimate::exact_with_noise(phi, std_errors, all, empty, stopping.tolerance)
    } else {
        Estimate::exact(phi, all, empty)
    };
    estimate.selection = Some(Selection {
        players: order,
        value: current,
    });
    Ok(estimate)
}
