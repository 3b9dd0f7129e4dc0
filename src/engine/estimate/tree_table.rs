//! Every coalition value of a tree ensemble's marginal or fixed game at
//! once, for targets the exact tree algorithm does not take (the
//! probability, a loss): a walk of each tree with the instance and each
//! reference row together instead of 2^p filled and predicted rows.
//!
//! For a reference row z, the ensemble's output at the hybrid row (x on S,
//! z elsewhere) is `base + Σ_leaves w · 1[A ⊆ S] · 1[S ∩ B = ∅]`, where the
//! leaf's path has A, the players whose splits only x satisfies, and B,
//! those only z satisfies (the observation behind the exact tree algorithm,
//! "From local explanations to global understanding with explainable AI for
//! trees", Nature Machine Intelligence 2(1), 2020). Expanding
//! `1[S ∩ B = ∅] = Σ_{T ⊆ B} (−1)^|T| 1[T ⊆ S]` turns every leaf into at
//! most 2^|B| weights on subsets, and one subset-sum (zeta) transform,
//! p · 2^p additions, gives the output at all 2^p hybrid rows ("Fourier
//! meets Möbius: fast subset convolution", Björklund, Husfeldt, Kaski and
//! Koivisto, STOC 2007).
//! The link and the mean over reference rows are applied per coalition, so
//! the values are exactly those of evaluating every hybrid row.

use ndarray::ArrayView2;

use super::Stopping;
use crate::engine::coalition::Coalition;
use crate::engine::error::Result;
use crate::engine::game::Game;
use crate::engine::model::Link;
use crate::engine::players::Players;
use crate::engine::target::{Target, averaging_scale, loss};
use crate::engine::trees::TreeEnsemble;

/// Most players a table is built for: 2^16 values, and p · 2^p additions per
/// reference row. Whether a table fits a budget is the planner's call, from
/// its measured cost.
pub const TABLE_PLAYER_LIMIT: usize = 16;

/// Reference rows walked between two checks of the deadline.
const ROWS_PER_CHECK: usize = 8;

/// The coalition values, indexed by a coalition's bits.
pub struct TreeTable {
    players: usize,
    values: Vec<f64>,
    rows: u64,
}

impl TreeTable {
    /// The table of the local `target` of `ensemble` at `instance` under
    /// removal to `references` (the background rows, each weighing the
    /// same, or one fixed row). Fails at the deadline or when cancelled:
    /// a table cut short would be wrong.
    pub fn build(
        ensemble: &TreeEnsemble,
        link: Link,
        players: &Players,
        instance: &[f64],
        references: ArrayView2<'_, f64>,
        target: &Target,
        stopping: &Stopping,
    ) -> Result<TreeTable> {
        let p = players.len();
        debug_assert!(p <= TABLE_PLAYER_LIMIT);
        let size = 1usize << p;
        let scale = averaging_scale(target, link);
        let mut averaged = vec![0.0; size];
        let mut weights = vec![0.0; size];
        let mut stack: Vec<(usize, u32, u32)> = Vec::new();
        let weight = 1.0 / references.nrows() as f64;
        for (row, reference) in references.rows().into_iter().enumerate() {
            if row % ROWS_PER_CHECK == 0 {
                stopping.check_exact("exact enumeration (tree walk)", || {
                    format!("{row} of {} reference rows", references.nrows())
                })?;
            }
            weights.fill(0.0);
            weights[0] = ensemble.base_score();
            for tree in ensemble.trees() {
                stack.push((0, 0, 0));
                while let Some((node, only_x, only_z)) = stack.pop() {
                    if tree.is_leaf(node) {
                        let w = tree.value(node);
                        // Σ over T ⊆ B of (−1)^|T| w at A ∪ T.
                        let mut t = only_z;
                        loop {
                            let sign = if t.count_ones() % 2 == 0 { w } else { -w };
                            weights[(only_x | t) as usize] += sign;
                            if t == 0 {
                                break;
                            }
                            t = (t - 1) & only_z;
                        }
                        continue;
                    }
                    let feature = tree.feature(node);
                    let x_left = tree.goes_left(node, instance[feature]);
                    let z_left = tree.goes_left(node, reference[feature]);
                    let (x_child, z_child) = if x_left {
                        (tree.left(node), tree.right(node))
                    } else {
                        (tree.right(node), tree.left(node))
                    };
                    if x_left == z_left {
                        stack.push((x_child, only_x, only_z));
                        continue;
                    }
                    let bit = 1u32 << players.player_of(feature);
                    if only_x & bit != 0 {
                        stack.push((x_child, only_x, only_z));
                    } else if only_z & bit != 0 {
                        stack.push((z_child, only_x, only_z));
                    } else {
                        stack.push((x_child, only_x | bit, only_z));
                        stack.push((z_child, only_x, only_z | bit));
                    }
                }
            }
            // Subset sums: weights[S] becomes the output at the hybrid row
            // of S.
            for player in 0..p {
                let bit = 1usize << player;
                for set in 0..size {
                    if set & bit != 0 {
                        weights[set] += weights[set ^ bit];
                    }
                }
            }
            for (sum, output) in averaged.iter_mut().zip(&weights) {
                *sum += weight * scale.apply(*output);
            }
        }
        let values = match target {
            Target::Loss { label } => averaged.iter().map(|a| loss(scale, *label, *a)).collect(),
            _ => averaged,
        };
        Ok(TreeTable {
            players: p,
            values,
            rows: references.nrows() as u64,
        })
    }
}

impl Game for TreeTable {
    fn players(&self) -> usize {
        self.players
    }

    fn values(&self, coalitions: &[Coalition], out: &mut [f64]) {
        for (value, coalition) in out.iter_mut().zip(coalitions) {
            *value = self.values[coalition.bits() as usize];
        }
    }

    /// The reference rows walked (each once, against every tree).
    fn model_rows(&self) -> u64 {
        self.rows
    }
}
