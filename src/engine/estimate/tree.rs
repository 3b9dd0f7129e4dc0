//! Exact Shapley and Banzhaf values of a tree ensemble's raw output under
//! marginal or fixed removal. Instead of evaluating 2^p coalitions, it makes one
//! depth-first pass per (tree, reference row).
//!
//! Method: "From local explanations to global understanding with explainable
//! AI for trees", Nature Machine Intelligence 2(1), 2020. For one reference
//! row z, coalition S reaches a leaf iff S holds every player whose splits on
//! the path only the instance x satisfies (set A), and none of the players whose
//! splits only z satisfies (set B). So the leaf contributes the game
//! `v · 1[A ⊆ S, S ∩ B = ∅]`, whose Shapley and Banzhaf values have closed forms.
//!
//! The walk checks the deadline and the cancel flag every few reference rows
//! (or compiled trees) and fails when either trips.

use ndarray::{ArrayView1, ArrayView2, Axis, aview1};

use rand::SeedableRng;
use rand::seq::SliceRandom;
use rand_chacha::ChaCha8Rng;

use super::sampling::RunningMoments;
use super::{Estimate, Stopping, default_tolerance};
use crate::engine::error::{EngineError, Result};
use crate::engine::model::Model;
use crate::engine::players::Players;
use crate::engine::summary::Summary;
use crate::engine::trees::{Tree, TreeEnsemble};

mod compiled;

pub use compiled::{CompiledTrees, TreeWork};

/// Exact Shapley or Banzhaf values of the OUTPUT (raw margin) game of
/// `ensemble` at `instance`, under marginal removal over `references`
/// (background rows) or fixed removal (pass one row).
///
/// `value_full` is the raw output at `instance` (base score included), and
/// `value_empty` is the mean raw output over `references`. Shapley values sum
/// to their difference. Raw Banzhaf values are not efficient: in general they
/// do not sum to it.
pub fn explain(
    ensemble: &TreeEnsemble,
    players: &Players,
    instance: &[f64],
    references: ArrayView2<'_, f64>,
    summary: Summary,
) -> Result<Estimate> {
    explain_within(
        ensemble,
        players,
        instance,
        references,
        summary,
        &Stopping::unbounded(),
    )
}

/// [`explain`], failing when cancelled or past the deadline, checked after
/// every few reference rows (an exact answer has no partial
/// form).
pub fn explain_within(
    ensemble: &TreeEnsemble,
    players: &Players,
    instance: &[f64],
    references: ArrayView2<'_, f64>,
    summary: Summary,
    stopping: &Stopping,
) -> Result<Estimate> {
    check_request(ensemble, players, instance, references, summary)?;
    let shares = Shares::new(summary, players.len());
    let mut walk = Walk::new(players.len());
    for (row, reference) in references.rows().into_iter().enumerate() {
        if row % ROWS_PER_CHECK == 0 {
            check_progress(stopping, row, references.nrows())?;
        }
        for tree in ensemble.trees() {
            walk.add_tree(tree, players, instance, reference, &shares);
        }
    }
    let rows = references.nrows() as f64;
    let values = walk.values.iter().map(|total| total / rows).collect();

    let mut full = [0.0];
    ensemble.predict(aview1(instance).insert_axis(Axis(0)), &mut full);
    let mut reference_outputs = vec![0.0; references.nrows()];
    ensemble.predict(references, &mut reference_outputs);
    let value_empty = reference_outputs.iter().sum::<f64>() / rows;
    Ok(Estimate::exact(values, full[0], value_empty))
}

/// Fewest rows whose spread may declare a subsampled answer converged
/// before every row is used (common practice, no source: about 30 samples
/// before trusting a sample variance).
const ROWS_TO_CONVERGE: u64 = 30;

