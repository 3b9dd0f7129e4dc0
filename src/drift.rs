//! Attribution drift: per model version and player, streaming summaries of
//! the attributions answered, in fixed time windows (count, sum, sum of
//! absolute values, and a sketch of the distribution), and the comparison
//! of recent windows with earlier ones that a monitoring pipeline alerts
//! on: the change in mean |attribution| and a population stability index.
//!
//! The sketch keeps counts in logarithmic bins of |value| (one set per
//! sign, plus a bin for values within 1e-12 of zero), so any value is
//! placed within 5% relative error and windows merge by adding counts
//! ("DDSketch: A fast and fully-mergeable quantile sketch with
//! relative-error guarantees", Masson, Rim and Lee, PVLDB 12(12), 2019).
//!
//! The stability index compares the recent distribution with the reference
//! one over ten bins cut at the reference's deciles:
//! `Σ (recent_i − reference_i) · ln(recent_i / reference_i)`, each share
//! floored at half a count so an empty bin stays finite. Credit-risk
//! practice reads under 0.1 as stable and over 0.25 as a shift ("Credit
//! Risk Scorecards", Siddiqi, Wiley 2006; the statistic's behaviour under
//! no change: "Statistical properties of the population stability index",
//! Yurdakul and Naranjo, Journal of Risk Model Validation 14(4), 2020).

use std::collections::{HashMap, VecDeque};
use std::sync::Mutex;

/// |value| under this counts as zero.
const ZERO: f64 = 1e-12;
/// Bins of the stability index.
const INDEX_BINS: usize = 10;
/// The stability index at or above which a player is flagged (the
/// credit-risk reading of a shift; see the module documentation).
pub const SHIFT_INDEX: f64 = 0.25;
/// Fewest attributions on each side for a player to be flagged: with fewer,
/// the index's own noise (about (bins − 1)(1/n + 1/m) under no change) is
/// not small against the threshold.
pub const MIN_SAMPLES: u64 = 100;

/// A sketch bin: sign (−1, 0, +1) and the logarithmic index of |value|.
type Bin = (i8, i32);

fn bin_of(value: f64) -> Bin {
    if !value.is_finite() || value.abs() < ZERO {
        return (0, 0);
    }
    let index = (value.abs().ln() * INVERSE_LN_GAMMA).ceil() as i32;
    (if value > 0.0 { 1 } else { -1 }, index)
}

/// 1 / ln γ with γ = (1 + α) / (1 − α) = 1.05 / 0.95: bins of relative
/// accuracy α = 5%.
const INVERSE_LN_GAMMA: f64 = 9.991_661_103_824_153;

/// A sketch's counts per bin, sorted by bin: a window sees a few dozen
/// distinct bins, so a sorted vector finds one in a handful of
/// comparisons on one cache line or two, and is walked in order.
#[derive(Debug, Clone, Default, PartialEq)]
struct Bins(Vec<(Bin, u64)>);

impl Bins {
    fn add(&mut self, bin: Bin, count: u64) {
        match self.0.binary_search_by(|(b, _)| b.cmp(&bin)) {
            Ok(at) => self.0[at].1 += count,
            Err(at) => self.0.insert(at, (bin, count)),
        }
    }

    fn iter(&self) -> impl Iterator<Item = (&Bin, &u64)> {
        self.0.iter().map(|(bin, count)| (bin, count))
    }
}

/// Bins in the order of the values they hold.
fn value_order(bin: &Bin) -> (i8, i64) {
    let (sign, index) = *bin;
    (sign, i64::from(sign) * i64::from(index))
}

/// One player's attributions in one window.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Summary {
    pub count: u64,
    pub sum: f64,
    pub sum_abs: f64,
    bins: Bins,
}

impl Summary {
    fn add(&mut self, value: f64) {
        if !value.is_finite() {
            return;
        }
        self.count += 1;
        self.sum += value;
        self.sum_abs += value.abs();
        self.bins.add(bin_of(value), 1);
    }

    fn merge(&mut self, other: &Summary) {
        self.count += other.count;
        self.sum += other.sum;
        self.sum_abs += other.sum_abs;
        for (bin, count) in other.bins.iter() {
            self.bins.add(*bin, *count);
        }
    }

    pub fn mean(&self) -> f64 {
        if self.count == 0 {
            f64::NAN
        } else {
            self.sum / self.count as f64
        }
    }

    pub fn mean_abs(&self) -> f64 {
        if self.count == 0 {
            f64::NAN
        } else {
            self.sum_abs / self.count as f64
        }
    }
}

