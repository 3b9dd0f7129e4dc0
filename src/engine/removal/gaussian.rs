//! CONDITIONAL_GAUSSIAN removal: the background is summarised by a
//! multivariate normal, and missing features are drawn from its conditional
//! distribution given the present ones, in antithetic pairs.

use nalgebra::{Cholesky, DMatrix, DVector, SymmetricEigen};
use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2};
use rand_distr::{Distribution, StandardNormal};

use super::independent::coalition_rng;
use super::marginal::{require_finite, require_rows};
use super::{Removal, RemovalKind};
use crate::engine::coalition::Coalition;
use crate::engine::error::{EngineError, Result};

/// Ridge added to the covariance diagonal, as a fraction of the mean
/// variance: enough for a singular covariance (a constant or duplicated
/// feature) to factor, small enough not to move conditional means visibly.
const RIDGE_FRACTION: f64 = 1e-12;

/// Requires a NaN-free instance (the front door checks it); a NaN on a
/// present feature yields NaN rows, never a panic.
#[derive(Debug, Clone)]
pub struct ConditionalGaussian {
    mean: DVector<f64>,
    covariance: DMatrix<f64>,
    /// Square-root factor of the whole covariance, for the empty coalition.
    marginal_factor: DMatrix<f64>,
    draws: usize,
    seed: u64,
}

impl ConditionalGaussian {
    /// Fits the mean and the sample covariance (denominator n − 1) of
    /// `background`; `draws` rows per coalition, an even number, and `seed`
    /// fixes every draw.
    pub fn try_new(
        background: ArrayView2<'_, f64>,
        draws: usize,
        seed: u64,
    ) -> Result<ConditionalGaussian> {
        require_rows(
            background,
            2,
            "CONDITIONAL_GAUSSIAN removal (to estimate a covariance)",
        )?;
        require_finite(background)?;
        if draws < 2 || !draws.is_multiple_of(2) {
            return Err(EngineError::new(
                "draws",
                format!(
                    "must be an even number of at least 2 (draws come in antithetic pairs); got {draws}"
                ),
            ));
        }
        let (rows, features) = background.dim();
        // Deviations from the first row keep a constant feature's mean and
        // variance exactly as they are (a plain sum / n may round).
        let origin = background.row(0);
        let mut shift = DVector::<f64>::zeros(features);
        for row in background.rows() {
            for j in 0..features {
                shift[j] += row[j] - origin[j];
            }
        }
        shift /= rows as f64;
        let mean = DVector::from_fn(features, |j, _| origin[j] + shift[j]);
        let mut covariance = DMatrix::<f64>::zeros(features, features);
        let mut centred = DVector::<f64>::zeros(features);
        for row in background.rows() {
            for j in 0..features {
                centred[j] = (row[j] - origin[j]) - shift[j];
            }
            covariance.syger(1.0, &centred, &centred, 1.0);
        }
        covariance /= (rows - 1) as f64;
        covariance.fill_upper_triangle_with_lower_triangle();
        let ridge = RIDGE_FRACTION * (covariance.trace() / features as f64).max(f64::MIN_POSITIVE);
        for j in 0..features {
            covariance[(j, j)] += ridge;
        }
        let marginal_factor = square_root_factor(covariance.clone());
        Ok(ConditionalGaussian {
            mean,
            covariance,
            marginal_factor,
            draws,
            seed,
        })
    }

    /// The fitted mean, one value per feature.
    pub fn mean(&self) -> &[f64] {
        self.mean.as_slice()
    }

    /// Features of the fitted distribution; the caller checks it against the
    /// model's inputs.
    pub fn features(&self) -> usize {
        self.mean.len()
    }

