//! Engine benchmarks: prints a table of ratios measured in one run.
//!
//! `cargo bench --bench engine` (add `-- --quick` for a shorter run). The
//! figures in README.md come from this command; the machine is printed in
//! the first line.

mod support;

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::Arc;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant};

use apportion::engine::estimate::tree::CompiledTrees;
use apportion::engine::estimate::{self, EstimatorKind, Stopping};
use apportion::engine::removal::{Fixed, Marginal};
use apportion::engine::{
    CachedGame, Coalition, ModelGame, Players, PreparedModel, Removal, Request, Summary, Target,
    prepare,
};
use apportion::model::{Link, Model, Tree, TreeBody, TreeEnsemble};
use ndarray::{Array2, ArrayView2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Counts live heap bytes and their peak, so the memory column measures one
/// explanation rather than the whole process. `unsafe` is confined to the
/// two forwarding calls the `GlobalAlloc` contract requires.
struct CountingAllocator;

static LIVE: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);

#[allow(unsafe_code)]
unsafe impl GlobalAlloc for CountingAllocator {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        let live = LIVE.fetch_add(layout.size(), Ordering::Relaxed) + layout.size();
        PEAK.fetch_max(live, Ordering::Relaxed);
        // SAFETY: forwarded unchanged to the system allocator.
        unsafe { System.alloc(layout) }
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        LIVE.fetch_sub(layout.size(), Ordering::Relaxed);
        // SAFETY: `ptr` came from `alloc` above with this layout.
        unsafe { System.dealloc(ptr, layout) }
    }
}

#[global_allocator]
static ALLOCATOR: CountingAllocator = CountingAllocator;

/// Peak heap growth while `work` runs, in bytes.
fn peak_bytes<T>(work: impl FnOnce() -> T) -> (T, usize) {
    let before = LIVE.load(Ordering::Relaxed);
    PEAK.store(before, Ordering::Relaxed);
    let out = work();
    (out, PEAK.load(Ordering::Relaxed) - before)
}

/// Grows a complete subtree of `depth` and returns its root.
fn grow(nodes: &mut TreeBody, rng: &mut ChaCha8Rng, depth: usize, inputs: usize) -> i32 {
    let node = nodes.feature.len();
    nodes.feature.push(-1);
    nodes.threshold.push(0.0);
    nodes.left.push(-1);
    nodes.right.push(-1);
    nodes.value.push(0.0);
    nodes.missing_left.push(rng.random_bool(0.5));
    if depth == 0 {
        nodes.value[node] = rng.random_range(-1.0..1.0);
    } else {
        nodes.feature[node] = rng.random_range(0..inputs as i32);
        nodes.threshold[node] = rng.random_range(-1.0..1.0);
        nodes.left[node] = grow(nodes, rng, depth - 1, inputs);
        nodes.right[node] = grow(nodes, rng, depth - 1, inputs);
    }
    node as i32
}

/// A random complete tree of `depth` over `inputs` features (bench data
/// only; no check value depends on it).
fn random_tree(rng: &mut ChaCha8Rng, depth: usize, inputs: usize) -> Tree {
    let mut nodes = TreeBody::default();
    grow(&mut nodes, rng, depth, inputs);
    nodes.into_tree(inputs).expect("generated trees are valid")
}

fn random_ensemble(seed: u64, trees: usize, depth: usize, inputs: usize) -> TreeEnsemble {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let trees = (0..trees)
        .map(|_| random_tree(&mut rng, depth, inputs))
        .collect();
    TreeEnsemble::try_new(trees, 0.0, Link::Identity, inputs).expect("valid ensemble")
}

fn random_rows(seed: u64, rows: usize, cols: usize) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_fn((rows, cols), |_| rng.random_range(-1.0..1.0))
}

/// The same ensemble seen only through predictions, so the engine cannot
/// use the tree algorithm.
struct Opaque(TreeEnsemble);