/// The stability index of `recent` against `reference` (module
/// documentation); NaN when either side is empty.
pub fn stability_index(reference: &Summary, recent: &Summary) -> f64 {
    if reference.count == 0 || recent.count == 0 {
        return f64::NAN;
    }
    let mut ordered: Vec<(&Bin, &u64)> = reference.bins.iter().collect();
    ordered.sort_by_key(|(bin, _)| value_order(bin));
    // Upper edges (inclusive, in value order) of the groups of reference
    // bins that each hold about a tenth of the reference; a bin is never
    // split, so a point mass makes fewer, larger groups.
    let mut edges = Vec::new();
    let mut seen = 0u64;
    for (bin, count) in &ordered {
        seen += **count;
        let group_end = (edges.len() as u64 + 1) * reference.count / INDEX_BINS as u64;
        if seen >= group_end && edges.len() < INDEX_BINS - 1 {
            edges.push(value_order(bin));
        }
    }
    let group = |bin: &Bin| {
        let order = value_order(bin);
        edges.partition_point(|edge| *edge < order)
    };
    let groups = edges.len() + 1;
    let mut reference_counts = vec![0u64; groups];
    let mut recent_counts = vec![0u64; groups];
    for (bin, count) in reference.bins.iter() {
        reference_counts[group(bin)] += count;
    }
    for (bin, count) in recent.bins.iter() {
        recent_counts[group(bin)] += count;
    }
    let share = |count: u64, total: u64| (count as f64).max(0.5) / total as f64;
    reference_counts
        .iter()
        .zip(&recent_counts)
        .map(|(&q, &p)| {
            let (q, p) = (share(q, reference.count), share(p, recent.count));
            (p - q) * (p / q).ln()
        })
        .sum()
}

/// The windows of one model version: per window, one summary per player.
#[derive(Debug)]
struct Windows {
    players: Vec<String>,
    /// By window start (milliseconds since the Unix epoch), oldest first.
    kept: VecDeque<(u64, Vec<Summary>)>,
}

/// Every model version's windows.
#[derive(Debug)]
pub struct DriftTracker {
    window_ms: u64,
    windows_kept: usize,
    /// By model id, then version: looked up by `&str` with no allocation
    /// on the answer path.
    models: Mutex<HashMap<String, HashMap<u64, Windows>>>,
}

/// One player's comparison.
#[derive(Debug, Clone, PartialEq)]
pub struct PlayerDrift {
    pub player: String,
    pub reference: Summary,
    pub recent: Summary,
    pub stability_index: f64,
    /// The index is at least [`SHIFT_INDEX`] with at least
    /// [`MIN_SAMPLES`] attributions on each side.
    pub shifted: bool,
}

/// A comparison of the most recent windows with the ones before them.
#[derive(Debug, Clone, PartialEq)]
pub struct Drift {
    pub window_ms: u64,
    /// Start of the first and end of the last window on each side
    /// (milliseconds since the Unix epoch); 0 when the side is empty.
    pub reference_span: (u64, u64),
    pub recent_span: (u64, u64),
    pub players: Vec<PlayerDrift>,
}

impl DriftTracker {
    pub fn new(window_ms: u64, windows_kept: usize) -> DriftTracker {
        DriftTracker {
            window_ms: window_ms.max(1),
            windows_kept: windows_kept.max(2),
            models: Mutex::new(HashMap::new()),
        }
    }

    /// Adds one answer's attributions (in player order) at `at_unix_ms`;
    /// `players` names them, asked only for a version not seen before.
    /// True when this opened a window after the newest one, which has then
    /// closed.
    pub fn record(
        &self,
        model_id: &str,
        version: u64,
        players: impl FnOnce() -> Vec<String>,
        values: &[f64],
        at_unix_ms: u64,
    ) -> bool {
        let start = at_unix_ms - at_unix_ms % self.window_ms;
        let mut models = self.models.lock().unwrap_or_else(|e| e.into_inner());
        let versions = match models.get_mut(model_id) {
            Some(versions) => versions,
            None => models.entry(model_id.to_string()).or_default(),
        };
        let windows = versions.entry(version).or_insert_with(|| Windows {
            players: players(),
            kept: VecDeque::new(),
        });
        if windows.players.len() != values.len() {
            return false;
        }
        let opens_newest = windows
            .kept
            .back()
            .is_some_and(|(newest, _)| *newest < start);
        // Answers arrive about in time order; one a little late joins the
        // window it belongs to if that is still kept.
        let position = windows.kept.iter().rposition(|(s, _)| *s <= start);
        let summaries = match position {
            Some(at) if windows.kept[at].0 == start => &mut windows.kept[at].1,
            _ => {
                let fresh = vec![Summary::default(); values.len()];
                let at = position.map_or(0, |at| at + 1);
                windows.kept.insert(at, (start, fresh));
                while windows.kept.len() > self.windows_kept {
                    windows.kept.pop_front();
                }
                match windows.kept.iter_mut().find(|(s, _)| *s == start) {
                    Some((_, summaries)) => summaries,
                    // Older than every window kept: nothing to add it to.
                    None => return false,
                }
            }
        };
        for (summary, value) in summaries.iter_mut().zip(values) {
            summary.add(*value);
        }
        opens_newest
    }