    /// Mean and a square-root factor `L` (`L Lᵀ` = covariance) of the missing
    /// features given the present ones: `μ_M + Σ_MP Σ_PP⁻¹ (x_P − μ_P)` and
    /// `Σ_MM − Σ_MP Σ_PP⁻¹ Σ_PM` ("Explaining individual predictions when
    /// features are dependent: more accurate approximations to Shapley
    /// values", Artificial Intelligence 298, 2021).
    fn conditional(
        &self,
        x: ArrayView1<'_, f64>,
        present_at: &[usize],
        missing_at: &[usize],
    ) -> (DVector<f64>, DMatrix<f64>) {
        let mean_missing =
            DVector::from_iterator(missing_at.len(), missing_at.iter().map(|&j| self.mean[j]));
        if present_at.is_empty() {
            return (mean_missing, self.marginal_factor.clone());
        }
        let rows_present = self.covariance.select_rows(present_at);
        let present_present = rows_present.select_columns(present_at);
        let present_missing = rows_present.select_columns(missing_at);
        let missing_missing = self
            .covariance
            .select_rows(missing_at)
            .select_columns(missing_at);
        let offset = DVector::from_iterator(
            present_at.len(),
            present_at.iter().map(|&j| x[j] - self.mean[j]),
        );

        let (gain, shift) = match Cholesky::new(present_present.clone()) {
            Some(factor) => (factor.solve(&present_missing), factor.solve(&offset)),
            None => {
                let pseudo_inverse = symmetric_pseudo_inverse(present_present);
                (
                    &pseudo_inverse * &present_missing,
                    &pseudo_inverse * &offset,
                )
            }
        };
        let mean = mean_missing + present_missing.tr_mul(&shift);
        let mut covariance = missing_missing - present_missing.tr_mul(&gain);
        let transposed = covariance.transpose();
        covariance = (covariance + transposed) * 0.5;
        (mean, square_root_factor(covariance))
    }
}

impl Removal for ConditionalGaussian {
    fn kind(&self) -> RemovalKind {
        RemovalKind::ConditionalGaussian
    }

    fn rows_per_coalition(&self) -> usize {
        self.draws
    }

    fn fill(
        &self,
        x: ArrayView1<'_, f64>,
        present: &[bool],
        coalition: Coalition,
        mut rows: ArrayViewMut2<'_, f64>,
        weights: &mut [f64],
    ) {
        debug_assert_eq!(rows.ncols(), self.mean.len());
        weights.fill(1.0 / self.draws as f64);
        for mut row in rows.rows_mut() {
            for (slot, &own) in row.iter_mut().zip(x) {
                *slot = own;
            }
        }
        let missing_at: Vec<usize> = (0..present.len()).filter(|&j| !present[j]).collect();
        if missing_at.is_empty() {
            return;
        }
        let present_at: Vec<usize> = (0..present.len()).filter(|&j| present[j]).collect();
        let (mean, factor) = self.conditional(x, &present_at, &missing_at);

        // Antithetic pairs mean ± L z: the pair average is exactly the
        // conditional mean, so a linear model needs no more than one pair.
        let mut rng = coalition_rng(self.seed, coalition);
        let mut normal = DVector::<f64>::zeros(missing_at.len());
        let mut spread = DVector::<f64>::zeros(missing_at.len());
        let mut pairs = rows.rows_mut().into_iter();
        while let (Some(mut plus), Some(mut minus)) = (pairs.next(), pairs.next()) {
            for z in normal.iter_mut() {
                *z = StandardNormal.sample(&mut rng);
            }
            spread.gemv(1.0, &factor, &normal, 0.0);
            for (k, &j) in missing_at.iter().enumerate() {
                plus[j] = mean[k] + spread[k];
                minus[j] = mean[k] - spread[k];
            }
        }
    }
}

/// A factor `L` with `L Lᵀ = matrix` for a symmetric positive semi-definite
/// matrix: the Cholesky factor when it exists, else (rounding made the
/// matrix slightly indefinite) `V √max(Λ, 0)` from the eigendecomposition.
fn square_root_factor(matrix: DMatrix<f64>) -> DMatrix<f64> {
    match Cholesky::new(matrix.clone()) {
        Some(factor) => factor.l(),
        None => {
            let eigen = SymmetricEigen::new(matrix);
            let mut factor = eigen.eigenvectors;
            for (mut column, value) in factor.column_iter_mut().zip(eigen.eigenvalues.iter()) {
                column *= value.max(0.0).sqrt();
            }
            factor
        }
    }
}

