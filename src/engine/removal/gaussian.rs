//! CONDITIONAL_GAUSSIAN removal: the background is summarised once by a
//! multivariate normal ([`GaussianFit`]), and each request draws missing
//! features from its conditional distribution given the present ones, in
//! antithetic pairs.

use nalgebra::{Cholesky, DMatrix, DVector, SymmetricEigen};
use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2};
use rand_distr::{Distribution, StandardNormal};

use super::independent::coalition_rng;
use super::marginal::{require_finite, require_rows};
use super::{Noise, Removal};
use crate::engine::coalition::Coalition;
use crate::engine::error::{EngineError, Result};

/// Ridge added to the diagonal of the correlation matrix (whose diagonal is
/// 1): enough for a singular covariance (duplicated features) to factor,
/// small enough not to move conditional means visibly. Added in correlation
/// space it is relative to each feature's own variance, so a feature in
/// currency units cannot swamp one measured as a ratio.
const RIDGE: f64 = 1e-12;

/// The mean and sample covariance (denominator n − 1) of a background,
/// with the factors conditioning needs, computed once per background.
///
/// The covariance is kept as per-feature standard deviations and a
/// correlation matrix, and conditioning is done on the correlations:
/// factoring the covariance itself when feature variances differ by 10^12
/// loses the small ones to rounding, and a common ridge would exceed them.
/// A constant feature (standard deviation 0) is uncorrelated with the rest
/// and, when missing, keeps its background value exactly.
#[derive(Debug, Clone)]
pub struct GaussianFit {
    mean: DVector<f64>,
    /// Standard deviation of each feature; 0 for a constant one.
    scale: DVector<f64>,
    /// Correlation matrix plus [`RIDGE`] on the diagonal.
    correlation: DMatrix<f64>,
    /// Square-root factor of `correlation`, for the empty coalition.
    marginal_factor: DMatrix<f64>,
}

impl GaussianFit {
    /// Fits `background`, which needs at least two rows and only finite
    /// values.
    pub fn try_new(background: ArrayView2<'_, f64>) -> Result<GaussianFit> {
        require_rows(
            background,
            2,
            "CONDITIONAL_GAUSSIAN removal (to estimate a covariance)",
        )?;
        require_finite(background)?;
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

        let scale = DVector::from_fn(features, |j, _| covariance[(j, j)].sqrt());
        let correlation = DMatrix::from_fn(features, features, |i, k| {
            if i == k {
                1.0 + RIDGE
            } else if scale[i] > 0.0 && scale[k] > 0.0 {
                covariance[(i, k)] / (scale[i] * scale[k])
            } else {
                0.0
            }
        });
        let marginal_factor = square_root_factor(correlation.clone());
        Ok(GaussianFit {
            mean,
            scale,
            correlation,
            marginal_factor,
        })
    }

    /// Features of the fitted distribution.
    fn features(&self) -> usize {
        self.mean.len()
    }

    /// `x` on the present features and `E[x_M | x_P]` on the missing ones,
    /// by the same code the removal's draws are centred on. `x` and
    /// `present` must have one entry per feature (it panics otherwise).
    pub fn conditional_mean(&self, x: &[f64], present: &[bool]) -> Vec<f64> {
        assert_eq!(x.len(), self.features(), "one value per feature");
        assert_eq!(present.len(), self.features(), "one flag per feature");
        let (present_at, missing_at) = split(present);
        let mut full = x.to_vec();
        if missing_at.is_empty() {
            return full;
        }
        let (mean, _) = self.condition(|j| x[j], &present_at, &missing_at, false);
        for (k, &j) in missing_at.iter().enumerate() {
            full[j] = mean[k];
        }
        full
    }

    /// Mean of the missing features given the present ones and, when
    /// `with_factor`, a square-root factor `L` of their conditional
    /// covariance in standardised units (the draw is `mean + σ_M ∘ (L z)`):
    /// `μ_M + Σ_MP Σ_PP⁻¹ (x_P − μ_P)` and `Σ_MM − Σ_MP Σ_PP⁻¹ Σ_PM`
    /// ("Explaining individual predictions when features are dependent:
    /// more accurate approximations to Shapley values", Artificial
    /// Intelligence 298, 2021), evaluated as `Σ = D R D` with `D` the
    /// standard deviations and `R` the correlations, so only `R_PP` is
    /// factored.
    fn condition(
        &self,
        x: impl Fn(usize) -> f64,
        present_at: &[usize],
        missing_at: &[usize],
        with_factor: bool,
    ) -> (DVector<f64>, Option<DMatrix<f64>>) {
        let mut mean =
            DVector::from_iterator(missing_at.len(), missing_at.iter().map(|&j| self.mean[j]));
        if present_at.is_empty() {
            // Every feature is missing: the unconditional distribution.
            return (mean, with_factor.then(|| self.marginal_factor.clone()));
        }
        let rows_present = self.correlation.select_rows(present_at);
        let present_present = rows_present.select_columns(present_at);
        let present_missing = rows_present.select_columns(missing_at);
        // A constant present feature is uncorrelated with everything, so its
        // standardised offset is irrelevant: 0 rather than (x − μ) / 0.
        let standardised = DVector::from_iterator(
            present_at.len(),
            present_at.iter().map(|&j| {
                if self.scale[j] > 0.0 {
                    (x(j) - self.mean[j]) / self.scale[j]
                } else {
                    0.0
                }
            }),
        );
        let solver = Solver::new(present_present);
        let shift = present_missing.tr_mul(&solver.solve(&standardised));
        for (k, &j) in missing_at.iter().enumerate() {
            mean[k] += self.scale[j] * shift[k];
        }
        let factor = with_factor.then(|| {
            let gain = solver.solve_matrix(&present_missing);
            let missing_missing = self
                .correlation
                .select_rows(missing_at)
                .select_columns(missing_at);
            let mut covariance = missing_missing - present_missing.tr_mul(&gain);
            let transposed = covariance.transpose();
            covariance = (covariance + transposed) * 0.5;
            square_root_factor(covariance)
        });
        (mean, factor)
    }
}