/// The exact tree algorithm over a random subset of the background, for
/// when the whole pass does not fit the budget: anytime. Rows are taken in
/// a seeded random order, one per-row pass each (the exact attributions of
/// the one-row game `v_z`); the marginal game is the mean of those games,
/// so the mean over `n` of the `N` rows is unbiased, with std error
/// `sqrt(s² / n · (1 − n / N))` from the spread `s²` of the per-row
/// attributions and the finite-population correction for sampling without
/// replacement (Cochran, "Sampling Techniques", Wiley, 1977, ch. 2). Stops
/// at the tolerance (never from fewer than 30 rows), at
/// `stopping.max_evaluations` rows or the deadline; once every row is used
/// the answer is exact (std errors 0, converged). `value_empty` is the mean
/// output over the rows used. A tolerance of 0 takes the default from the
/// ends as estimated.
pub fn explain_row_sample(
    ensemble: &TreeEnsemble,
    players: &Players,
    instance: &[f64],
    background: ArrayView2<'_, f64>,
    summary: Summary,
    stopping: &Stopping,
    seed: u64,
) -> Result<(Estimate, u64)> {
    check_request(ensemble, players, instance, background, summary)?;
    stopping.check_cancelled()?;
    let total = background.nrows();
    let cap = usize::try_from(stopping.max_evaluations)
        .unwrap_or(usize::MAX)
        .clamp(1, total);
    let mut order: Vec<usize> = (0..total).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let shares = Shares::new(summary, players.len());
    let mut walk = Walk::new(players.len());
    let mut moments = RunningMoments::new(players.len());
    let mut full = [0.0];
    ensemble.predict(aview1(instance).insert_axis(Axis(0)), &mut full);
    let value_full = full[0];
    let mut output = [0.0];
    let mut empty_total = 0.0;
    let mut std_errors = vec![f64::INFINITY; players.len()];
    let mut converged = false;
    for (used, &row) in order[..cap].iter().enumerate() {
        if used >= 2 && used.is_multiple_of(ROWS_PER_CHECK) {
            stopping.check_cancelled()?;
            if stopping.past_deadline() {
                break;
            }
        }
        let reference = background.row(row);
        walk.values.fill(0.0);
        for tree in ensemble.trees() {
            walk.add_tree(tree, players, instance, reference, &shares);
        }
        moments.add(&walk.values);
        ensemble.predict(reference.insert_axis(Axis(0)), &mut output);
        empty_total += output[0];
        let n = moments.count();
        if n >= ROWS_TO_CONVERGE && n.is_multiple_of(ROWS_PER_CHECK as u64) {
            finite_population(&moments, total, &mut std_errors);
            let tolerance = if stopping.tolerance > 0.0 {
                stopping.tolerance
            } else {
                default_tolerance(empty_total / n as f64, value_full)
            };
            if std_errors.iter().all(|s| *s <= tolerance) {
                converged = true;
                break;
            }
        }
    }
    let n = moments.count();
    if n as usize == total {
        std_errors.fill(0.0);
        converged = true;
    } else {
        finite_population(&moments, total, &mut std_errors);
    }
    let estimate = Estimate {
        values: moments.means().to_vec(),
        std_errors,
        value_full,
        value_empty: empty_total / n.max(1) as f64,
        converged,
        selection: None,
    };
    Ok((estimate, n))
}

/// Std errors of means of `n` of `total` rows drawn without replacement.
fn finite_population(moments: &RunningMoments, total: usize, out: &mut [f64]) {
    moments.std_errors_into(out);
    let correction = (1.0 - moments.count() as f64 / total as f64)
        .max(0.0)
        .sqrt();
    for se in out.iter_mut() {
        *se *= correction;
    }
}

/// Reference rows walked between two checks of the deadline: one row costs
/// a pass over every tree, so a few rows are already tens of microseconds.
pub(crate) const ROWS_PER_CHECK: usize = 8;

/// Trees of the compiled form summed between two checks.
pub(crate) const TREES_PER_CHECK: usize = 64;

/// The tree algorithm's stop check, saying how far it got.
pub(crate) fn check_progress(stopping: &Stopping, done: usize, of: usize) -> Result<()> {
    stopping.check_exact("the exact tree algorithm", || {
        format!("{done} of {of} steps")
    })
}

/// The checks every exact tree explanation makes before any work.
fn check_request(
    ensemble: &TreeEnsemble,
    players: &Players,
    instance: &[f64],
    references: ArrayView2<'_, f64>,
    summary: Summary,
) -> Result<()> {
    check_summary(summary)?;
    check_background(ensemble, players, references)?;
    check_instance(ensemble, instance)
}

fn check_summary(summary: Summary) -> Result<()> {
    if matches!(summary, Summary::Shapley | Summary::Banzhaf) {
        return Ok(());
    }
    Err(EngineError::new(
        "summary",
        format!(
            "the exact tree algorithm computes SHAPLEY or BANZHAF, not {}",
            summary.name()
        ),
    ))
}

