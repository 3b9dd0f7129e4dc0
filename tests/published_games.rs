//! Exact summaries on cooperative games whose answers are published
//! (shared/TESTING.md, "Published check values"), first on the games
//! themselves, then as voting rules written as decision trees, registered and
//! explained through the public gRPC API ("Published games through the
//! public API").

mod support;

use apportion::engine::estimate::exact;
use apportion::engine::{CachedGame, Coalition, FnGame, Summary};
use apportion::service::proto::{self, register_model_request::Model};

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

/// A voting rule as one decision tree over binary features (1 = votes yes):
/// the tree asks voter 0, then voter 1, … and stops as soon as the outcome
/// no longer depends on the remaining votes. `tally` folds one vote into the
/// state; `decided(state, next_voter)` is the outcome once it is settled and
/// must be settled when `next_voter` is the number of voters. A vote below
/// 0.5 goes left, as "votes no".
fn voting_tree<S: Copy>(
    voters: usize,
    start: S,
    tally: &dyn Fn(S, usize, bool) -> S,
    decided: &dyn Fn(S, usize) -> Option<bool>,
) -> proto::Tree {
    fn grow<S: Copy>(
        tree: &mut proto::Tree,
        voters: usize,
        voter: usize,
        state: S,
        tally: &dyn Fn(S, usize, bool) -> S,
        decided: &dyn Fn(S, usize) -> Option<bool>,
    ) -> i32 {
        let node = tree.left.len();
        tree.feature.push(voter as i32);
        tree.threshold.push(0.5);
        tree.left.push(-1);
        tree.right.push(-1);
        tree.value.push(0.0);
        if let Some(wins) = decided(state, voter) {
            tree.feature[node] = -1;
            tree.value[node] = wins as u8 as f64;
            return node as i32;
        }
        assert!(
            voter < voters,
            "the rule must be settled once every voter has voted"
        );
        let no = grow(
            tree,
            voters,
            voter + 1,
            tally(state, voter, false),
            tally,
            decided,
        );
        let yes = grow(
            tree,
            voters,
            voter + 1,
            tally(state, voter, true),
            tally,
            decided,
        );
        tree.left[node] = no;
        tree.right[node] = yes;
        node as i32
    }
    let mut tree = proto::Tree::default();
    grow(&mut tree, voters, 0, start, tally, decided);
    tree
}

/// Registration of a voting rule: identity link, and the all-absent
/// reference (everyone votes no) as the single background row.
fn voting_model(model_id: &str, voters: usize, tree: proto::Tree) -> proto::RegisterModelRequest {
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: (0..voters)
            .map(|j| proto::Feature {
                name: format!("voter{j}"),
                ..Default::default()
            })
            .collect(),
        model: Some(Model::Trees(proto::TreeEnsemble {
            trees: vec![tree],
            base_score: 0.0,
        })),
        link: proto::Link::Identity as i32,
        background: Some(proto::Matrix {
            rows: 1,
            cols: voters as u32,
            values: vec![0.0; voters],
        }),
        ..Default::default()
    }
}

/// The all-present instance (everyone votes yes) under FIXED removal with
/// the all-absent reference: v(S) is the rule applied to "S votes yes".
fn everyone_votes_yes(
    model_id: &str,
    voters: usize,
    summary: proto::Summary,
    estimator: proto::Estimator,
) -> proto::ExplainRequest {
    proto::ExplainRequest {
        model_id: model_id.into(),
        instance: vec![1.0; voters],
        removal: proto::Removal::Fixed as i32,
        fixed_values: vec![0.0; voters],
        target: proto::Target::Output as i32,
        summary: summary as i32,
        estimator: estimator as i32,
        budget_ms: 60_000,
        ..Default::default()
    }
}

/// UN Security Council: voters 0–4 permanent; passes iff all five permanent
/// members and at least nine in all vote yes. State: (permanent yes, all
/// yes).
fn security_council_tree() -> proto::Tree {
    const VOTERS: usize = 15;
    const PERMANENT: usize = 5;
    voting_tree(
        VOTERS,
        (0usize, 0usize),
        &|(permanent, all), voter, yes| {
            let yes = yes as usize;
            (permanent + yes * (voter < PERMANENT) as usize, all + yes)
        },
        &|(permanent, all), next| {
            let vetoed = permanent < next.min(PERMANENT);
            let short = all + (VOTERS - next) < 9;
            if vetoed || short {
                Some(false)
            } else if permanent == PERMANENT && all >= 9 {
                Some(true)
            } else {
                None
            }
        },
    )
}

