//! Cooperative games: the batched [`Game`] trait, the per-request
//! [`CachedGame`] that never evaluates a coalition twice, and the
//! [`ModelGame`] that is removal ∘ model ∘ target.
//!
//! A random removal makes each coalition value a mean of random draws, so
//! games report, beside each value, its variance over those draws; the
//! cache keeps both, and the estimators carry the variances into their std
//! errors.

use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};

use dashmap::DashMap;
use ndarray::{Array2, ArrayView2, s};

use super::coalition::Coalition;
use super::error::{EngineError, Result};
use super::model::{Link, Model};
use super::players::Players;
use super::removal::{Noise, Removal};
use super::target::{Target, averaging_scale, loss, loss_slope};

/// A set function over `players()` players.
pub trait Game: Sync {
    fn players(&self) -> usize;

    /// `out[i] = v(coalitions[i])`. Batched so one call can become one model
    /// call.
    fn values(&self, coalitions: &[Coalition], out: &mut [f64]);

    /// Like [`Game::values`], and `variances[i]` = the variance of
    /// `out[i]` over the removal's random draws (0 for a deterministic
    /// game). Draws are seeded per coalition, so different coalitions'
    /// noise is independent.
    fn values_and_variances(
        &self,
        coalitions: &[Coalition],
        out: &mut [f64],
        variances: &mut [f64],
    ) {
        self.values(coalitions, out);
        variances.fill(0.0);
    }

    /// Whether any value can have a nonzero variance; estimators skip the
    /// noise bookkeeping when not.
    fn is_noisy(&self) -> bool {
        false
    }

    /// Model rows one coalition costs (1 for games without a model), so
    /// callers can size batches by work rather than by coalitions.
    fn rows_per_coalition(&self) -> usize {
        1
    }

    /// Model rows evaluated so far (0 for games without a model).
    fn model_rows(&self) -> u64 {
        0
    }
}

/// A game given by a closure; for tests and published check games.
pub struct FnGame<F> {
    players: usize,
    value: F,
}

impl<F: Fn(Coalition) -> f64 + Sync> FnGame<F> {
    pub fn new(players: usize, value: F) -> FnGame<F> {
        FnGame { players, value }
    }
}

impl<F: Fn(Coalition) -> f64 + Sync> Game for FnGame<F> {
    fn players(&self) -> usize {
        self.players
    }

    fn values(&self, coalitions: &[Coalition], out: &mut [f64]) {
        for (c, slot) in coalitions.iter().zip(out) {
            *slot = (self.value)(*c);
        }
    }
}

/// The per-request cache: each distinct coalition reaches the inner game
/// once, and keeps its value with its variance, so a noisy value is the
/// same wherever it is reused. Counts evaluations (distinct coalitions) and
/// cache hits.
pub struct CachedGame<'a> {
    inner: &'a dyn Game,
    /// Value and variance of each coalition evaluated.
    cache: DashMap<Coalition, (f64, f64)>,
    evaluations: AtomicU64,
    hits: AtomicU64,
}