fn check_instance(ensemble: &TreeEnsemble, instance: &[f64]) -> Result<()> {
    let inputs = ensemble.inputs();
    if instance.len() != inputs {
        return Err(EngineError::new(
            "instance",
            format!(
                "has {} values; the model has {inputs} inputs",
                instance.len()
            ),
        ));
    }
    Ok(())
}

/// Players and background rows must match the model's inputs, and there
/// must be at least one row to average over.
fn check_background(
    ensemble: &TreeEnsemble,
    players: &Players,
    references: ArrayView2<'_, f64>,
) -> Result<()> {
    let inputs = ensemble.inputs();
    if players.features() != inputs {
        return Err(EngineError::new(
            "features",
            format!(
                "{} features are registered; the model has {inputs} inputs",
                players.features()
            ),
        ));
    }
    if references.ncols() != inputs {
        return Err(EngineError::new(
            "background",
            format!(
                "rows have {} columns; the model has {inputs} inputs",
                references.ncols()
            ),
        ));
    }
    if references.nrows() == 0 {
        return Err(EngineError::new(
            "background",
            "at least one reference row is required",
        ));
    }
    Ok(())
}

/// What one player of the leaf game `v · 1[A ⊆ S, S ∩ B = ∅]` receives, per
/// unit of `v`. The table is indexed by the size of the player's own side
/// (`own ≥ 1`) and the size of the other side. Row `own = 0` stays zero.
/// Built once per call, so leaves only look up a value.
struct Shares {
    width: usize,
    table: Vec<f64>,
}

impl Shares {
    fn new(summary: Summary, players: usize) -> Shares {
        let width = players + 1;
        let mut table = vec![0.0; width * width];
        for own in 1..width {
            // Shapley: a member of A gains when it comes last of A and before
            // all of B in a random order, which has probability
            // (own-1)! other! / (own+other)!. Raw Banzhaf: the other p-1
            // players leave 2^(p-1-(own-1)-other) of the 2^(p-1) coalitions
            // free. Members of B get the same with the sides swapped, with
            // the sign flipped.
            let mut shapley = 1.0 / own as f64;
            for other in 0..width - own {
                if other > 0 {
                    shapley *= other as f64 / (own + other) as f64;
                }
                table[own * width + other] = match summary {
                    Summary::Banzhaf => 0.5f64.powi((own + other - 1) as i32),
                    _ => shapley,
                };
            }
        }
        Shares { width, table }
    }

    fn get(&self, own: usize, other: usize) -> f64 {
        self.table[own * self.width + other]
    }
}

/// Which row fails a split on the path.
#[derive(Debug, Clone, Copy)]
enum Side {
    Instance,
    Reference,
}

/// One step of the explicit depth-first stack. An explicit stack keeps deep
/// trees from overflowing the thread's stack.
#[derive(Debug, Clone, Copy)]
enum Step {
    /// Visit `node`. On the way in, `miss` records the player whose split one
    /// side fails on the edge into `node`.
    Enter {
        node: usize,
        miss: Option<(usize, Side)>,
    },
    /// Undo a recorded miss once the subtree under it is done.
    Leave { player: usize, side: Side },
}

/// Path state for the depth-first pass, reused across every (tree,
/// reference row) so the pass itself allocates nothing.
struct Walk {
    /// Per player: how many of its splits on the current path the instance
    /// fails. Zero means the instance still follows the path.
    instance_misses: Vec<u32>,
    /// The same for the reference row.
    reference_misses: Vec<u32>,
    /// Players that exactly one side follows (A ∪ B), in the order they
    /// joined the path. Leaving the path happens in reverse order.
    split_players: Vec<usize>,
    stack: Vec<Step>,
    /// Attribution totals over reference rows, one per player.
    values: Vec<f64>,
    /// Nodes entered so far: the unit the per-row pass's cost is counted
    /// in when trees are compiled.
    entered: usize,
}

impl Walk {
    fn new(players: usize) -> Walk {
        Walk {
            instance_misses: vec![0; players],
            reference_misses: vec![0; players],
            split_players: Vec::with_capacity(players),
            stack: Vec::with_capacity(64),
            values: vec![0.0; players],
            entered: 0,
        }
    }