impl Model for Opaque {
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

/// `model` prepared over `background`, with a stated row cost of 100 ns.
fn prepared(
    model: impl Model + 'static,
    players: &Players,
    background: &Array2<f64>,
) -> Arc<PreparedModel> {
    let prepared =
        PreparedModel::try_new(Arc::new(model), players.clone(), background.clone(), 100.0);
    Arc::new(prepared.expect("prepared model"))
}

/// Both stages of the front door, with a minute's deadline.
fn explain(model: &Arc<PreparedModel>, request: &Request) -> apportion::engine::Explanation {
    let job = prepare(model, request.clone()).expect("valid request");
    job.run(Instant::now() + Duration::from_secs(60))
        .expect("explanation")
}

/// Best of `repeats` timings of `work`.
fn best_time<T>(repeats: usize, mut work: impl FnMut() -> T) -> (T, Duration) {
    let mut best = Duration::MAX;
    let mut out = None;
    for _ in 0..repeats {
        let start = Instant::now();
        let value = work();
        best = best.min(start.elapsed());
        out = Some(value);
    }
    (out.expect("at least one repeat"), best)
}

fn relative_l2(estimate: &[f64], exact: &[f64]) -> f64 {
    let error: f64 = estimate
        .iter()
        .zip(exact)
        .map(|(a, b)| (a - b).powi(2))
        .sum();
    let norm: f64 = exact.iter().map(|b| b * b).sum();
    (error / norm).sqrt()
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let repeats = if quick { 1 } else { 3 };
    println!("machine: {}", support::machine());
    println!();

    // 1. Exact tree algorithm vs brute-force enumeration.
    let (p, background_rows) = (12, 100);
    let ensemble = random_ensemble(1, 100, 6, p);
    let background = random_rows(2, background_rows, p);
    let instance = random_rows(3, 1, p).row(0).to_vec();
    let players = Players::singletons(p);
    let (tree, tree_time) = best_time(repeats, || {
        estimate::tree::explain(
            &ensemble,
            &players,
            &instance,
            background.view(),
            Summary::Shapley,
        )
        .expect("tree algorithm")
    });
    let compiled = CompiledTrees::compile(&ensemble, &players, background.view(), usize::MAX)
        .expect("compiles");
    let (summarised, compiled_time) = best_time(repeats, || {
        compiled
            .explain(
                &ensemble,
                &players,
                background.view(),
                &instance,
                Summary::Shapley,
            )
            .expect("compiled tree algorithm")
    });
    let marginal = Marginal::try_new(background.view()).expect("background");
    let opaque = Opaque(ensemble.clone());
    let (brute, brute_time) = best_time(1, || {
        let game = ModelGame::try_new(&opaque, &marginal, &players, &instance, &Target::Output)
            .expect("game");
        let cached = CachedGame::new(&game);
        estimate::exact::explain(&cached, Summary::Shapley).expect("enumeration")
    });
    let max_difference = tree
        .values
        .iter()
        .chain(&summarised.values)
        .zip(brute.values.iter().chain(&brute.values))
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max);
    println!(
        "| exact tree algorithm vs enumeration (100 trees, depth 6, p = 12, 100 background rows) | |"
    );
    println!("|---|---|");
    println!(
        "| tree algorithm, per-row pass | {:.2} ms |",
        tree_time.as_secs_f64() * 1e3
    );
    println!(
        "| tree algorithm, compiled against the background | {:.3} ms |",
        compiled_time.as_secs_f64() * 1e3
    );
    println!(
        "| brute-force enumeration (2^12 coalitions × 100 rows) | {:.1} ms |",
        brute_time.as_secs_f64() * 1e3
    );
    println!(
        "| speed-up, per-row pass | {:.0}× |",
        brute_time.as_secs_f64() / tree_time.as_secs_f64()
    );
    println!(
        "| speed-up, compiled | {:.0}× |",
        brute_time.as_secs_f64() / compiled_time.as_secs_f64()
    );
    println!("| largest difference | {max_difference:.1e} |");
    println!();

