//! A tree ensemble compiled against its background for marginal removal.
//! A background row enters a leaf's contribution only through which of the
//! leaf's path players it follows, so each leaf keeps the count of rows per
//! such follow pattern, and an explanation costs trees × leaves × patterns
//! whatever the number of rows. Trees where the per-row pass is cheaper, or
//! that do not fit the memory limit, keep the per-row pass.
//!
//! The leaf rule is the one in the parent module ("From local explanations to
//! global understanding with explainable AI for trees", Nature Machine
//! Intelligence 2(1), 2020): with X the path players the instance follows and
//! Z those a background row follows, the row counts iff X ∪ Z is every path
//! player; then A = X \ Z and B = the path players outside X.
//!
//! A leaf keeps its patterns as an ascending list, scanned for those that
//! hold all of B, or — where that would be no smaller — as a table over all
//! 2^k patterns, where the instance looks up only the 2^|X| that hold B.

use ndarray::{ArrayView2, Axis, aview1};
use rand::SeedableRng;
use rand::seq::SliceRandom;
use rand_chacha::ChaCha8Rng;

use super::{
    ROWS_PER_CHECK, Shares, TREES_PER_CHECK, Walk, check_background, check_instance,
    check_progress, check_summary, finite_population,
};
use crate::engine::error::{EngineError, Result};
use crate::engine::estimate::sampling::RunningMoments;
use crate::engine::estimate::{Estimate, Stopping};
use crate::engine::model::Model;
use crate::engine::players::Players;
use crate::engine::summary::Summary;
use crate::engine::trees::{Tree, TreeEnsemble};

// Unit costs in ns: least squares (weighted to relative error, negative
// costs dropped) of the median explanation times of the all-per-row and
// all-pattern forms of 50 trees of depth 4, 6 and 8 on 10 to 10,000 rows,
// printed by `cargo bench --no-default-features --bench trees` (2-core AMD
// EPYC, 2026-12-02). A separate cost per (tree, row) of the per-row pass
// came out negative there, so the nodes it enters carry it. Only their
// ratios steer the per-tree choice; their scale is what `predicted_ns`
// reports.
/// Per node the per-row pass enters.
const ROW_NODE_NS: f64 = 13.9;
/// Per node of the instance's pass over a pattern tree (leaves included:
/// a binary tree has one more leaf than inner nodes, so they are priced
/// together).
const PATTERN_NODE_NS: f64 = 6.8;
/// Per pattern scanned at a sparse leaf.
const PATTERN_SCANNED_NS: f64 = 2.0;
/// Per follow mask enumerated at a dense leaf (a lookup in a table that may
/// be out of cache).
const PATTERN_ENUMERATED_NS: f64 = 4.3;

/// Reference rows sampled (evenly spaced) to count the nodes a per-row pass
/// enters; bounds the compile time that estimate takes.
const SAMPLE_ROWS: usize = 32;
/// Follow patterns are u64 masks over a leaf's path players.
const MAX_SLOTS: usize = 64;
/// Leaves with at most this many path players may keep a dense table of
/// counts indexed by pattern.
const DENSE_MAX_SLOTS: usize = 12;
/// Counting with one dense table per leaf while the tables of a tree total
/// at most this many entries; beyond, leaf by leaf with a sort.
const SCRATCH_MAX_ENTRIES: usize = 1 << 14;
/// Trees summed between two checks of the deadline by the anytime pass:
/// a pattern tree of depth 6 takes microseconds, so the pass stops within
/// tens of microseconds of its deadline.
const ANYTIME_TREES_PER_CHECK: usize = 4;
/// Rows counted together, node by node.
const BLOCK_ROWS: usize = 32;
/// Bytes per stored pattern in the sparse form (u64 mask + u32 count) and
/// per entry of a dense table.
const SPARSE_ENTRY_BYTES: usize = 12;
const DENSE_ENTRY_BYTES: usize = 4;

/// Work of one explanation, counted at compile time on the background, in
/// the units the cost constants price.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct TreeWork {
    /// Nodes the per-row pass enters (estimated from a sample of rows).
    pub row_nodes: f64,
    /// Nodes of the instance's pass over the pattern trees.
    pub pattern_nodes: f64,
    /// Patterns scanned at sparse leaves.
    pub pattern_scanned: f64,
    /// Follow masks enumerated at dense leaves, expected over instances
    /// distributed like the background.
    pub pattern_enumerated: f64,
}

