//! CONDITIONAL_NEIGHBORS removal: background rows stand in for the
//! conditional distribution, weighted by how close each is to the instance on
//! the present features (a Gaussian kernel on a standardised distance). The
//! per-feature scales are computed once per background ([`inverse_scales`]).

use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2};

use super::Removal;
use super::marginal::{fill_from_rows, require_finite, require_rows};
use crate::engine::coalition::Coalition;
use crate::engine::error::{EngineError, Result};

/// Rows are the background rows with the present features replaced by x;
/// row `r` weighs `exp(−d_r² / (2 width²))` with
/// `d_r² = Σ_{j∈P} ((x_j − z_rj) / σ_j)² / max(1, |P|)`, σ_j the background
/// std (population form) and a constant feature contributing 0. The kernel
/// weighting of background rows follows the empirical conditional approach of
/// "Explaining individual predictions when features are dependent: more
/// accurate approximations to Shapley values", Artificial Intelligence 298,
/// 2021 (which uses a Mahalanobis distance; we standardise per feature).
///
/// Requires a NaN-free instance (the front door checks it); a non-finite
/// difference on a present feature is skipped in the distance rather than
/// turning the weights into NaN.
#[derive(Debug, Clone)]
pub struct ConditionalNeighbors<'a> {
    background: ArrayView2<'a, f64>,
    /// `1 / σ_j`, or 0 for a constant feature.
    inverse_scales: &'a [f64],
    width: f64,
}

impl<'a> ConditionalNeighbors<'a> {
    /// `inverse_scales` must come from [`inverse_scales`] on this same
    /// `background`: that is where the background is checked to be finite,
    /// once, rather than on every request.
    pub fn try_new(
        background: ArrayView2<'a, f64>,
        inverse_scales: &'a [f64],
        width: f64,
    ) -> Result<ConditionalNeighbors<'a>> {
        require_rows(background, 1, "CONDITIONAL_NEIGHBORS removal")?;
        if inverse_scales.len() != background.ncols() {
            return Err(EngineError::new(
                "background",
                format!(
                    "has {} columns but {} feature scales were given; compute them from this background",
                    background.ncols(),
                    inverse_scales.len()
                ),
            ));
        }
        if !(width.is_finite() && width > 0.0) {
            return Err(EngineError::new(
                "width",
                format!("must be a finite number greater than 0; got {width}"),
            ));
        }
        Ok(ConditionalNeighbors {
            background,
            inverse_scales,
            width,
        })
    }
}

/// `1 / σ_j` for each background column (σ the population std), or 0 for a
/// constant column, which then adds nothing to the distance. Refuses a
/// background without rows or with a missing or infinite value.
pub fn inverse_scales(background: ArrayView2<'_, f64>) -> Result<Vec<f64>> {
    require_rows(background, 1, "CONDITIONAL_NEIGHBORS removal")?;
    require_finite(background)?;
    let rows = background.nrows() as f64;
    Ok(background
        .columns()
        .into_iter()
        .map(|column| {
            let mean = column.sum() / rows;
            let variance = column.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / rows;
            let std = variance.sqrt();
            if std > 0.0 { 1.0 / std } else { 0.0 }
        })
        .collect())
}

impl Removal for ConditionalNeighbors<'_> {
    fn rows_per_coalition(&self) -> usize {
        self.background.nrows()
    }

    fn fill(
        &self,
        x: ArrayView1<'_, f64>,
        present: &[bool],
        _coalition: Coalition,
        mut rows: ArrayViewMut2<'_, f64>,
        weights: &mut [f64],
    ) {
        fill_from_rows(self.background, x, present, &mut rows);
        let present_count = present.iter().filter(|p| **p).count();
        let divisor = present_count.max(1) as f64;
        for (weight, reference) in weights.iter_mut().zip(self.background.rows()) {
            let mut squared = 0.0;
            for (((&own, &other), &scale), &keep) in x
                .iter()
                .zip(reference)
                .zip(self.inverse_scales)
                .zip(present)
            {
                let term = ((own - other) * scale).powi(2);
                if keep && term.is_finite() {
                    squared += term;
                }
            }
            // Hold d² here; it becomes a weight below.
            *weight = squared / divisor;
        }
        // Subtracting the smallest d² keeps the nearest row at weight 1, so
        // a tiny width cannot underflow every weight to 0.
        let nearest = weights.iter().copied().fold(f64::INFINITY, f64::min);
        if !nearest.is_finite() {
            weights.fill(1.0 / weights.len() as f64);
            return;
        }
        let scale = 1.0 / (2.0 * self.width * self.width);
        let mut total = 0.0;
        for weight in weights.iter_mut() {
            *weight = (-(*weight - nearest) * scale).exp();
            total += *weight;
        }
        for weight in weights.iter_mut() {
            *weight /= total;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, array};

    /// Weights for `x` with only feature 0 present.
    fn weights_for(background: &Array2<f64>, x: f64, width: f64) -> Vec<f64> {
        let scales = inverse_scales(background.view()).unwrap();
        let removal = ConditionalNeighbors::try_new(background.view(), &scales, width).unwrap();
        let instance = array![x, 0.0];
        let mut rows = Array2::zeros(background.dim());
        let mut weights = vec![0.0; background.nrows()];
        removal.fill(
            instance.view(),
            &[true, false],
            Coalition::singleton(0),
            rows.view_mut(),
            &mut weights,
        );
        weights
    }

    #[test]
    fn weights_follow_the_gaussian_kernel_on_the_standardised_distance() {
        // Feature 0 takes -1 and 1 (population std 1), so an instance at 0
        // is at distance 1 from both rows and the kernel exp(-d²/2) gives
        // them equal weight (Gaussian kernel; common practice, no source).
        let background = array![[-1.0, 5.0], [1.0, 7.0]];
        let even = weights_for(&background, 0.0, 1.0);
        assert!((even[0] - 0.5).abs() < 1e-15 && (even[1] - 0.5).abs() < 1e-15);
        // At x = 1: d² = 4 and 0, weights ∝ exp(-2) and 1.
        let skewed = weights_for(&background, 1.0, 1.0);
        let expected = (-2.0f64).exp() / (1.0 + (-2.0f64).exp());
        assert!((skewed[0] - expected).abs() < 1e-15, "{skewed:?}");
    }

    #[test]
    fn far_instances_and_tiny_widths_still_give_finite_weights() {
        let background = array![[-1.0, 5.0], [1.0, 7.0]];
        for (x, width) in [(1e150, 1.0), (3.0, 1e-150), (f64::NAN, 1.0)] {
            let weights = weights_for(&background, x, width);
            assert!(weights.iter().all(|w| w.is_finite()), "{weights:?}");
            assert!((weights.iter().sum::<f64>() - 1.0).abs() < 1e-15);
        }
    }

    #[test]
    fn width_must_be_positive_and_finite() {
        let background = array![[1.0]];
        let scales = inverse_scales(background.view()).unwrap();
        for width in [0.0, -1.0, f64::NAN, f64::INFINITY] {
            let err = ConditionalNeighbors::try_new(background.view(), &scales, width).unwrap_err();
            assert_eq!(err.field, "width");
        }
    }
}