    // 2. Engine overhead for a black-box model: explanation time over the
    // time the bare batched model call takes for the same rows.
    let subject = prepared(Opaque(ensemble.clone()), &players, &background);
    let mut request = Request::new(instance.clone());
    request.estimator = Some(EstimatorKind::Exact);
    request.budget = Duration::from_secs(60);
    let (explained, explain_time) = best_time(repeats, || explain(&subject, &request));
    // The baseline predicts the very rows the explanation filled (tree
    // traversal cost depends on the data), in the same 4096-row batches.
    let rows = explained.model_rows_evaluated as usize;
    let mut filled = Array2::<f64>::zeros((rows, p));
    let mut weights = vec![0.0; background_rows];
    let mut present = vec![false; p];
    for bits in 0..1u128 << p {
        let coalition = Coalition::from_bits(bits);
        players.present_features(coalition, &mut present);
        let start = bits as usize * background_rows;
        let block = ndarray::s![start..start + background_rows, ..];
        marginal.fill(
            ndarray::aview1(&instance),
            &present,
            coalition,
            filled.slice_mut(block),
            &mut weights,
        );
    }
    let mut out = vec![0.0; 4096];
    let (_, model_time) = best_time(repeats, || {
        for start in (0..rows).step_by(4096) {
            let n = (rows - start).min(4096);
            opaque.predict(
                filled.slice(ndarray::s![start..start + n, ..]),
                &mut out[..n],
            );
        }
        out[0]
    });
    println!(
        "| engine overhead, black-box model (exact enumeration, p = 12, 100 background rows) | |"
    );
    println!("|---|---|");
    println!("| rows evaluated | {rows} |");
    println!(
        "| explanation | {:.1} ms |",
        explain_time.as_secs_f64() * 1e3
    );
    println!(
        "| bare batched model calls, same rows | {:.1} ms |",
        model_time.as_secs_f64() * 1e3
    );
    println!(
        "| overhead ratio | {:.2} |",
        explain_time.as_secs_f64() / model_time.as_secs_f64()
    );
    println!();

    // 3. Error against exact at a given number of coalition evaluations,
    // p = 20, fixed removal (exact values from the tree algorithm).
    let p = 20;
    let ensemble = random_ensemble(5, 50, 6, p);
    let opaque = Opaque(ensemble.clone());
    let players = Players::singletons(p);
    let background = random_rows(6, 100, p);
    let seeds: u64 = if quick { 5 } else { 20 };
    let instances = random_rows(7, seeds as usize, p);
    println!(
        "| relative L2 error vs exact, p = 20 (mean over {seeds} instances and seeds) | 512 | 2,048 | 8,192 |"
    );
    println!("|---|---|---|---|");
    for estimator in [
        EstimatorKind::Permutation,
        EstimatorKind::PairedRegression,
        EstimatorKind::LeverageRegression,
    ] {
        let mut row = format!("| {} |", estimator.name());
        for evaluations in [512u64, 2048, 8192] {
            let mut total = 0.0;
            for seed in 0..seeds {
                let instance = instances.row(seed as usize).to_vec();
                let reference = Fixed::background_mean(background.view()).expect("mean");
                let exact = estimate::tree::explain(
                    &ensemble,
                    &players,
                    &instance,
                    Array2::from_shape_vec((1, p), reference.values().to_vec())
                        .expect("row")
                        .view(),
                    Summary::Shapley,
                )
                .expect("exact");
                let game =
                    ModelGame::try_new(&opaque, &reference, &players, &instance, &Target::Output)
                        .expect("game");
                let cached = CachedGame::new(&game);
                let stopping = Stopping::evaluations(evaluations);
                let estimate = match estimator {
                    EstimatorKind::Permutation => {
                        estimate::permutation::shapley(&cached, &stopping, seed)
                    }
                    EstimatorKind::PairedRegression => estimate::regression::paired(
                        &cached,
                        apportion::engine::Kernel::Shapley,
                        &stopping,
                        seed,
                    ),
                    _ => estimate::regression::leverage(&cached, &stopping, seed),
                }
                .expect("estimate");
                total += relative_l2(&estimate.values, &exact.values);
            }
            row.push_str(&format!(" {:.2}% |", 100.0 * total / seeds as f64));
        }
        println!("{row}");
    }
    println!();

    // 4. Peak heap of one sampled explanation, 100 background rows, 2,048
    // evaluations: it must not grow with 2^p.
    println!(
        "| peak heap of one sampled explanation (2,048 evaluations, 100 background rows) | bytes |"
    );
    println!("|---|---|");
    for p in [20usize, 40, 80] {
        let ensemble = random_ensemble(8, 50, 6, p);
        let players = Players::singletons(p);
        let background = random_rows(9, 100, p);
        let instance = random_rows(10, 1, p).row(0).to_vec();
        let subject = prepared(Opaque(ensemble), &players, &background);
        let mut request = Request::new(instance);
        request.estimator = Some(EstimatorKind::LeverageRegression);
        request.max_evaluations = 2048;
        request.tolerance = 1e-12;
        request.budget = Duration::from_secs(60);
        let (explained, peak) = peak_bytes(|| explain(&subject, &request));
        println!(
            "| p = {p} ({} coalitions evaluated) | {:.2} MiB |",
            explained.coalitions_evaluated,
            peak as f64 / (1 << 20) as f64
        );
    }
}