    /// Adds the exact attributions of `tree` for one reference row.
    fn add_tree(
        &mut self,
        tree: &Tree,
        players: &Players,
        instance: &[f64],
        reference: ArrayView1<'_, f64>,
        shares: &Shares,
    ) {
        let Walk {
            instance_misses,
            reference_misses,
            split_players,
            stack,
            values,
            entered,
        } = self;
        // |A| (only the instance follows) and |B| (only the reference does).
        let (mut only_instance, mut only_reference) = (0usize, 0usize);
        stack.clear();
        stack.push(Step::Enter {
            node: 0,
            miss: None,
        });
        while let Some(step) = stack.pop() {
            match step {
                Step::Leave { player, side } => {
                    let (misses, one_sided) = match side {
                        Side::Instance => (&mut *instance_misses, &mut only_reference),
                        Side::Reference => (&mut *reference_misses, &mut only_instance),
                    };
                    misses[player] -= 1;
                    if misses[player] == 0 {
                        *one_sided -= 1;
                        let left = split_players.pop();
                        debug_assert_eq!(left, Some(player));
                    }
                }
                Step::Enter { node, miss } => {
                    *entered += 1;
                    if let Some((player, side)) = miss {
                        let (misses, other_misses, one_sided) = match side {
                            Side::Instance => (
                                &mut *instance_misses,
                                &*reference_misses,
                                &mut only_reference,
                            ),
                            Side::Reference => (
                                &mut *reference_misses,
                                &*instance_misses,
                                &mut only_instance,
                            ),
                        };
                        // Neither side follows this player's splits: no
                        // coalition reaches anything below.
                        if other_misses[player] > 0 {
                            continue;
                        }
                        misses[player] += 1;
                        if misses[player] == 1 {
                            *one_sided += 1;
                            split_players.push(player);
                        }
                        stack.push(Step::Leave { player, side });
                    }
                    if tree.is_leaf(node) {
                        // With A and B empty the leaf is reached by every
                        // coalition: a constant, which no player is credited for.
                        if only_instance + only_reference > 0 {
                            let value = tree.value(node);
                            let gain = value * shares.get(only_instance, only_reference);
                            let loss = value * shares.get(only_reference, only_instance);
                            for &player in split_players.iter() {
                                if reference_misses[player] > 0 {
                                    values[player] += gain;
                                } else {
                                    values[player] -= loss;
                                }
                            }
                        }
                        continue;
                    }
                    let feature = tree.feature(node);
                    let player = players.player_of(feature);
                    let child = |goes_left: bool| {
                        if goes_left {
                            tree.left(node)
                        } else {
                            tree.right(node)
                        }
                    };
                    let instance_left = tree.goes_left(node, instance[feature]);
                    let reference_left = tree.goes_left(node, reference[feature]);
                    if instance_left == reference_left {
                        stack.push(Step::Enter {
                            node: child(instance_left),
                            miss: None,
                        });
                    } else {
                        stack.push(Step::Enter {
                            node: child(instance_left),
                            miss: Some((player, Side::Reference)),
                        });
                        stack.push(Step::Enter {
                            node: child(reference_left),
                            miss: Some((player, Side::Instance)),
                        });
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::model::Link;
    use ndarray::array;

    /// Leaf 1 is reached only when feature 0 ≥ 0.5 and feature 1 ≥ 0.5, and
    /// feature 2 ≥ 0.5 as well when `three` is set. Every other leaf is 0.
    fn conjunction(three: bool) -> TreeEnsemble {
        let tree = if three {
            Tree::try_new(
                vec![0, -1, 1, -1, 2, -1, -1],
                vec![0.5; 7],
                vec![1, -1, 3, -1, 5, -1, -1],
                vec![2, -1, 4, -1, 6, -1, -1],
                vec![0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0],
                vec![],
                3,
            )
        } else {
            Tree::try_new(
                vec![0, -1, 1, -1, -1],
                vec![0.5; 5],
                vec![1, -1, 3, -1, -1],
                vec![2, -1, 4, -1, -1],
                vec![0.0, 0.0, 0.0, 0.0, 1.0],
                vec![],
                3,
            )
        }
        .unwrap();
        TreeEnsemble::try_new(vec![tree], 0.25, Link::Identity, 3).unwrap()
    }

    fn close(actual: &[f64], expected: &[f64]) -> bool {
        actual.len() == expected.len()
            && actual
                .iter()
                .zip(expected)
                .all(|(a, e)| (a - e).abs() < 1e-15)
    }

    #[test]
    fn unanimity_games_get_their_textbook_values() {
        // Instance on the 1-leaf side of every split, reference on the other:
        // v(S) = 1 iff S holds every split player, a unanimity game. Its
        // Shapley value is 1/t to each of its t players, its raw Banzhaf value
        // 1/2^(t-1) ("A value for n-person games", Contributions to the Theory
        // of Games II, 1953; "Weighted voting doesn't work", Rutgers Law
        // Review 19, 1965).
        let reference = array![[0.0, 0.0, 0.0]];
        let x = [1.0, 1.0, 1.0];
        let players = Players::singletons(3);
        let two = conjunction(false);
        let three = conjunction(true);
        let shapley = explain(&two, &players, &x, reference.view(), Summary::Shapley).unwrap();
        assert!(close(&shapley.values, &[0.5, 0.5, 0.0]));
        assert!(close(
            &[shapley.value_full, shapley.value_empty],
            &[1.25, 0.25]
        ));
        let banzhaf = explain(&three, &players, &x, reference.view(), Summary::Banzhaf).unwrap();
        assert!(close(&banzhaf.values, &[0.25, 0.25, 0.25]));
        // Raw Banzhaf is not efficient: 3/4 of the unit gap is attributed.
        assert!((banzhaf.efficiency_gap() - 0.25).abs() < 1e-15);
        let shapley = explain(&three, &players, &x, reference.view(), Summary::Shapley).unwrap();
        assert!(close(&shapley.values, &[1.0 / 3.0; 3]));
    }

    #[test]
    fn a_group_takes_all_of_its_features_splits_together() {
        // Features 0 and 1 form one player: the conjunction becomes a game of
        // that single player, who receives the whole gap (common practice, no
        // source: a one-player game's Shapley and Banzhaf values are both
        // v({i}) - v(∅)).
        let names: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
        let groups: Vec<String> = ["g", "g", ""].iter().map(|s| s.to_string()).collect();
        let players = Players::try_new(&names, &groups).unwrap();
        let reference = array![[0.0, 0.0, 0.0]];
        for summary in [Summary::Shapley, Summary::Banzhaf] {
            let estimate = explain(
                &conjunction(false),
                &players,
                &[1.0, 1.0, 1.0],
                reference.view(),
                summary,
            )
            .unwrap();
            assert!(close(&estimate.values, &[1.0, 0.0]));
        }
    }

    #[test]
    fn an_instance_that_takes_the_reference_path_loses_credit() {
        // Instance on the 0 branch of feature 1, reference reaching the 1-leaf:
        // v(S) = 1 iff 1 ∉ S, so player 1 gets -1 under both summaries (a
        // one-player game, common practice, no source). A NaN at feature 0
        // goes left by default and is on the 0 side too, so both features are
        // in play: v(S) = 1[0 ∉ S, 1 ∉ S], whose Shapley values are -1/2 each.
        let players = Players::singletons(3);
        let reference = array![[1.0, 1.0, 0.0]];
        let one = explain(
            &conjunction(false),
            &players,
            &[1.0, 0.0, 0.0],
            reference.view(),
            Summary::Banzhaf,
        )
        .unwrap();
        assert!(close(&one.values, &[0.0, -1.0, 0.0]));
        let both = explain(
            &conjunction(false),
            &players,
            &[f64::NAN, 0.0, 0.0],
            reference.view(),
            Summary::Shapley,
        )
        .unwrap();
        assert!(close(&both.values, &[-0.5, -0.5, 0.0]));
    }

    #[test]
    fn bad_references_and_players_are_refused_with_their_field() {
        let model = conjunction(false);
        let x = [1.0, 1.0, 1.0];
        let players = Players::singletons(3);
        let empty = ndarray::Array2::<f64>::zeros((0, 3));
        let narrow = ndarray::Array2::<f64>::zeros((2, 2));
        let field = |result: Result<Estimate>| result.unwrap_err().field;
        assert_eq!(
            field(explain(
                &model,
                &players,
                &x,
                empty.view(),
                Summary::Shapley
            )),
            "background"
        );
        assert_eq!(
            field(explain(
                &model,
                &players,
                &x,
                narrow.view(),
                Summary::Shapley
            )),
            "background"
        );
        let reference = array![[0.0, 0.0, 0.0]];
        assert_eq!(
            field(explain(
                &model,
                &Players::singletons(2),
                &x,
                reference.view(),
                Summary::Banzhaf
            )),
            "features"
        );
    }
}
