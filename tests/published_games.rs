//! Exact summaries on cooperative games whose answers are published
//! (shared/TESTING.md, "Published check values").

use apportion::engine::estimate::exact;
use apportion::engine::{CachedGame, Coalition, FnGame, Summary};

fn exact_values(
    players: usize,
    value: impl Fn(Coalition) -> f64 + Sync,
    summary: Summary,
) -> Vec<f64> {
    let game = FnGame::new(players, value);
    let cached = CachedGame::new(&game);
    exact::explain(&cached, summary).unwrap().values
}

fn assert_close(actual: &[f64], expected: &[f64], tolerance: f64) {
    assert_eq!(actual.len(), expected.len());
    for (i, (a, e)) in actual.iter().zip(expected).enumerate() {
        assert!(
            (a - e).abs() <= tolerance,
            "player {i}: got {a}, expected {e}"
        );
    }
}

/// Glove game: player 0 owns a left glove, players 1 and 2 a right glove
/// each; a coalition is worth its matched pairs. Shapley: 2/3, 1/6, 1/6
/// (standard textbook example, e.g. Maschler, Solan & Zamir, "Game Theory",
/// Cambridge University Press, 2013).
#[test]
fn glove_game_shapley() {
    let value = |c: Coalition| {
        let left = c.contains(0) as usize;
        let right = c.contains(1) as usize + c.contains(2) as usize;
        left.min(right) as f64
    };
    assert_close(
        &exact_values(3, value, Summary::Shapley),
        &[2.0 / 3.0, 1.0 / 6.0, 1.0 / 6.0],
        1e-15,
    );
}

/// UN Security Council since 1965: 5 permanent members (players 0–4) and 10
/// others; a motion passes iff all 5 permanent and at least 9 in all vote
/// for it. Shapley–Shubik index: permanent 421/2145, others 4/2145 ("A
/// method for evaluating the distribution of power in a committee system",
/// American Political Science Review 48(3), 1954; the 15-member figures are
/// the standard textbook computation with it).
#[test]
fn security_council_shapley_shubik_index() {
    let permanent = Coalition::full(5);
    let value = |c: Coalition| {
        (c.bits() & permanent.bits() == permanent.bits() && c.len() >= 9) as u8 as f64
    };
    let mut expected = vec![421.0 / 2145.0; 5];
    expected.extend(vec![4.0 / 2145.0; 10]);
    assert_close(&exact_values(15, value, Summary::Shapley), &expected, 1e-14);
}

/// Nassau County board, 1964: weights 9, 9, 7, 3, 1, 1 and quota 16. The
/// three small members are dummies; each large member has raw Banzhaf 1/2
/// and Shapley 1/3 ("Weighted voting doesn't work: a mathematical analysis",
/// Rutgers Law Review 19, 1965).
#[test]
fn nassau_county_board() {
    let weights = [9.0, 9.0, 7.0, 3.0, 1.0, 1.0];
    let value = |c: Coalition| (c.members().map(|i| weights[i]).sum::<f64>() >= 16.0) as u8 as f64;
    let third = 1.0 / 3.0;
    assert_close(
        &exact_values(6, value, Summary::Shapley),
        &[third, third, third, 0.0, 0.0, 0.0],
        1e-15,
    );
    assert_close(
        &exact_values(6, value, Summary::Banzhaf),
        &[0.5, 0.5, 0.5, 0.0, 0.0, 0.0],
        1e-15,
    );
}

/// Airport game with runway costs 1, 3, 4, 8: v(S) = the largest cost in S.
/// φ_i = Σ_{k≤i} (c_k − c_{k−1}) / (n − k + 1) = 1/4, 11/12, 17/12, 65/12
/// ("A simple expression for the Shapley value in a special case",
/// Management Science 20(3), 1973).
#[test]
fn airport_game_shapley() {
    let costs = [1.0, 3.0, 4.0, 8.0];
    let value = |c: Coalition| c.members().map(|i| costs[i]).fold(0.0, f64::max);
    let expected = [1.0 / 4.0, 11.0 / 12.0, 17.0 / 12.0, 65.0 / 12.0];
    assert_close(&exact_values(4, value, Summary::Shapley), &expected, 1e-14);
}

/// Leave-one-out and include-one on the glove game, from their definitions
/// v(N) − v(N∖i) and v({i}) − v(∅) (common practice, no source): only the
/// left glove is pivotal to the grand coalition; no single glove is worth
/// anything alone.
#[test]
fn glove_game_leave_one_out_and_include_one() {
    let value = |c: Coalition| {
        let right = c.contains(1) as usize + c.contains(2) as usize;
        (c.contains(0) as usize).min(right) as f64
    };
    assert_close(
        &exact_values(3, value, Summary::LeaveOneOut),
        &[1.0, 0.0, 0.0],
        0.0,
    );
    assert_close(
        &exact_values(3, value, Summary::IncludeOne),
        &[0.0, 0.0, 0.0],
        0.0,
    );
}

/// Selection on the airport game: the most expensive runway alone reaches
/// v(N), so it is the smallest set reaching any fraction (v(S) = max cost,
/// Management Science 20(3), 1973).
#[test]
fn selection_picks_the_smallest_set_that_reaches_the_fraction() {
    let costs = [1.0, 3.0, 4.0, 8.0];
    let game = FnGame::new(4, |c: Coalition| {
        c.members().map(|i| costs[i]).fold(0.0, f64::max)
    });
    let cached = CachedGame::new(&game);
    let estimate = exact::explain(&cached, Summary::Selection { fraction: 0.9 }).unwrap();
    let selection = estimate.selection.unwrap();
    assert_eq!(selection.players, vec![3]);
    assert_eq!(selection.value, 8.0);
}