impl<'a> CachedGame<'a> {
    pub fn new(inner: &'a dyn Game) -> CachedGame<'a> {
        CachedGame {
            inner,
            cache: DashMap::new(),
            evaluations: AtomicU64::new(0),
            hits: AtomicU64::new(0),
        }
    }

    pub fn value(&self, coalition: Coalition) -> f64 {
        let mut out = [0.0];
        self.values(&[coalition], &mut out);
        out[0]
    }

    /// Distinct coalitions evaluated so far.
    pub fn evaluations(&self) -> u64 {
        self.evaluations.load(Ordering::Relaxed)
    }

    /// Whether `coalition` has been evaluated.
    pub fn holds(&self, coalition: Coalition) -> bool {
        self.cache.contains_key(&coalition)
    }

    /// Requests answered from the cache (including repeats within a batch).
    pub fn cache_hits(&self) -> u64 {
        self.hits.load(Ordering::Relaxed)
    }
}

impl CachedGame<'_> {
    /// Values (and, if asked, variances) from the cache, evaluating the
    /// coalitions it does not hold in one batch.
    fn lookup(&self, coalitions: &[Coalition], out: &mut [f64], mut variances: Option<&mut [f64]>) {
        let mut misses: Vec<Coalition> = Vec::new();
        let mut first_miss: HashMap<Coalition, usize> = HashMap::new();
        let mut waiting: Vec<(usize, usize)> = Vec::new();
        let mut hits = 0;
        for (i, c) in coalitions.iter().enumerate() {
            if let Some(entry) = self.cache.get(c) {
                out[i] = entry.0;
                if let Some(variances) = variances.as_deref_mut() {
                    variances[i] = entry.1;
                }
                hits += 1;
            } else if let Some(&m) = first_miss.get(c) {
                waiting.push((i, m));
                hits += 1;
            } else {
                first_miss.insert(*c, misses.len());
                waiting.push((i, misses.len()));
                misses.push(*c);
            }
        }
        if !misses.is_empty() {
            let mut fresh = vec![0.0; misses.len()];
            let mut fresh_variances = vec![0.0; misses.len()];
            self.inner
                .values_and_variances(&misses, &mut fresh, &mut fresh_variances);
            for ((c, v), variance) in misses.iter().zip(&fresh).zip(&fresh_variances) {
                self.cache.insert(*c, (*v, *variance));
            }
            for (i, m) in waiting {
                out[i] = fresh[m];
                if let Some(variances) = variances.as_deref_mut() {
                    variances[i] = fresh_variances[m];
                }
            }
        }
        self.evaluations
            .fetch_add(misses.len() as u64, Ordering::Relaxed);
        self.hits.fetch_add(hits, Ordering::Relaxed);
    }
}

impl Game for CachedGame<'_> {
    fn players(&self) -> usize {
        self.inner.players()
    }

    fn values(&self, coalitions: &[Coalition], out: &mut [f64]) {
        self.lookup(coalitions, out, None);
    }

    fn values_and_variances(
        &self,
        coalitions: &[Coalition],
        out: &mut [f64],
        variances: &mut [f64],
    ) {
        self.lookup(coalitions, out, Some(variances));
    }

    fn is_noisy(&self) -> bool {
        self.inner.is_noisy()
    }

    fn rows_per_coalition(&self) -> usize {
        self.inner.rows_per_coalition()
    }

    fn model_rows(&self) -> u64 {
        self.inner.model_rows()
    }
}

/// Rows filled per model call; bounds the memory of one batch whatever the
/// coalition count (about 4096 × features × 8 bytes).
const BATCH_ROWS: usize = 4096;

/// Removal ∘ model ∘ target: the coalition value of one instance (or, for
/// DATASET_LOSS, of a labelled data set).
pub struct ModelGame<'a> {
    model: &'a dyn Model,
    removal: &'a dyn Removal,
    players: &'a Players,
    /// One row for local targets; the data set's rows for DATASET_LOSS.
    instances: ArrayView2<'a, f64>,
    target: &'a Target,
    scale: Link,
    /// Mean loss with every player removed, for DATASET_LOSS.
    baseline_loss: f64,
    rows_evaluated: AtomicU64,
}