impl TreeWork {
    /// Predicted time of the work, in ns, from the measured unit costs.
    pub fn predicted_ns(&self) -> f64 {
        self.row_nodes * ROW_NODE_NS
            + self.pattern_nodes * PATTERN_NODE_NS
            + self.pattern_scanned * PATTERN_SCANNED_NS
            + self.pattern_enumerated * PATTERN_ENUMERATED_NS
    }

    fn add(&mut self, other: &TreeWork) {
        self.row_nodes += other.row_nodes;
        self.pattern_nodes += other.pattern_nodes;
        self.pattern_scanned += other.pattern_scanned;
        self.pattern_enumerated += other.pattern_enumerated;
    }
}

/// A tree ensemble compiled against one background for exact Shapley and
/// Banzhaf values under marginal removal. Built once per registration; the
/// per-tree choice of form depends only on (ensemble, players, background,
/// memory limit), so a rebuild gives bit-for-bit the same answers.
#[derive(Debug, Clone)]
pub struct CompiledTrees {
    /// One per tree: its pattern form, or `None` for the per-row pass.
    forms: Vec<Option<PatternTree>>,
    /// Shape of what was compiled, checked again at each explanation.
    rows: usize,
    players: usize,
    /// Mean raw output over the background, `v(∅)`.
    value_empty: f64,
    /// Counted work of one explanation with the chosen forms.
    work: TreeWork,
    memory: usize,
}

impl CompiledTrees {
    /// Built once per registration. Trees, in order, take the pattern form
    /// where their counted work prices it below the per-row pass and their
    /// summaries fit in what is left of `memory_limit_bytes`; the others
    /// keep the per-row pass.
    pub fn compile(
        ensemble: &TreeEnsemble,
        players: &Players,
        background: ArrayView2<'_, f64>,
        memory_limit_bytes: usize,
    ) -> Result<CompiledTrees> {
        CompiledTrees::build(ensemble, players, background, memory_limit_bytes, false)
    }

    /// Every tree that a u64 mask can describe in pattern form, whatever the
    /// costs: for tests that must exercise that form.
    #[doc(hidden)]
    pub fn compile_all_patterns(
        ensemble: &TreeEnsemble,
        players: &Players,
        background: ArrayView2<'_, f64>,
    ) -> Result<CompiledTrees> {
        CompiledTrees::build(ensemble, players, background, usize::MAX, true)
    }

