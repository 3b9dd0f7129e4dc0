//! The axioms of the exact summaries on random small games (property tests).
//! Efficiency, symmetry, dummy player and linearity characterise the Shapley
//! value ("A value for n-person games", Contributions to the Theory of Games
//! II, Annals of Mathematics Studies 28, 1953); the Banzhaf value satisfies
//! symmetry, dummy and linearity but not efficiency ("An axiomatization of
//! the Banzhaf value", International Journal of Game Theory 17(2), 1988).
//! Leave-one-out and include-one are linear, symmetric and give a dummy its
//! own value by definition (common practice, no source).

use apportion::engine::estimate::exact;
use apportion::engine::{CachedGame, Coalition, FnGame, Summary};
use proptest::prelude::*;

const LINEAR_SUMMARIES: [Summary; 4] = [
    Summary::Shapley,
    Summary::Banzhaf,
    Summary::LeaveOneOut,
    Summary::IncludeOne,
];

fn summary_of(players: usize, table: &[f64], summary: Summary) -> (Vec<f64>, f64) {
    let game = FnGame::new(players, |c: Coalition| table[c.bits() as usize]);
    let cached = CachedGame::new(&game);
    let estimate = exact::explain(&cached, summary).unwrap();
    let gap = estimate.efficiency_gap();
    (estimate.values, gap)
}

/// A random game as a table of 2^p coalition values.
fn game_table() -> impl Strategy<Value = (usize, Vec<f64>)> {
    (2usize..=7).prop_flat_map(|p| (Just(p), prop::collection::vec(-10.0f64..10.0, 1 << p)))
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-10 * (1.0 + a.abs().max(b.abs()))
}

proptest! {
    #[test]
    fn shapley_is_efficient((p, table) in game_table()) {
        let (_, gap) = summary_of(p, &table, Summary::Shapley);
        prop_assert!(gap.abs() < 1e-10, "gap {gap}");
    }

    #[test]
    fn symmetric_players_get_equal_values((p, table) in game_table()) {
        // v(S) = u(S) + u(swap₀₁(S)) makes players 0 and 1 interchangeable.
        let swap = |bits: usize| (bits & !3) | (bits & 1) << 1 | (bits >> 1 & 1);
        let symmetric: Vec<f64> = (0..table.len()).map(|b| table[b] + table[swap(b)]).collect();
        for summary in LINEAR_SUMMARIES {
            let (values, _) = summary_of(p, &symmetric, summary);
            prop_assert!(close(values[0], values[1]), "{summary:?}: {values:?}");
        }
    }

    #[test]
    fn a_dummy_player_gets_its_own_worth((p, table) in game_table(), worth in -5.0f64..5.0) {
        // The last player adds exactly `worth` to every coalition it joins.
        let last = p - 1;
        let dummy: Vec<f64> = (0..table.len())
            .map(|b| table[b & !(1 << last)] + worth * (b >> last & 1) as f64)
            .collect();
        for summary in LINEAR_SUMMARIES {
            let (values, _) = summary_of(p, &dummy, summary);
            prop_assert!(close(values[last], worth), "{summary:?}: {} vs {worth}", values[last]);
        }
    }

    #[test]
    fn summaries_are_linear((p, table) in game_table(), scale in -3.0f64..3.0, seed in 0u64..1000) {
        let other: Vec<f64> = (0..table.len()).map(|b| ((b as u64 * 2654435761 + seed) % 997) as f64 / 97.0).collect();
        let combined: Vec<f64> = table.iter().zip(&other).map(|(a, b)| a + scale * b).collect();
        for summary in LINEAR_SUMMARIES {
            let (first, _) = summary_of(p, &table, summary);
            let (second, _) = summary_of(p, &other, summary);
            let (both, _) = summary_of(p, &combined, summary);
            for i in 0..p {
                prop_assert!(close(both[i], first[i] + scale * second[i]), "{summary:?} player {i}");
            }
        }
    }
}