impl<'a> ModelGame<'a> {
    /// `instance` is the row explained; for DATASET_LOSS it is ignored and
    /// the target's rows are used.
    pub fn try_new(
        model: &'a dyn Model,
        removal: &'a dyn Removal,
        players: &'a Players,
        instance: &'a [f64],
        target: &'a Target,
    ) -> Result<ModelGame<'a>> {
        let features = model.inputs();
        if players.features() != features {
            return Err(EngineError::new(
                "features",
                format!(
                    "{} features described for a model with {features} inputs",
                    players.features()
                ),
            ));
        }
        let instances = match target {
            Target::DatasetLoss { rows, .. } => {
                target.check_dataset(features)?;
                rows.view()
            }
            _ => ArrayView2::from_shape((1, instance.len()), instance)
                .map_err(|_| EngineError::new("instance", "could not be read as one row"))?,
        };
        if instances.ncols() != features {
            return Err(EngineError::new(
                "instance",
                format!(
                    "has {} values; the model takes {features}",
                    instances.ncols()
                ),
            ));
        }
        let mut game = ModelGame {
            model,
            removal,
            players,
            instances,
            target,
            scale: averaging_scale(target, model.link()),
            baseline_loss: 0.0,
            rows_evaluated: AtomicU64::new(0),
        };
        if matches!(target, Target::DatasetLoss { .. }) {
            let mut baseline = [0.0];
            game.raw_values(&[Coalition::EMPTY], &mut baseline, None);
            game.baseline_loss = baseline[0];
        }
        Ok(game)
    }

    /// Coalition values before the DATASET_LOSS baseline is subtracted: the
    /// mean loss for DATASET_LOSS, the value itself for other targets. With
    /// `variances`, also each value's variance over the removal's draws.
    ///
    /// The variance linearises the value in the draws (the delta method for
    /// the losses): with `a_i` the slope of the target in instance `i`'s
    /// averaged prediction, over `n` instances, each draw `d` contributes
    /// `g_d = Σ_i a_i f(row_{i,d}) / n`, and the variance is that of the mean
    /// of the `g_d` (of the pair means, for antithetic pairs). One instance's
    /// draws share their seed with the others' (the same coalition), so the
    /// sum over instances is taken before the spread.
    fn raw_values(
        &self,
        coalitions: &[Coalition],
        out: &mut [f64],
        mut variances: Option<&mut [f64]>,
    ) {
        let features = self.model.inputs();
        let per_coalition = self.removal.rows_per_coalition() * self.instances.nrows();
        let chunk = (BATCH_ROWS / per_coalition.max(1)).max(1);
        let mut present = vec![false; features];
        let capacity = chunk.min(coalitions.len()) * per_coalition;
        let mut rows = Array2::<f64>::zeros((capacity, features));
        let mut weights = vec![0.0; capacity];
        let mut outputs = vec![0.0; capacity];
        let block = self.removal.rows_per_coalition();
        let noise = self.removal.noise();
        let mut per_draw = vec![0.0; block];
        let mut slopes = vec![0.0; self.instances.nrows()];
        let instances = self.instances.nrows() as f64;

        for (index, (batch, values)) in coalitions
            .chunks(chunk)
            .zip(out.chunks_mut(chunk))
            .enumerate()
        {
            let used = batch.len() * per_coalition;
            for (c, coalition) in batch.iter().enumerate() {
                self.players.present_features(*coalition, &mut present);
                for (i, x) in self.instances.rows().into_iter().enumerate() {
                    let start = c * per_coalition + i * block;
                    self.removal.fill(
                        x,
                        &present,
                        *coalition,
                        rows.slice_mut(s![start..start + block, ..]),
                        &mut weights[start..start + block],
                    );
                }
            }
            self.model
                .predict(rows.slice(s![..used, ..]), &mut outputs[..used]);
            self.rows_evaluated
                .fetch_add(used as u64, Ordering::Relaxed);

            for (c, value) in values.iter_mut().enumerate() {
                let mut total = 0.0;
                for (i, slope) in slopes.iter_mut().enumerate() {
                    let start = c * per_coalition + i * block;
                    let averaged: f64 = outputs[start..start + block]
                        .iter()
                        .zip(&weights[start..start + block])
                        .map(|(o, w)| w * self.scale.apply(*o))
                        .sum();
                    let (target, target_slope) = match self.target {
                        Target::Output | Target::Probability => (averaged, 1.0),
                        Target::Loss { label } => (
                            loss(self.scale, *label, averaged),
                            loss_slope(self.scale, *label, averaged),
                        ),
                        Target::DatasetLoss { labels, .. } => (
                            loss(self.scale, labels[i], averaged),
                            loss_slope(self.scale, labels[i], averaged),
                        ),
                    };
                    total += target;
                    *slope = target_slope / instances;
                }
                *value = total / instances;
                let Some(variances) = variances.as_deref_mut() else {
                    continue;
                };
                let slot = &mut variances[index * chunk + c];
                if noise == Noise::None {
                    *slot = 0.0;
                    continue;
                }
                per_draw.fill(0.0);
                for (i, slope) in slopes.iter().enumerate() {
                    let start = c * per_coalition + i * block;
                    for (g, o) in per_draw.iter_mut().zip(&outputs[start..start + block]) {
                        *g += slope * self.scale.apply(*o);
                    }
                }
                *slot = variance_of_mean(&per_draw, noise);
            }
        }
    }
}