/// `V Λ⁺ Vᵀ`, dropping eigenvalues too small to invert reliably.
fn symmetric_pseudo_inverse(matrix: DMatrix<f64>) -> DMatrix<f64> {
    let eigen = SymmetricEigen::new(matrix);
    let largest = eigen.eigenvalues.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let cutoff = largest * 1e-12;
    let inverted = eigen
        .eigenvalues
        .map(|v| if v > cutoff { 1.0 / v } else { 0.0 });
    &eigen.eigenvectors * DMatrix::from_diagonal(&inverted) * eigen.eigenvectors.transpose()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, array};

    #[test]
    fn a_duplicated_feature_still_factors_and_pins_its_twin() {
        // Column 1 equals column 0, so the covariance is singular. Given
        // feature 0, its exact copy has conditional mean x_0 and variance 0
        // (multivariate normal conditioning; any multivariate statistics
        // text). The ridge only moves this by about 1e-12 relative.
        let background = array![
            [1.0, 1.0, 5.0],
            [2.0, 2.0, 3.0],
            [4.0, 4.0, 4.0],
            [0.5, 0.5, 1.0]
        ];
        let removal = ConditionalGaussian::try_new(background.view(), 4, 3).unwrap();
        let x = array![3.0, 3.0, 2.0];
        let mut rows = Array2::zeros((4, 3));
        let mut weights = [0.0; 4];
        removal.fill(
            x.view(),
            &[true, false, false],
            Coalition::singleton(0),
            rows.view_mut(),
            &mut weights,
        );
        for row in rows.rows() {
            assert!(row.iter().all(|v| v.is_finite()));
            assert!((row[1] - 3.0).abs() < 1e-4, "{row}");
        }
        assert!(weights.iter().all(|w| *w == 0.25));
    }

    #[test]
    fn a_constant_feature_keeps_its_value_when_missing() {
        // A constant column has zero variance: every draw must equal it
        // (up to the ridge's 1e-12 relative spread). Common practice, no source.
        let background = array![[0.1, 1.0], [0.1, 2.0], [0.1, 4.0]];
        let removal = ConditionalGaussian::try_new(background.view(), 2, 1).unwrap();
        let x = array![7.0, 7.0];
        let mut rows = Array2::zeros((2, 2));
        let mut weights = [0.0; 2];
        removal.fill(
            x.view(),
            &[false, true],
            Coalition::singleton(1),
            rows.view_mut(),
            &mut weights,
        );
        for row in rows.rows() {
            assert!((row[0] - 0.1).abs() < 1e-5, "{row}");
        }
    }

    #[test]
    fn a_nan_instance_gives_nan_rows_without_panicking() {
        let background = array![[1.0, 2.0], [2.0, 1.0], [3.0, 5.0]];
        let removal = ConditionalGaussian::try_new(background.view(), 2, 1).unwrap();
        let x = array![f64::NAN, 1.0];
        let mut rows = Array2::zeros((2, 2));
        let mut weights = [0.0; 2];
        removal.fill(
            x.view(),
            &[true, false],
            Coalition::singleton(0),
            rows.view_mut(),
            &mut weights,
        );
        assert!(weights.iter().all(|w| *w == 0.5));
    }

    #[test]
    fn fallbacks_for_singular_matrices_meet_their_definitions() {
        // A rank-one matrix has no Cholesky factor; the eigen fallback must
        // still satisfy L Lᵀ = A, and the pseudo-inverse the Penrose
        // condition A A⁺ A = A ("A generalized inverse for matrices",
        // Proceedings of the Cambridge Philosophical Society 51, 1955).
        let singular =
            DMatrix::from_row_slice(3, 3, &[1.0, 2.0, 3.0, 2.0, 4.0, 6.0, 3.0, 6.0, 9.0]);
        assert!(Cholesky::new(singular.clone()).is_none());
        let factor = square_root_factor(singular.clone());
        assert!((&factor * factor.transpose() - &singular).abs().max() < 1e-12);
        let pseudo_inverse = symmetric_pseudo_inverse(singular.clone());
        assert!(
            (&singular * pseudo_inverse * &singular - &singular)
                .abs()
                .max()
                < 1e-12
        );
    }

    #[test]
    fn draws_must_be_even_and_the_background_large_enough() {
        let background = array![[1.0, 2.0], [2.0, 1.0]];
        for draws in [0, 1, 3] {
            let err = ConditionalGaussian::try_new(background.view(), draws, 0).unwrap_err();
            assert_eq!(err.field, "draws");
        }
        let one_row = array![[1.0, 2.0]];
        let err = ConditionalGaussian::try_new(one_row.view(), 2, 0).unwrap_err();
        assert_eq!(err.field, "background");
        let with_nan = array![[1.0, 2.0], [f64::NAN, 1.0]];
        let err = ConditionalGaussian::try_new(with_nan.view(), 2, 0).unwrap_err();
        assert!(err.field == "background" && err.message.contains("column 0"));
    }
}