    fn build(
        ensemble: &TreeEnsemble,
        players: &Players,
        background: ArrayView2<'_, f64>,
        memory_limit_bytes: usize,
        all_patterns: bool,
    ) -> Result<CompiledTrees> {
        check_background(ensemble, players, background)?;
        let rows = background.nrows();

        let data = background.as_standard_layout();
        let data = data.as_slice().expect("standard layout is contiguous");
        // Column by column, so that a block of rows meets a split on
        // contiguous values.
        let by_column = background.t().as_standard_layout().into_owned();
        let by_column = by_column.as_slice().expect("standard layout is contiguous");
        let sample: Vec<usize> = {
            let size = rows.min(SAMPLE_ROWS);
            (0..size).map(|i| i * rows / size).collect()
        };
        let sample_rows: Vec<&[f64]> = sample
            .iter()
            .map(|&r| &data[r * background.ncols()..(r + 1) * background.ncols()])
            .collect();
        // Shapley and Banzhaf walks enter the same nodes; the summary only
        // changes the shares.
        let shares = Shares::new(Summary::Shapley, players.len());
        let mut walk = Walk::new(players.len());
        let mut counter = Counter::default();

        let mut remaining = memory_limit_bytes;
        let mut forms = Vec::with_capacity(ensemble.trees().len());
        let mut work = TreeWork::default();
        let mut memory = 0;
        // Σ over rows and trees of the leaf value each row reaches: read off
        // the counts where a tree was counted, predicted where it was not.
        let mut reached = 0.0;
        for tree in ensemble.trees() {
            // Each sampled row walks against the next one as the instance:
            // instances are expected to look like background rows.
            walk.entered = 0;
            for (i, x) in sample_rows.iter().enumerate() {
                let z = background.row(sample[(i + 1) % sample.len()]);
                walk.add_tree(tree, players, x, z, &shares);
            }
            let row_work = TreeWork {
                row_nodes: rows as f64 * walk.entered as f64 / sample.len() as f64,
                ..TreeWork::default()
            };
            let row_ns = row_work.predicted_ns();
            let shape = Shape::of(tree, players).filter(|shape| {
                // The instance's pass and one unit per leaf are the
                // least a pattern tree costs, and its nodes and leaves
                // the least it stores.
                let floor = TreeWork {
                    pattern_nodes: shape.nodes.len() as f64,
                    pattern_scanned: shape.leaves.len() as f64,
                    ..TreeWork::default()
                };
                (all_patterns || floor.predicted_ns() < row_ns) && shape.bytes() <= remaining
            });
            let pattern = match shape {
                Some(shape) => {
                    let (reached_here, pattern) =
                        counter.count(shape, data, by_column, rows, remaining);
                    reached += reached_here;
                    pattern.filter(|(_, pattern_work)| {
                        all_patterns || pattern_work.predicted_ns() < row_ns
                    })
                }
                None => {
                    reached += data
                        .chunks_exact(background.ncols())
                        .map(|row| tree.predict(aview1(row)))
                        .sum::<f64>();
                    None
                }
            };
            match pattern {
                Some((pattern, pattern_work)) => {
                    let bytes = pattern.bytes();
                    remaining -= bytes;
                    memory += bytes;
                    work.add(&pattern_work);
                    forms.push(Some(pattern));
                }
                None => {
                    work.add(&row_work);
                    forms.push(None);
                }
            }
        }
        let value_empty = ensemble.base_score() + reached / rows as f64;
        Ok(CompiledTrees {
            forms,
            rows,
            players: players.len(),
            value_empty,
            work,
            memory,
        })
    }

    /// Exact Shapley or Banzhaf values under marginal removal over the
    /// background it was compiled with, passed again because trees kept in
    /// per-row form still walk it. The same [`Estimate`] as
    /// [`super::explain`] gives over that background. Only the shapes are
    /// checked: passing another background of the same size is the
    /// caller's error, and gives wrong values.
    pub fn explain(
        &self,
        ensemble: &TreeEnsemble,
        players: &Players,
        background: ArrayView2<'_, f64>,
        instance: &[f64],
        summary: Summary,
    ) -> Result<Estimate> {
        self.explain_within(
            ensemble,
            players,
            background,
            instance,
            summary,
            &Stopping::unbounded(),
        )
    }

    /// [`CompiledTrees::explain`], failing when cancelled or past the
    /// deadline (checked every few trees and reference rows).
    pub fn explain_within(
        &self,
        ensemble: &TreeEnsemble,
        players: &Players,
        background: ArrayView2<'_, f64>,
        instance: &[f64],
        summary: Summary,
        stopping: &Stopping,
    ) -> Result<Estimate> {
        self.check_request(ensemble, players, background, instance, summary)?;
        let shares = Shares::new(summary, players.len());
        // Totals over background rows: the pattern trees weigh each
        // pattern by its row count, the per-row trees add row by row.
        let mut totals = vec![0.0; players.len()];
        let mut fails = Vec::new();
        let steps = self.forms.len() + background.nrows();
        for (done, pattern) in self.forms.iter().flatten().enumerate() {
            if done % TREES_PER_CHECK == 0 {
                check_progress(stopping, done, steps)?;
            }
            pattern.add(instance, &shares, &mut fails, &mut totals);
        }
        let row_trees: Vec<&Tree> = ensemble
            .trees()
            .iter()
            .zip(&self.forms)
            .filter(|(_, form)| form.is_none())
            .map(|(tree, _)| tree)
            .collect();
        if !row_trees.is_empty() {
            let mut walk = Walk::new(players.len());
            for (row, reference) in background.rows().into_iter().enumerate() {
                if row % ROWS_PER_CHECK == 0 {
                    check_progress(stopping, self.forms.len() + row, steps)?;
                }
                for tree in &row_trees {
                    walk.add_tree(tree, players, instance, reference, &shares);
                }
            }
            for (total, walked) in totals.iter_mut().zip(&walk.values) {
                *total += walked;
            }
        }
        let rows = self.rows as f64;
        let values = totals.iter().map(|total| total / rows).collect();
        let mut full = [0.0];
        ensemble.predict(aview1(instance).insert_axis(Axis(0)), &mut full);
        Ok(Estimate::exact(values, full[0], self.value_empty))
    }