/// Nassau County board, 1964: weights 9, 9, 7, 3, 1, 1, passes iff the yes
/// weight reaches 16. State: the yes weight so far.
fn nassau_county_tree() -> proto::Tree {
    const WEIGHTS: [f64; 6] = [9.0, 9.0, 7.0, 3.0, 1.0, 1.0];
    voting_tree(
        WEIGHTS.len(),
        0.0f64,
        &|weight, voter, yes| weight + if yes { WEIGHTS[voter] } else { 0.0 },
        &|weight, next| {
            let still_to_vote: f64 = WEIGHTS[next..].iter().sum();
            if weight >= 16.0 {
                Some(true)
            } else if weight + still_to_vote < 16.0 {
                Some(false)
            } else {
                None
            }
        },
    )
}

/// Explains `request` over gRPC and returns the attributions' values and
/// std errors, checking the ends of the game on the way: the rule passes
/// when everyone votes yes and fails when nobody does.
async fn attributions(
    server: &support::TestServer,
    request: proto::ExplainRequest,
) -> (Vec<f64>, Vec<f64>) {
    let estimator = request.estimator;
    let answer = server
        .attributions_client()
        .explain(request)
        .await
        .unwrap_or_else(|status| panic!("{}", status.message()))
        .into_inner();
    assert_eq!((answer.value_full, answer.value_empty), (1.0, 0.0));
    assert_eq!(answer.estimator_used, estimator, "{}", answer.plan_reason);
    (
        answer.attributions.iter().map(|a| a.value).collect(),
        answer.attributions.iter().map(|a| a.std_error).collect(),
    )
}

/// The Shapley–Shubik indices of the UN Security Council (421/2145 for each
/// permanent member, 4/2145 for the others; "A method for evaluating the
/// distribution of power in a committee system", American Political Science
/// Review 48(3), 1954, with the standard textbook computation for 15
/// members) and of the Nassau County board (1/3 for each large member, 0 for
/// the three dummies), with the board's raw Banzhaf values 1/2 and 0
/// ("Weighted voting doesn't work: a mathematical analysis", Rutgers Law
/// Review 19, 1965), through a registered tree model and the gRPC API, by
/// the exact tree algorithm and by enumeration.
#[tokio::test]
async fn voting_rules_as_trees_give_the_published_power_indices() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    registry
        .register_model(voting_model("council", 15, security_council_tree()))
        .await
        .unwrap();
    registry
        .register_model(voting_model("nassau", 6, nassau_county_tree()))
        .await
        .unwrap();

    let mut council = vec![421.0 / 2145.0; 5];
    council.extend([4.0 / 2145.0; 10]);
    let third = 1.0 / 3.0;
    let cases = [
        ("council", 15, proto::Summary::Shapley, council),
        (
            "nassau",
            6,
            proto::Summary::Shapley,
            vec![third, third, third, 0.0, 0.0, 0.0],
        ),
        (
            "nassau",
            6,
            proto::Summary::Banzhaf,
            vec![0.5, 0.5, 0.5, 0.0, 0.0, 0.0],
        ),
    ];
    for (model_id, voters, summary, published) in cases {
        for estimator in [proto::Estimator::TreeExact, proto::Estimator::Exact] {
            let request = everyone_votes_yes(model_id, voters, summary, estimator);
            let (values, _) = attributions(&server, request).await;
            assert_eq!(values.len(), voters);
            for (player, (value, expected)) in values.iter().zip(&published).enumerate() {
                assert!(
                    (value - expected).abs() <= 1e-12,
                    "{model_id} {summary:?} {estimator:?}, player {player}: {value} vs {expected}"
                );
            }
        }
    }
    server.stop().await;
}

/// Permutation sampling on the Security Council model, seed 1 (the first
/// seed tried, not a chosen one): every estimate lies within 4 std errors
/// of its Shapley–Shubik index (American Political Science Review 48(3),
/// 1954), and the std errors are not so wide that this says nothing.
#[tokio::test]
async fn permutation_sampling_covers_the_security_council_indices() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    server
        .registry_client()
        .register_model(voting_model("council", 15, security_council_tree()))
        .await
        .unwrap();
    let mut request = everyone_votes_yes(
        "council",
        15,
        proto::Summary::Shapley,
        proto::Estimator::Permutation,
    );
    request.seed = 1;
    request.tolerance = 0.004;
    let (values, std_errors) = attributions(&server, request).await;
    for (player, (value, std_error)) in values.iter().zip(&std_errors).enumerate() {
        let published = if player < 5 { 421.0 } else { 4.0 } / 2145.0;
        assert!(
            *std_error > 0.0 && *std_error <= 0.01,
            "player {player}: std error {std_error}"
        );
        assert!(
            (value - published).abs() <= 4.0 * std_error,
            "player {player}: {value} ± {std_error} vs {published}"
        );
    }
    server.stop().await;
}
