//! Exact summaries by evaluating the coalitions each one needs: all 2^p for
//! Shapley, Banzhaf and the linear fit; p + 2 for leave-one-out and
//! include-one; a greedy walk for selection.

use super::{Estimate, Selection, regression};
use crate::engine::coalition::{Coalition, all_coalitions};
use crate::engine::error::{EngineError, Result};
use crate::engine::game::{CachedGame, Game};
use crate::engine::summary::Summary;

/// Most players full enumeration will ever take: 2^26 values are 512 MiB.
/// The planner's configurable cap (default 20) sits below this.
pub const ENUMERATION_LIMIT: usize = 26;

/// Coalitions evaluated per call to the game during enumeration.
const ENUMERATION_BATCH: usize = 4096;

/// The exact value of `summary` for `game`.
pub fn explain(game: &CachedGame, summary: Summary) -> Result<Estimate> {
    let players = game.players();
    match summary {
        Summary::Shapley | Summary::Banzhaf => {
            let values = enumerate(game)?;
            Ok(from_all_values(&values, players, summary))
        }
        Summary::LeaveOneOut | Summary::IncludeOne => Ok(one_at_a_time(game, summary)),
        Summary::LinearFit(kernel) => regression::fit_all(game, kernel),
        Summary::Selection { fraction } => select(game, fraction),
    }
}

/// `v(S)` for every coalition, indexed by the coalition's bits.
fn enumerate(game: &CachedGame) -> Result<Vec<f64>> {
    let players = game.players();
    if players > ENUMERATION_LIMIT {
        return Err(EngineError::new(
            "estimator",
            format!(
                "exact enumeration of {players} players needs 2^{players} coalitions; \
                 the limit is {ENUMERATION_LIMIT} players: choose a sampled estimator"
            ),
        ));
    }
    let coalitions: Vec<Coalition> = all_coalitions(players).collect();
    let mut values = vec![0.0; coalitions.len()];
    for (batch, out) in coalitions
        .chunks(ENUMERATION_BATCH)
        .zip(values.chunks_mut(ENUMERATION_BATCH))
    {
        game.values(batch, out);
    }
    Ok(values)
}

/// Shapley or raw Banzhaf values from the full table of coalition values.
fn from_all_values(values: &[f64], players: usize, summary: Summary) -> Estimate {
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
    Estimate::exact(phi, values[values.len() - 1], values[0])
}

fn one_at_a_time(game: &CachedGame, summary: Summary) -> Estimate {
    let players = game.players();
    let full = Coalition::full(players);
    let mut coalitions = vec![Coalition::EMPTY, full];
    coalitions.extend((0..players).map(|i| match summary {
        Summary::LeaveOneOut => full.without(i),
        _ => Coalition::singleton(i),
    }));
    let mut values = vec![0.0; coalitions.len()];
    game.values(&coalitions, &mut values);
    let (empty, all) = (values[0], values[1]);
    let phi = values[2..]
        .iter()
        .map(|v| match summary {
            Summary::LeaveOneOut => all - v,
            _ => v - empty,
        })
        .collect();
    Estimate::exact(phi, all, empty)
}

/// Greedy selection: repeatedly add the player that moves `v` furthest
/// towards `v(all)`, until `fraction` of `v(all) - v(none)` is reached.
/// Each player's value is its gain when added (0 if never chosen).
fn select(game: &CachedGame, fraction: f64) -> Result<Estimate> {
    if !(fraction > 0.0 && fraction <= 1.0) {
        return Err(EngineError::new(
            "selection_fraction",
            format!("must be in (0, 1], got {fraction}"),
        ));
    }
    let players = game.players();
    let full = Coalition::full(players);
    let mut ends = [0.0; 2];
    game.values(&[Coalition::EMPTY, full], &mut ends);
    let [empty, all] = ends;
    // Progress is measured in the direction of v(all) - v(none), so the walk
    // works for games that decrease as players join, too.
    let direction = if all >= empty { 1.0 } else { -1.0 };
    let goal = fraction * (all - empty) * direction;

    let mut chosen = Coalition::EMPTY;
    let mut order = Vec::new();
    let mut phi = vec![0.0; players];
    let mut current = empty;
    let mut candidates = Vec::with_capacity(players);
    let mut values = Vec::with_capacity(players);
    while (current - empty) * direction < goal && chosen != full {
        candidates.clear();
        candidates.extend(chosen.complement(players).members().map(|i| chosen.with(i)));
        values.clear();
        values.resize(candidates.len(), 0.0);
        game.values(&candidates, &mut values);
        let best = (0..candidates.len())
            .max_by(|&a, &b| (values[a] * direction).total_cmp(&(values[b] * direction)))
            .expect("a player remains while the coalition is not full");
        let player = (candidates[best].bits() & !chosen.bits()).trailing_zeros() as usize;
        phi[player] = values[best] - current;
        current = values[best];
        chosen = candidates[best];
        order.push(player);
    }
    let mut estimate = Estimate::exact(phi, all, empty);
    estimate.selection = Some(Selection {
        players: order,
        value: current,
    });
    Ok(estimate)
}