    /// [`CompiledTrees::explain_within`] for when an answer is wanted by
    /// the deadline even if the whole pass is not done: anytime, when every
    /// tree is in pattern form (else the same exact pass). The attributions
    /// of an ensemble are the sum of its trees' attributions, so trees are
    /// taken in a seeded random order and the sum over all `T` is estimated
    /// as `T` times the mean over the `n` done: unbiased, with std error
    /// `T · sqrt(s² / n · (1 − n / T))` from the spread `s²` of the
    /// per-tree attributions and the finite-population correction (Cochran,
    /// "Sampling Techniques", Wiley, 1977, ch. 2). With every tree done the
    /// answer is exact (std errors 0, converged). Fails at the deadline
    /// only before two trees are done; `stopping.max_evaluations` caps the
    /// trees (at least two). Returns the trees done.
    #[allow(clippy::too_many_arguments)]
    pub fn explain_anytime(
        &self,
        ensemble: &TreeEnsemble,
        players: &Players,
        background: ArrayView2<'_, f64>,
        instance: &[f64],
        summary: Summary,
        stopping: &Stopping,
        seed: u64,
    ) -> Result<(Estimate, usize)> {
        let total = self.forms.len();
        if self.pattern_trees() < total || total < 2 {
            let estimate =
                self.explain_within(ensemble, players, background, instance, summary, stopping)?;
            return Ok((estimate, total));
        }
        self.check_request(ensemble, players, background, instance, summary)?;
        let mut order: Vec<usize> = (0..total).collect();
        order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
        let shares = Shares::new(summary, players.len());
        // One tree's attributions, scaled so that their mean over trees
        // estimates the ensemble's.
        let scale = total as f64 / self.rows as f64;
        let mut tree_values = vec![0.0; players.len()];
        // Totals over background rows of the trees done, as in
        // explain_within; the moments give only the std errors.
        let mut totals = vec![0.0; players.len()];
        let mut moments = RunningMoments::new(players.len());
        let mut fails = Vec::new();
        let cap = usize::try_from(stopping.max_evaluations)
            .unwrap_or(usize::MAX)
            .clamp(2, total);
        for (done, &tree) in order[..cap].iter().enumerate() {
            if done % ANYTIME_TREES_PER_CHECK == 0 {
                if done < 2 {
                    check_progress(stopping, done, total)?;
                } else {
                    stopping.check_cancelled()?;
                    if stopping.past_deadline() {
                        break;
                    }
                }
            }
            let Some(pattern) = &self.forms[tree] else {
                unreachable!("every tree is in pattern form");
            };
            tree_values.fill(0.0);
            pattern.add(instance, &shares, &mut fails, &mut tree_values);
            for (total, value) in totals.iter_mut().zip(&mut tree_values) {
                *total += *value;
                *value *= scale;
            }
            moments.add(&tree_values);
        }
        let done = moments.count() as usize;
        // The trees done stand for all of them.
        let rows = self.rows as f64 * done as f64 / total as f64;
        let mut std_errors = vec![0.0; players.len()];
        if done < total {
            finite_population(&moments, total, &mut std_errors);
        }
        let mut full = [0.0];
        ensemble.predict(aview1(instance).insert_axis(Axis(0)), &mut full);
        let estimate = Estimate {
            values: totals.iter().map(|total| total / rows).collect(),
            std_errors,
            value_full: full[0],
            value_empty: self.value_empty,
            converged: done == total,
            selection: None,
        };
        Ok((estimate, done))
    }

    /// The checks of every explanation: the request's, and that this is
    /// the ensemble, players and background it was compiled for.
    fn check_request(
        &self,
        ensemble: &TreeEnsemble,
        players: &Players,
        background: ArrayView2<'_, f64>,
        instance: &[f64],
        summary: Summary,
    ) -> Result<()> {
        check_summary(summary)?;
        check_background(ensemble, players, background)?;
        check_instance(ensemble, instance)?;
        if ensemble.trees().len() != self.forms.len()
            || background.nrows() != self.rows
            || players.len() != self.players
        {
            return Err(EngineError::new(
                "background",
                format!(
                    "compiled for {} trees, {} players and {} background rows; given {}, {} and {}",
                    self.forms.len(),
                    self.players,
                    self.rows,
                    ensemble.trees().len(),
                    players.len(),
                    background.nrows()
                ),
            ));
        }
        Ok(())
    }

