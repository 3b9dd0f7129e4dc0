//! Exact tree explanations: the per-row pass against the compiled form
//! (background summarised per leaf by follow pattern), as the background
//! grows. Prints markdown tables; the machine is on the first line.
//!
//! `cargo bench --no-default-features --bench trees` (add `-- --quick` for
//! fewer repeats). The unit costs in `src/engine/estimate/tree/compiled.rs`
//! are the fit printed in the second table.

#[path = "support/forest.rs"]
mod forest;
mod support;

use std::time::{Duration, Instant};

use apportion::engine::estimate::tree::{self, CompiledTrees, TreeWork};
use apportion::engine::estimate::{self as estimators};
use apportion::engine::removal::Marginal;
use apportion::engine::{CachedGame, ModelGame, Players, Summary, Target};
use apportion::model::{Link, Model, TreeEnsemble};
use apportion::registry::{Registry, TreeBody};
use nalgebra::{DMatrix, DVector};
use ndarray::{Array2, ArrayView2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const MEMORY_LIMIT: usize = 256 << 20;

/// Median of `repeats` timings of `work`, cycling through `instances`.
fn median_time<T>(
    repeats: usize,
    instances: &Array2<f64>,
    mut work: impl FnMut(&[f64]) -> T,
) -> Duration {
    let mut times: Vec<Duration> = (0..repeats)
        .map(|i| {
            let instance = instances.row(i % instances.nrows()).to_vec();
            let start = Instant::now();
            std::hint::black_box(work(&instance));
            start.elapsed()
        })
        .collect();
    times.sort();
    times[times.len() / 2]
}

fn ms(duration: Duration) -> f64 {
    duration.as_secs_f64() * 1e3
}

/// Least squares of `times` on `columns`, weighted by 1 / time so that
/// every configuration counts by its relative error. A unit cost cannot be
/// negative: while one comes out so, its column is dropped (cost 0) and the
/// rest refitted.
fn fit(columns: &[Vec<f64>], times: &[f64]) -> Vec<f64> {
    let mut kept: Vec<usize> = (0..columns.len()).collect();
    loop {
        let a = DMatrix::from_fn(times.len(), kept.len(), |i, j| {
            columns[kept[j]][i] / times[i]
        });
        let b = DVector::from_element(times.len(), 1.0);
        let solution = a.svd(true, true).solve(&b, 1e-12).expect("solvable");
        let (worst, lowest) =
            solution
                .iter()
                .enumerate()
                .fold(
                    (0, f64::INFINITY),
                    |best, (j, &c)| if c < best.1 { (j, c) } else { best },
                );
        if lowest >= 0.0 {
            let mut costs = vec![0.0; columns.len()];
            for (j, &c) in kept.iter().zip(solution.iter()) {
                costs[*j] = c;
            }
            return costs;
        }
        kept.remove(worst);
    }
}

/// Largest absolute difference between two value vectors.
fn largest_difference(a: &[f64], b: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max)
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let repeats = if quick { 3 } else { 9 };
    println!("machine: {}", support::machine());
    println!();

    // 1. 300 trees of depth 6 on 30 features, backgrounds of growing size.
    let training = forest::background_rows(1, 10_000);
    let model = forest::ensemble(2, 300, 6, &training);
    let players = Players::singletons(forest::FEATURES);
    let pool = forest::background_rows(3, 10_000);
    let instances = forest::background_rows(4, 16);
    println!(
        "| background rows (300 trees, depth 6, 30 features) | per-row pass | compiled | per-row / compiled | compile | memory | pattern trees | predicted | largest difference |"
    );
    println!("|---|---|---|---|---|---|---|---|---|");
    let mut compiled_ms = Vec::new();
    for rows in [10usize, 100, 1_000, 10_000] {
        let background = pool.slice(ndarray::s![..rows, ..]).to_owned();
        let start = Instant::now();
        let compiled = CompiledTrees::compile(&model, &players, background.view(), MEMORY_LIMIT)
            .expect("compiles");
        let compile_time = start.elapsed();
        let per_row_repeats = if rows >= 10_000 { 3 } else { repeats };
        let per_row = median_time(per_row_repeats, &instances, |x| {
            tree::explain(&model, &players, x, background.view(), Summary::Shapley)
                .expect("explains")
        });
        let fast = median_time(repeats, &instances, |x| {
            compiled
                .explain(&model, &players, background.view(), x, Summary::Shapley)
                .expect("explains")
        });
        let x = instances.row(0).to_vec();
        let expected = tree::explain(&model, &players, &x, background.view(), Summary::Shapley)
            .expect("explains");
        let got = compiled
            .explain(&model, &players, background.view(), &x, Summary::Shapley)
            .expect("explains");
        compiled_ms.push(ms(fast));
        println!(
            "| {rows} | {:.2} ms | {:.3} ms | {:.1}× | {:.0} ms | {:.2} MiB | {} | {:.3} ms | {:.1e} |",
            ms(per_row),
            ms(fast),
            per_row.as_secs_f64() / fast.as_secs_f64(),
            ms(compile_time),
            compiled.memory_bytes() as f64 / (1 << 20) as f64,
            compiled.pattern_trees(),
            compiled.predicted_ns() / 1e6,
            largest_difference(&got.values, &expected.values),
        );
    }
    println!();
    println!(
        "compiled t(1,000) / t(10) = {:.2} (target ≤ 3)",
        compiled_ms[2] / compiled_ms[0]
    );
    println!();

    // Registration of the same model with all 10,000 rows, as the service
    // does it: validation, the row-cost measurement, preparation (compiled
    // trees, background statistics, Gaussian fit) and the durable write.
    let directory = tempfile::tempdir().expect("a temporary directory");
    let (registry, _) = Registry::open(directory.path()).expect("a registry");
    let started = Instant::now();
    let info = registry
        .register(forest::spec(&model, &pool))
        .expect("registers");
    println!("| registration (300 trees, depth 6, 30 features, 10,000 rows) | |");
    println!("|---|---|");
    println!(
        "| register, end to end (durable write included) | {:.0} ms |",
        ms(started.elapsed())
    );
    println!("| of which preparation | {:.0} ms |", info.preparation_ms);
    println!(
        "| memory of what preparation derived | {:.2} MiB |",
        info.prepared_bytes as f64 / (1 << 20) as f64
    );
    println!();

    // 2. Unit costs: each form forced, timed against its counted work.
    println!(
        "| forced form (50 trees, 30 features) | depth | rows | measured | predicted | row nodes | pattern nodes | scanned | enumerated |"
    );
    println!("|---|---|---|---|---|---|---|---|---|");
    let mut row_samples: Vec<(TreeWork, f64, String)> = Vec::new();
    let mut pattern_samples: Vec<(TreeWork, f64, String)> = Vec::new();
    for depth in [4usize, 6, 8] {
        let model = forest::ensemble(10 + depth as u64, 50, depth, &training);
        for rows in [10usize, 100, 1_000, 10_000] {
            let background = pool.slice(ndarray::s![..rows, ..]).to_owned();
            let forced = [
                (
                    "per-row",
                    CompiledTrees::compile(&model, &players, background.view(), 0),
                ),
                (
                    "patterns",
                    CompiledTrees::compile_all_patterns(&model, &players, background.view()),
                ),
            ];
            for (form, compiled) in forced {
                if form == "per-row" && rows > 1_000 {
                    // Linear in rows: 1,000 rows pin its cost down.
                    continue;
                }
                let compiled = compiled.expect("compiles");
                let time = median_time(repeats, &instances, |x| {
                    compiled
                        .explain(&model, &players, background.view(), x, Summary::Shapley)
                        .expect("explains")
                });
                let label = format!("| {form} | {depth} | {rows} |");
                let sample = (compiled.work(), time.as_secs_f64() * 1e9, label);
                if form == "per-row" {
                    row_samples.push(sample);
                } else {
                    pattern_samples.push(sample);
                }
            }
        }
    }
    let row_fit = fit(
        &[row_samples.iter().map(|s| s.0.row_nodes).collect()],
        &row_samples.iter().map(|s| s.1).collect::<Vec<_>>(),
    );
    let pattern_fit = fit(
        &[
            pattern_samples.iter().map(|s| s.0.pattern_nodes).collect(),
            pattern_samples
                .iter()
                .map(|s| s.0.pattern_scanned)
                .collect(),
            pattern_samples
                .iter()
                .map(|s| s.0.pattern_enumerated)
                .collect(),
        ],
        &pattern_samples.iter().map(|s| s.1).collect::<Vec<_>>(),
    );
    for (work, time, label) in row_samples.iter().chain(&pattern_samples) {
        println!(
            "{label} {:.3} ms | {:.3} ms | {:.0} | {:.0} | {:.0} | {:.0} |",
            time / 1e6,
            work.predicted_ns() / 1e6,
            work.row_nodes,
            work.pattern_nodes,
            work.pattern_scanned,
            work.pattern_enumerated
        );
    }
    println!();
    println!(
        "fitted unit costs (ns): row node {:.2}; pattern node {:.2}, pattern scanned {:.2}, pattern enumerated {:.2}",
        row_fit[0], pattern_fit[0], pattern_fit[1], pattern_fit[2]
    );
    println!();

    // 3. Against brute-force enumeration: 100 trees, depth 6, p = 12, 100
    // background rows.
    let p = 12;
    let mut rng = ChaCha8Rng::seed_from_u64(20);
    let wide = Array2::from_shape_fn((10_000, p), |_| rng.random_range(-1.0..1.0));
    let small_model = {
        let mut rng = ChaCha8Rng::seed_from_u64(21);
        let trees = (0..100)
            .map(|_| {
                let mut nodes = TreeBody::default();
                let reach: Vec<usize> =
                    (0..wide.nrows()).filter(|_| rng.random_bool(0.5)).collect();
                forest::grow(&mut nodes, &mut rng, 6, &wide, &reach, p);
                nodes.into_tree(p).expect("valid")
            })
            .collect();
        TreeEnsemble::try_new(trees, 0.0, Link::Identity, p).expect("valid ensemble")
    };
    let background = wide.slice(ndarray::s![..100, ..]).to_owned();
    let instance = wide.row(5_000).to_vec();
    let players = Players::singletons(p);
    let compiled = CompiledTrees::compile(&small_model, &players, background.view(), MEMORY_LIMIT)
        .expect("compiles");
    let one = Array2::from_shape_vec((1, p), instance.clone()).expect("row");
    let tree_time = median_time(repeats, &one, |x| {
        tree::explain(
            &small_model,
            &players,
            x,
            background.view(),
            Summary::Shapley,
        )
        .expect("explains")
    });
    let compiled_time = median_time(repeats, &one, |x| {
        compiled
            .explain(
                &small_model,
                &players,
                background.view(),
                x,
                Summary::Shapley,
            )
            .expect("explains")
    });
    let marginal = Marginal::try_new(background.view()).expect("background");
    let opaque = Opaque(&small_model);
    let start = Instant::now();
    let game =
        ModelGame::try_new(&opaque, &marginal, &players, &instance, &Target::Output).expect("game");
    let cached = CachedGame::new(&game);
    let brute = estimators::exact::explain(&cached, Summary::Shapley).expect("enumeration");
    let brute_time = start.elapsed();
    let per_row = tree::explain(
        &small_model,
        &players,
        &instance,
        background.view(),
        Summary::Shapley,
    )
    .expect("explains");
    let fast = compiled
        .explain(
            &small_model,
            &players,
            background.view(),
            &instance,
            Summary::Shapley,
        )
        .expect("explains");
    println!(
        "| 100 trees, depth 6, p = 12, 100 background rows | time | largest difference from enumeration |"
    );
    println!("|---|---|---|");
    println!(
        "| brute-force enumeration (2^12 coalitions × 100 rows) | {:.1} ms | |",
        ms(brute_time)
    );
    println!(
        "| per-row pass | {:.3} ms | {:.1e} |",
        ms(tree_time),
        largest_difference(&per_row.values, &brute.values)
    );
    println!(
        "| compiled ({} of 100 trees in pattern form) | {:.3} ms | {:.1e} |",
        compiled.pattern_trees(),
        ms(compiled_time),
        largest_difference(&fast.values, &brute.values)
    );
}

/// The ensemble seen only through predictions, so enumeration cannot use
/// the tree algorithm.
struct Opaque<'a>(&'a TreeEnsemble);

impl Model for Opaque<'_> {
    fn inputs(&self) -> usize {
        self.0.inputs()
    }
    fn link(&self) -> Link {
        self.0.link()
    }
    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        self.0.predict(rows, out)
    }
    fn kind(&self) -> &'static str {
        "opaque"
    }
}