    /// The window before the newest (the one that closed when the newest
    /// opened) against every earlier window kept.
    pub fn compare_closed(&self, model_id: &str, version: u64) -> Option<Drift> {
        self.compare_skipping(model_id, version, 1, 1, 0)
    }

    /// Forgets a deleted model's windows (every version when `version` is
    /// 0).
    pub fn forget(&self, model_id: &str, version: u64) {
        let mut models = self.models.lock().unwrap_or_else(|e| e.into_inner());
        if version == 0 {
            models.remove(model_id);
        } else if let Some(versions) = models.get_mut(model_id) {
            versions.remove(&version);
        }
    }

    /// The last `recent_windows` windows kept against the
    /// `reference_windows` before them (0: every earlier window kept);
    /// `None` if the version has answered nothing since it was tracked.
    pub fn compare(
        &self,
        model_id: &str,
        version: u64,
        recent_windows: usize,
        reference_windows: usize,
    ) -> Option<Drift> {
        self.compare_skipping(model_id, version, 0, recent_windows, reference_windows)
    }

    /// [`DriftTracker::compare`] as if the `skipped` newest windows were
    /// not there yet.
    fn compare_skipping(
        &self,
        model_id: &str,
        version: u64,
        skipped: usize,
        recent_windows: usize,
        reference_windows: usize,
    ) -> Option<Drift> {
        let models = self.models.lock().unwrap_or_else(|e| e.into_inner());
        let windows = models.get(model_id)?.get(&version)?;
        let kept = windows.kept.len().checked_sub(skipped)?;
        if kept == 0 {
            return None;
        }
        let recent_from = kept.saturating_sub(recent_windows.max(1));
        let reference_from = if reference_windows == 0 {
            0
        } else {
            recent_from.saturating_sub(reference_windows)
        };
        let merged = |range: std::ops::Range<usize>| {
            let mut summaries = vec![Summary::default(); windows.players.len()];
            for (_, window) in windows.kept.range(range.clone()) {
                for (into, from) in summaries.iter_mut().zip(window) {
                    into.merge(from);
                }
            }
            let span = match (windows.kept.get(range.start), range.end.checked_sub(1)) {
                (Some((first, _)), Some(last)) if !range.is_empty() => {
                    (*first, windows.kept[last].0 + self.window_ms)
                }
                _ => (0, 0),
            };
            (summaries, span)
        };
        let (reference, reference_span) = merged(reference_from..recent_from);
        let (recent, recent_span) = merged(recent_from..kept);
        let players = windows
            .players
            .iter()
            .zip(reference.into_iter().zip(recent))
            .map(|(player, (reference, recent))| {
                let index = stability_index(&reference, &recent);
                PlayerDrift {
                    player: player.clone(),
                    shifted: index >= SHIFT_INDEX
                        && reference.count >= MIN_SAMPLES
                        && recent.count >= MIN_SAMPLES,
                    stability_index: index,
                    reference,
                    recent,
                }
            })
            .collect();
        Some(Drift {
            window_ms: self.window_ms,
            reference_span,
            recent_span,
            players,
        })
    }
}