    /// Heap bytes of the pattern summaries.
    pub fn memory_bytes(&self) -> usize {
        self.memory
    }

    /// Trees in pattern form; the rest take the per-row pass.
    pub fn pattern_trees(&self) -> usize {
        self.forms.iter().flatten().count()
    }

    /// Predicted time of one explanation, in ns, from the work counted at
    /// compile time and the measured unit costs, for the planner.
    pub fn predicted_ns(&self) -> f64 {
        self.work.predicted_ns()
    }

    /// The counted work behind [`CompiledTrees::predicted_ns`] (the bench
    /// fits the unit costs to it).
    #[doc(hidden)]
    pub fn work(&self) -> TreeWork {
        self.work
    }
}

/// A node in preorder, so that a parent comes before its children and the
/// left child right after its parent.
#[derive(Debug, Clone, Copy)]
struct Node {
    threshold: f64,
    /// Split feature, or [`LEAF`].
    feature: u32,
    /// Preorder index of the right child; a leaf's index in `leaves`.
    right: u32,
    /// Index of the split's player among the path players from the root:
    /// the same for every leaf below, so one bit position serves them all.
    slot: u8,
    missing_left: bool,
}

const LEAF: u32 = u32::MAX;

impl Node {
    /// `Tree::goes_left`, on the compiled copy.
    fn goes_left(&self, x: f64) -> bool {
        if x.is_nan() {
            self.missing_left
        } else {
            x < self.threshold
        }
    }
}

#[derive(Debug, Clone, Copy)]
struct Leaf {
    value: f64,
    /// Number of distinct players on the path.
    slots: u32,
    /// Where the path players start in `leaf_players`.
    players_at: u32,
    /// Dense: where the 2^slots table starts in `dense`. Sparse: where the
    /// patterns start in `masks` / `counts`.
    at: u32,
    /// Entries in the dense table or the pattern list (0: nothing stored).
    len: u32,
    dense: bool,
}

/// The background-independent part of a tree in pattern form.
struct Shape {
    nodes: Vec<Node>,
    leaves: Vec<Leaf>,
    leaf_players: Vec<u32>,
}

impl Shape {
    /// `None` when some leaf has more path players than a u64 mask holds.
    fn of(tree: &Tree, players: &Players) -> Option<Shape> {
        const NO_PARENT: u32 = u32::MAX;
        let mut nodes = Vec::with_capacity(tree.nodes());
        let mut leaves = Vec::new();
        let mut leaf_players = Vec::new();
        // Players per slot on the current path; entries past a node's own
        // length belong to finished siblings and are cut off on entry.
        let mut path: Vec<u32> = Vec::new();
        // (tree node, path length on entry, preorder index of the parent
        // whose right child this is).
        let mut stack = vec![(0usize, 0usize, NO_PARENT)];
        while let Some((node, length, right_of)) = stack.pop() {
            path.truncate(length);
            let index = nodes.len() as u32;
            if right_of != NO_PARENT {
                nodes[right_of as usize] = Node {
                    right: index,
                    ..nodes[right_of as usize]
                };
            }
            if tree.is_leaf(node) {
                nodes.push(Node {
                    threshold: 0.0,
                    feature: LEAF,
                    right: leaves.len() as u32,
                    slot: 0,
                    missing_left: false,
                });
                leaves.push(Leaf {
                    value: tree.value(node),
                    slots: path.len() as u32,
                    players_at: leaf_players.len() as u32,
                    at: 0,
                    len: 0,
                    dense: false,
                });
                leaf_players.extend_from_slice(&path);
                continue;
            }
            let feature = tree.feature(node);
            let player = players.player_of(feature) as u32;
            let slot = match path.iter().position(|&p| p == player) {
                Some(slot) => slot,
                None => {
                    path.push(player);
                    path.len() - 1
                }
            };
            if slot >= MAX_SLOTS {
                return None;
            }
            nodes.push(Node {
                threshold: tree.threshold(node),
                feature: feature as u32,
                right: 0,
                slot: slot as u8,
                missing_left: tree.missing_left(node),
            });
            stack.push((tree.right(node), path.len(), index));
            stack.push((tree.left(node), path.len(), NO_PARENT));
        }
        Some(Shape {
            nodes,
            leaves,
            leaf_players,
        })
    }