/// Positions of the present and of the missing features.
fn split(present: &[bool]) -> (Vec<usize>, Vec<usize>) {
    (0..present.len()).partition(|&j| present[j])
}

/// Solves with a symmetric positive semi-definite matrix: by Cholesky when
/// it factors, else (a singular block the ridge could not rescue) by the
/// pseudo-inverse.
enum Solver {
    Cholesky(Cholesky<f64, nalgebra::Dyn>),
    PseudoInverse(DMatrix<f64>),
}

impl Solver {
    fn new(matrix: DMatrix<f64>) -> Solver {
        match Cholesky::new(matrix.clone()) {
            Some(factor) => Solver::Cholesky(factor),
            None => Solver::PseudoInverse(symmetric_pseudo_inverse(matrix)),
        }
    }

    fn solve(&self, vector: &DVector<f64>) -> DVector<f64> {
        match self {
            Solver::Cholesky(factor) => factor.solve(vector),
            Solver::PseudoInverse(inverse) => inverse * vector,
        }
    }

    fn solve_matrix(&self, matrix: &DMatrix<f64>) -> DMatrix<f64> {
        match self {
            Solver::Cholesky(factor) => factor.solve(matrix),
            Solver::PseudoInverse(inverse) => inverse * matrix,
        }
    }
}

/// Draws from a [`GaussianFit`] for one request: `draws` rows per coalition
/// (an even number, in antithetic pairs), all fixed by `seed`.
///
/// Requires a NaN-free instance (the front door checks it); a NaN on a
/// present feature yields NaN rows, never a panic.
#[derive(Debug, Clone)]
pub struct ConditionalGaussian<'a> {
    fit: &'a GaussianFit,
    draws: usize,
    seed: u64,
}

impl<'a> ConditionalGaussian<'a> {
    pub fn try_new(
        fit: &'a GaussianFit,
        draws: usize,
        seed: u64,
    ) -> Result<ConditionalGaussian<'a>> {
        if draws < 2 || !draws.is_multiple_of(2) {
            return Err(EngineError::new(
                "draws",
                format!(
                    "must be an even number of at least 2 (draws come in antithetic pairs); got {draws}"
                ),
            ));
        }
        Ok(ConditionalGaussian { fit, draws, seed })
    }
}

impl Removal for ConditionalGaussian<'_> {
    fn rows_per_coalition(&self) -> usize {
        self.draws
    }

    fn noise(&self) -> Noise {
        Noise::AntitheticPairs
    }

    fn fill(
        &self,
        x: ArrayView1<'_, f64>,
        present: &[bool],
        coalition: Coalition,
        mut rows: ArrayViewMut2<'_, f64>,
        weights: &mut [f64],
    ) {
        let fit = self.fit;
        debug_assert_eq!(rows.ncols(), fit.features());
        weights.fill(1.0 / self.draws as f64);
        for mut row in rows.rows_mut() {
            for (slot, &own) in row.iter_mut().zip(x) {
                *slot = own;
            }
        }
        let (present_at, missing_at) = split(present);
        if missing_at.is_empty() {
            return;
        }
        let (mean, factor) = fit.condition(|j| x[j], &present_at, &missing_at, true);
        let factor = factor.expect("asked for the factor");

        // Antithetic pairs mean ± σ ∘ (L z): the pair average is exactly the
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
                let step = fit.scale[j] * spread[k];
                plus[j] = mean[k] + step;
                minus[j] = mean[k] - step;
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
        // text). The ridge only moves this by about 1e-12 relative, in
        // standard deviations of the feature.
        let background = array![
            [1.0, 1.0, 5.0],
            [2.0, 2.0, 3.0],
            [4.0, 4.0, 4.0],
            [0.5, 0.5, 1.0]
        ];
        let fit = GaussianFit::try_new(background.view()).unwrap();
        let removal = ConditionalGaussian::try_new(&fit, 4, 3).unwrap();
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
        // exactly, however far the present feature is from its mean (a
        // degenerate normal; common practice, no source).
        let background = array![[0.1, 1.0], [0.1, 2.0], [0.1, 4.0]];
        let fit = GaussianFit::try_new(background.view()).unwrap();
        let removal = ConditionalGaussian::try_new(&fit, 2, 1).unwrap();
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
            assert_eq!(row[0], 0.1, "{row}");
        }
    }

    #[test]
    fn a_nan_instance_gives_nan_rows_without_panicking() {
        let background = array![[1.0, 2.0], [2.0, 1.0], [3.0, 5.0]];
        let fit = GaussianFit::try_new(background.view()).unwrap();
        let removal = ConditionalGaussian::try_new(&fit, 2, 1).unwrap();
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
        let fit = GaussianFit::try_new(background.view()).unwrap();
        for draws in [0, 1, 3] {
            let err = ConditionalGaussian::try_new(&fit, draws, 0).unwrap_err();
            assert_eq!(err.field, "draws");
        }
        let one_row = array![[1.0, 2.0]];
        let err = GaussianFit::try_new(one_row.view()).unwrap_err();
        assert_eq!(err.field, "background");
        let with_nan = array![[1.0, 2.0], [f64::NAN, 1.0]];
        let err = GaussianFit::try_new(with_nan.view()).unwrap_err();
        assert!(err.field == "background" && err.message.contains("column 0"));
    }
}