/// The variance of the mean of `draws`: the sample variance over the
/// number of independent units (draws, or antithetic pairs averaged
/// first); infinite with fewer than two units, where it cannot be told.
fn variance_of_mean(draws: &[f64], noise: Noise) -> f64 {
    let unit = if noise == Noise::AntitheticPairs {
        2
    } else {
        1
    };
    let units = draws.len() / unit;
    if units < 2 {
        return f64::INFINITY;
    }
    let means = draws
        .chunks_exact(unit)
        .map(|pair| pair.iter().sum::<f64>() / unit as f64);
    let mean = means.clone().sum::<f64>() / units as f64;
    let squares: f64 = means.map(|m| (m - mean).powi(2)).sum();
    squares / (units - 1) as f64 / units as f64
}

impl ModelGame<'_> {
    fn subtract_baseline(&self, out: &mut [f64]) {
        if matches!(self.target, Target::DatasetLoss { .. }) {
            for v in out.iter_mut() {
                *v = self.baseline_loss - *v;
            }
        }
    }
}

impl Game for ModelGame<'_> {
    fn players(&self) -> usize {
        self.players.len()
    }

    fn values(&self, coalitions: &[Coalition], out: &mut [f64]) {
        self.raw_values(coalitions, out, None);
        self.subtract_baseline(out);
    }

    /// For DATASET_LOSS the variance is that of the coalition's own loss:
    /// the baseline `loss(∅)` is one shared number, so it moves every
    /// value alike and cancels from every summary here; `v(∅)`'s reported
    /// variance is that of `loss(∅)`, which is where the shared noise
    /// enters the summaries.
    fn values_and_variances(
        &self,
        coalitions: &[Coalition],
        out: &mut [f64],
        variances: &mut [f64],
    ) {
        if self.removal.noise() == Noise::None {
            self.values(coalitions, out);
            variances.fill(0.0);
            return;
        }
        self.raw_values(coalitions, out, Some(variances));
        self.subtract_baseline(out);
    }

    fn is_noisy(&self) -> bool {
        self.removal.noise() != Noise::None
    }

    fn rows_per_coalition(&self) -> usize {
        self.removal.rows_per_coalition() * self.instances.nrows()
    }

    fn model_rows(&self) -> u64 {
        self.rows_evaluated.load(Ordering::Relaxed)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_cache_evaluates_each_coalition_once() {
        let calls = AtomicU64::new(0);
        let game = FnGame::new(3, |c: Coalition| {
            calls.fetch_add(1, Ordering::Relaxed);
            c.len() as f64
        });
        let cached = CachedGame::new(&game);
        let a = Coalition::singleton(0);
        let b = Coalition::full(3);
        let mut out = [0.0; 4];
        cached.values(&[a, b, a, a], &mut out);
        assert_eq!(out, [1.0, 3.0, 1.0, 1.0]);
        cached.values(&[b], &mut out[..1]);
        assert_eq!(calls.load(Ordering::Relaxed), 2);
        assert_eq!(cached.evaluations(), 2);
        assert_eq!(cached.cache_hits(), 3);
    }
}