    fn bytes(&self) -> usize {
        self.nodes.len() * size_of::<Node>()
            + self.leaves.len() * size_of::<Leaf>()
            + self.leaf_players.len() * size_of::<u32>()
    }
}

/// All of a leaf's path players.
fn all_slots(slots: u32) -> u64 {
    if slots as usize >= MAX_SLOTS {
        u64::MAX
    } else {
        (1u64 << slots) - 1
    }
}

/// A tree in pattern form: its shape and, per leaf, the count of
/// background rows per follow pattern.
#[derive(Debug, Clone)]
struct PatternTree {
    nodes: Vec<Node>,
    leaves: Vec<Leaf>,
    leaf_players: Vec<u32>,
    /// Dense leaves' tables, indexed by follow pattern.
    dense: Vec<u32>,
    /// Sparse leaves' patterns (ascending) and their row counts.
    masks: Vec<u64>,
    counts: Vec<u32>,
}

impl PatternTree {
    fn bytes(&self) -> usize {
        self.nodes.capacity() * size_of::<Node>()
            + self.leaves.capacity() * size_of::<Leaf>()
            + self.leaf_players.capacity() * size_of::<u32>()
            + self.dense.capacity() * size_of::<u32>()
            + self.masks.capacity() * size_of::<u64>()
            + self.counts.capacity() * size_of::<u32>()
    }

    /// Adds this tree's attributions, summed over background rows, to
    /// `totals`. One pass of the instance finds, per leaf, the path players
    /// it fails (`fails`, scratch reused across trees).
    fn add(&self, instance: &[f64], shares: &Shares, fails: &mut Vec<u64>, totals: &mut [f64]) {
        fails.clear();
        fails.resize(self.nodes.len(), 0);
        let mut gains = [0.0; MAX_SLOTS];
        for (index, node) in self.nodes.iter().enumerate() {
            let failed = fails[index];
            if node.feature == LEAF {
                self.add_leaf(node.right as usize, failed, shares, &mut gains, totals);
                continue;
            }
            let bit = 1u64 << node.slot;
            let (left, right) = if node.goes_left(instance[node.feature as usize]) {
                (failed, failed | bit)
            } else {
                (failed | bit, failed)
            };
            fails[index + 1] = left;
            fails[node.right as usize] = right;
        }
    }

    /// One leaf, given the path players the instance fails (B, all of
    /// them). A pattern Z counts iff it holds all of B; then A = X \ Z.
    fn add_leaf(
        &self,
        leaf: usize,
        missed: u64,
        shares: &Shares,
        gains: &mut [f64; MAX_SLOTS],
        totals: &mut [f64],
    ) {
        let leaf = &self.leaves[leaf];
        if leaf.len == 0 {
            return;
        }
        let kept = all_slots(leaf.slots) & !missed;
        let (kept_count, b) = (kept.count_ones() as usize, missed.count_ones() as usize);
        // Per unit of the leaf value: what each member of B loses, in total
        // over the rows; `gains` holds the same for each member of A.
        let mut loss = 0.0;
        let mut visit = |followed: u64, count: u32| {
            let a = kept_count - followed.count_ones() as usize;
            if a + b == 0 {
                return;
            }
            let count = f64::from(count);
            loss += count * shares.get(b, a);
            let gain = count * shares.get(a, b);
            let mut only_instance = kept & !followed;
            while only_instance != 0 {
                gains[only_instance.trailing_zeros() as usize] += gain;
                only_instance &= only_instance - 1;
            }
        };
        let (at, len) = (leaf.at as usize, leaf.len as usize);
        if leaf.dense {
            // Every Z ⊇ B is B ∪ Y for a subset Y of X: enumerate those.
            let table = &self.dense[at..at + len];
            let mut subset = kept;
            loop {
                let count = table[(missed | subset) as usize];
                if count != 0 {
                    visit(subset, count);
                }
                if subset == 0 {
                    break;
                }
                subset = (subset - 1) & kept;
            }
        } else {
            for (&mask, &count) in self.masks[at..at + len]
                .iter()
                .zip(&self.counts[at..at + len])
            {
                if mask & missed == missed {
                    visit(mask & kept, count);
                }
            }
        }
        let players = &self.leaf_players[leaf.players_at as usize..][..leaf.slots as usize];
        let value = leaf.value;
        let mut rest = missed;
        while rest != 0 {
            totals[players[rest.trailing_zeros() as usize] as usize] -= value * loss;
            rest &= rest - 1;
        }
        let mut rest = kept;
        while rest != 0 {
            let slot = rest.trailing_zeros() as usize;
            totals[players[slot] as usize] += value * gains[slot];
            gains[slot] = 0.0;
            rest &= rest - 1;
        }
    }
}