#[cfg(test)]
mod tests {
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Normal};

    use super::*;

    #[test]
    fn values_land_in_bins_within_the_relative_accuracy() {
        const ACCURACY: f64 = 0.05;
        // DDSketch's mapping (PVLDB 2019): the bin's representative value
        // 2γ^i/(γ+1) is within α of every value in the bin.
        let gamma = (1.0 + ACCURACY) / (1.0 - ACCURACY);
        assert!((INVERSE_LN_GAMMA - gamma.ln().recip()).abs() <= 1e-15);
        for value in [1e-9, 3.3e-4, 0.5, 1.0, 7.25, 1e6, -0.02, -41.0] {
            let (sign, index) = bin_of(value);
            let representative = f64::from(sign) * 2.0 * gamma.powi(index) / (gamma + 1.0);
            assert!(
                ((representative - value) / value).abs() <= ACCURACY + 1e-12,
                "{value}: {representative}"
            );
        }
        assert_eq!(bin_of(0.0), (0, 0));
        assert_eq!(bin_of(f64::NAN), (0, 0));
    }

    fn names(players: &[&str]) -> Vec<String> {
        players.iter().map(|p| p.to_string()).collect()
    }

    fn summary(values: impl IntoIterator<Item = f64>) -> Summary {
        let mut summary = Summary::default();
        for value in values {
            summary.add(value);
        }
        summary
    }

    #[test]
    fn the_index_is_near_zero_for_one_distribution_and_large_for_a_shift() {
        // A stable population gives an index about (bins − 1)(1/n + 1/m)
        // (Yurdakul and Naranjo 2020); a mean shift of one standard
        // deviation is far above 0.25.
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let normal = Normal::new(0.0, 1.0).unwrap();
        let reference = summary((0..5_000).map(|_| normal.sample(&mut rng)));
        let same = summary((0..5_000).map(|_| normal.sample(&mut rng)));
        let shifted = summary((0..5_000).map(|_| 1.0 + normal.sample(&mut rng)));
        let stable = stability_index(&reference, &same);
        assert!(stable < 0.02, "{stable}");
        let moved = stability_index(&reference, &shifted);
        assert!(moved > 0.5, "{moved}");
        assert!(stability_index(&reference, &Summary::default()).is_nan());
    }

    #[test]
    fn a_point_mass_that_starts_to_spread_is_flagged() {
        // A player the model did not use (attribution 0 for everyone)
        // whose effect switches on: every reference value is one bin.
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let normal = Normal::new(0.0, 0.3).unwrap();
        let reference = summary((0..1_000).map(|_| 0.0));
        let recent = summary((0..1_000).map(|_| normal.sample(&mut rng)));
        assert!(stability_index(&reference, &recent) > SHIFT_INDEX);
        assert!(stability_index(&reference, &reference.clone()) < 1e-12);
    }

    #[test]
    fn windows_split_by_time_and_the_recent_ones_are_compared_with_the_rest() {
        // The tracker's documented windows (common practice, no source).
        let tracker = DriftTracker::new(1_000, 4);
        let players = ["a", "b"];
        for (at, a) in [(10, 1.0), (999, 3.0), (1_000, -2.0), (2_500, 5.0)] {
            tracker.record("m", 1, || names(&players), &[a, 0.0], at);
        }
        let drift = tracker.compare("m", 1, 1, 0).unwrap();
        assert_eq!(drift.reference_span, (0, 2_000));
        assert_eq!(drift.recent_span, (2_000, 3_000));
        let a = &drift.players[0];
        assert_eq!(a.reference.count, 3);
        assert_eq!(a.reference.mean(), 2.0 / 3.0);
        assert_eq!(a.reference.mean_abs(), 2.0);
        assert_eq!(a.recent.count, 1);
        assert!(!a.shifted, "too few samples to flag");
        // Windows past the number kept are forgotten, oldest first.
        for at in [3_000, 4_000, 5_000] {
            tracker.record("m", 1, || names(&players), &[0.0, 0.0], at);
        }
        let drift = tracker.compare("m", 1, 1, 0).unwrap();
        assert_eq!(drift.reference_span, (2_000, 5_000));
        tracker.forget("m", 0);
        assert!(tracker.compare("m", 1, 1, 0).is_none());
    }

    /// One stream of `n` attributions per window for five players; player
    /// 3's effect switches on in the recent window when `switch` is set.
    fn stream(seed: u64, n: usize, switch: bool) -> Drift {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let effect = Normal::new(0.0, 0.5).unwrap();
        let tracker = DriftTracker::new(1_000, 8);
        let players = ["p0", "p1", "p2", "p3", "p4"];
        for window in 0..2u64 {
            for k in 0..n {
                let values: Vec<f64> = (0..5)
                    .map(|j| {
                        if j == 3 {
                            if switch && window == 1 {
                                effect.sample(&mut rng)
                            } else {
                                0.02 * effect.sample(&mut rng)
                            }
                        } else {
                            (j as f64 + 1.0) * effect.sample(&mut rng)
                        }
                    })
                    .collect();
                tracker.record(
                    "m",
                    1,
                    || names(&players),
                    &values,
                    window * 1_000 + k as u64 % 1_000,
                );
            }
        }
        tracker.compare("m", 1, 1, 0).unwrap()
    }

    #[test]
    fn a_switched_on_effect_is_flagged_and_a_stationary_stream_is_not() {
        // The pipeline issue's drift check, over 200 seeds at 500
        // attributions per window: the player whose effect switches on is
        // flagged every time and the others never; on stationary streams
        // no player of any seed is flagged (measured false-alarm rate 0 of
        // 1,000 player comparisons; the largest index seen is printed).
        let mut largest_stationary: f64 = 0.0;
        for seed in 0..200 {
            let switched = stream(seed, 500, true);
            for player in &switched.players {
                assert_eq!(
                    player.shifted,
                    player.player == "p3",
                    "seed {seed}: {player:?}"
                );
            }
            let stationary = stream(1_000 + seed, 500, false);
            for player in &stationary.players {
                assert!(!player.shifted, "seed {seed}: {player:?}");
                largest_stationary = largest_stationary.max(player.stability_index);
            }
        }
        eprintln!("largest stability index on stationary streams: {largest_stationary:.4}");
    }
}
