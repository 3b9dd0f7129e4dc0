//! FIXED removal: every missing feature takes one reference value, so a
//! coalition costs a single row. With no values given the reference is the
//! background mean of each feature.

use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2};

use super::Removal;
use super::marginal::{require_finite, require_rows};
use crate::engine::coalition::Coalition;
use crate::engine::error::{EngineError, Result};

#[derive(Debug, Clone, PartialEq)]
pub struct Fixed {
    values: Vec<f64>,
}

impl Fixed {
    /// `values[j]` replaces feature `j` whenever it is missing.
    pub fn try_new(values: Vec<f64>, features: usize) -> Result<Fixed> {
        if values.len() != features {
            return Err(EngineError::new(
                "fixed_values",
                format!("has {} values; the model takes {features}", values.len()),
            ));
        }
        if let Some(j) = values.iter().position(|v| !v.is_finite()) {
            return Err(EngineError::new(
                "fixed_values",
                format!("value {j} is not a finite number"),
            ));
        }
        Ok(Fixed { values })
    }

    /// The column means of `background` as the reference values.
    pub fn background_mean(background: ArrayView2<'_, f64>) -> Result<Fixed> {
        Ok(Fixed {
            values: background_mean(background)?,
        })
    }

    /// The reference row, one value per feature.
    pub fn values(&self) -> &[f64] {
        &self.values
    }
}

/// The mean of each background column: the reference FIXED removal uses when
/// no values are given, computed once per background. Refuses a background
/// without rows or with a missing or infinite value.
pub fn background_mean(background: ArrayView2<'_, f64>) -> Result<Vec<f64>> {
    require_rows(background, 1, "FIXED removal without fixed_values")?;
    require_finite(background)?;
    let rows = background.nrows() as f64;
    Ok(background
        .columns()
        .into_iter()
        .map(|column| column.sum() / rows)
        .collect())
}

impl Removal for Fixed {
    fn rows_per_coalition(&self) -> usize {
        1
    }

    fn fill(
        &self,
        x: ArrayView1<'_, f64>,
        present: &[bool],
        _coalition: Coalition,
        mut rows: ArrayViewMut2<'_, f64>,
        weights: &mut [f64],
    ) {
        debug_assert_eq!(rows.ncols(), self.values.len());
        for mut row in rows.rows_mut() {
            for (((slot, &own), &reference), &keep) in
                row.iter_mut().zip(x).zip(&self.values).zip(present)
            {
                *slot = if keep { own } else { reference };
            }
        }
        weights.fill(1.0);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, array};

    #[test]
    fn missing_features_take_the_reference_and_present_keep_x() {
        // Definition of FIXED removal (DESIGN.md); common practice, no source.
        let fixed = Fixed::try_new(vec![10.0, 20.0, 30.0], 3).unwrap();
        let x = array![1.0, 2.0, 3.0];
        let mut rows = Array2::zeros((1, 3));
        let mut weights = [0.0];
        fixed.fill(
            x.view(),
            &[true, false, true],
            Coalition::EMPTY,
            rows.view_mut(),
            &mut weights,
        );
        assert_eq!(rows.row(0).to_vec(), vec![1.0, 20.0, 3.0]);
        assert_eq!(weights, [1.0]);
    }

    #[test]
    fn background_mean_is_the_column_mean_and_refuses_nan() {
        // Column means computed by hand: (1+3)/2 = 2, (2+6)/2 = 4.
        let background = array![[1.0, 2.0], [3.0, 6.0]];
        let fixed = Fixed::background_mean(background.view()).unwrap();
        assert_eq!(fixed.values(), &[2.0, 4.0]);

        let with_nan = array![[1.0, f64::NAN], [3.0, 6.0]];
        let err = Fixed::background_mean(with_nan.view()).unwrap_err();
        assert_eq!(err.field, "background");
        assert!(err.message.contains("column 1"), "{}", err.message);

        let empty = Array2::<f64>::zeros((0, 2));
        assert_eq!(
            Fixed::background_mean(empty.view()).unwrap_err().field,
            "background"
        );
    }

    #[test]
    fn reference_values_must_match_the_features_and_be_finite() {
        assert_eq!(
            Fixed::try_new(vec![1.0], 2).unwrap_err().field,
            "fixed_values"
        );
        assert_eq!(
            Fixed::try_new(vec![1.0, f64::INFINITY], 2)
                .unwrap_err()
                .field,
            "fixed_values"
        );
    }
}