/// Scratch for counting patterns, reused across trees.
#[derive(Default)]
struct Counter {
    fails: Vec<u64>,
    tables: Vec<u32>,
    masks: Vec<u64>,
}

impl Counter {
    /// Counts every background row's follow pattern at every leaf of
    /// `shape`. Returns the sum over rows of the leaf value each reaches,
    /// and the tree in pattern form, `None` when its summaries would exceed
    /// `budget` bytes.
    fn count(
        &mut self,
        shape: Shape,
        data: &[f64],
        by_column: &[f64],
        rows: usize,
        budget: usize,
    ) -> (f64, Option<(PatternTree, TreeWork)>) {
        let Shape {
            nodes,
            mut leaves,
            leaf_players,
        } = shape;
        let columns = data.len() / rows;
        let table_entries: usize = leaves
            .iter()
            .map(|leaf| {
                if leaf.slots as usize > DENSE_MAX_SLOTS {
                    usize::MAX / 2
                } else {
                    1 << leaf.slots
                }
            })
            .fold(0usize, |total, entries| total.saturating_add(entries));
        // Per leaf: its patterns (ascending) and their counts, appended to
        // these lists before each leaf picks its stored form.
        let mut found_masks: Vec<u64> = Vec::new();
        let mut found_counts: Vec<u32> = Vec::new();
        let mut found_at = Vec::with_capacity(leaves.len() + 1);
        if table_entries <= SCRATCH_MAX_ENTRIES {
            // One pass of each block of rows over the tree, counting into
            // one table per leaf; a block's masks per node stay in cache.
            let mut table_at = Vec::with_capacity(leaves.len());
            let mut entries = 0;
            for leaf in &leaves {
                table_at.push(entries);
                entries += 1usize << leaf.slots;
            }
            self.tables.clear();
            self.tables.resize(entries, 0);
            self.fails.clear();
            self.fails.resize(nodes.len() * BLOCK_ROWS, 0);
            for start in (0..rows).step_by(BLOCK_ROWS) {
                let block = BLOCK_ROWS.min(rows - start);
                for (index, node) in nodes.iter().enumerate() {
                    let mut failed = [0u64; BLOCK_ROWS];
                    failed[..block].copy_from_slice(&self.fails[index * BLOCK_ROWS..][..block]);
                    if node.feature == LEAF {
                        let leaf = node.right as usize;
                        let (at, all) = (table_at[leaf], all_slots(leaves[leaf].slots));
                        for &f in &failed[..block] {
                            self.tables[at + (all & !f) as usize] += 1;
                        }
                        continue;
                    }
                    let values = &by_column[node.feature as usize * rows + start..][..block];
                    let bit = 1u64 << node.slot;
                    let mut went_left = [0u64; BLOCK_ROWS];
                    for (slot, &x) in went_left.iter_mut().zip(values) {
                        *slot = u64::from(node.goes_left(x));
                    }
                    let left = &mut self.fails[(index + 1) * BLOCK_ROWS..][..block];
                    for ((slot, &f), &l) in left.iter_mut().zip(&failed).zip(&went_left) {
                        *slot = f | (bit & (l.wrapping_sub(1)));
                    }
                    let right = &mut self.fails[node.right as usize * BLOCK_ROWS..][..block];
                    for ((slot, &f), &l) in right.iter_mut().zip(&failed).zip(&went_left) {
                        *slot = f | (bit & l.wrapping_neg());
                    }
                }
            }
            for (leaf, &at) in leaves.iter().zip(&table_at) {
                found_at.push(found_masks.len());
                for (mask, &count) in self.tables[at..at + (1 << leaf.slots)].iter().enumerate() {
                    if count != 0 {
                        found_masks.push(mask as u64);
                        found_counts.push(count);
                    }
                }
            }
        } else {
            // Too many table entries: leaf by leaf, each row follows the
            // leaf's path, and the patterns are sorted and counted.
            let mut path: Vec<(usize, bool)> = Vec::new();
            // (node, the parent's path length, the edge from the parent).
            let mut stack = vec![(0usize, 0usize, None)];
            while let Some((index, length, edge)) = stack.pop() {
                path.truncate(length);
                if let Some(edge) = edge {
                    path.push(edge);
                }
                let node = nodes[index];
                if node.feature != LEAF {
                    stack.push((node.right as usize, path.len(), Some((index, false))));
                    stack.push((index + 1, path.len(), Some((index, true))));
                    continue;
                }
                let full = all_slots(leaves[node.right as usize].slots);
                self.masks.clear();
                for row in data.chunks_exact(columns) {
                    let mut failed = 0u64;
                    for &(on_path, went_left) in &path {
                        let split = nodes[on_path];
                        if split.goes_left(row[split.feature as usize]) != went_left {
                            failed |= 1 << split.slot;
                        }
                    }
                    self.masks.push(full & !failed);
                }
                self.masks.sort_unstable();
                found_at.push(found_masks.len());
                for run in self.masks.chunk_by(|a, b| a == b) {
                    found_masks.push(run[0]);
                    found_counts.push(run.len() as u32);
                }
            }
            // Leaves were met in preorder, which is their index order.
        }
        found_at.push(found_masks.len());
        // A row reaches the leaf whose path players it all follows.
        let reached = leaves
            .iter()
            .zip(found_at.windows(2))
            .map(|(leaf, found)| {
                let all = all_slots(leaf.slots);
                let count = (found[0]..found[1])
                    .find(|&i| found_masks[i] == all)
                    .map_or(0, |i| found_counts[i]);
                leaf.value * f64::from(count)
            })
            .sum::<f64>();

        let mut pattern = PatternTree {
            nodes,
            leaves: Vec::new(),
            leaf_players,
            dense: Vec::new(),
            masks: Vec::new(),
            counts: Vec::new(),
        };
        let mut work = TreeWork {
            pattern_nodes: pattern.nodes.len() as f64,
            ..TreeWork::default()
        };
        for (leaf, found) in leaves.iter_mut().zip(found_at.windows(2)) {
            if leaf.slots == 0 {
                continue;
            }
            let (masks, counts) = (
                &found_masks[found[0]..found[1]],
                &found_counts[found[0]..found[1]],
            );
            let slots = leaf.slots as usize;
            leaf.dense = slots <= DENSE_MAX_SLOTS
                && DENSE_ENTRY_BYTES << slots <= SPARSE_ENTRY_BYTES * masks.len();
            if leaf.dense {
                leaf.at = pattern.dense.len() as u32;
                leaf.len = 1 << slots;
                pattern.dense.resize(pattern.dense.len() + (1 << slots), 0);
                let table = &mut pattern.dense[leaf.at as usize..];
                let mut enumerated = 0.0;
                for (&mask, &count) in masks.iter().zip(counts) {
                    table[mask as usize] = count;
                    // An instance like this row enumerates 2^|Z| masks.
                    enumerated += f64::from(count) * (mask.count_ones() as f64).exp2();
                }
                work.pattern_enumerated += enumerated / rows as f64;
            } else {
                leaf.at = pattern.masks.len() as u32;
                leaf.len = masks.len() as u32;
                pattern.masks.extend_from_slice(masks);
                pattern.counts.extend_from_slice(counts);
                work.pattern_scanned += masks.len() as f64;
            }
            if pattern.dense.len() * DENSE_ENTRY_BYTES + pattern.masks.len() * SPARSE_ENTRY_BYTES
                > budget
            {
                return (reached, None);
            }
        }
        pattern.leaves = leaves;
        pattern.dense.shrink_to_fit();
        pattern.masks.shrink_to_fit();
        pattern.counts.shrink_to_fit();
        if pattern.bytes() > budget {
            return (reached, None);
        }
        (reached, Some((pattern, work)))
    }
}
