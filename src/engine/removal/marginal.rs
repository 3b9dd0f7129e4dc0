//! MARGINAL (interventional) removal: missing features are filled from each
//! background row in turn, so a coalition value averages the model over the
//! background with the present features held at the instance.

use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2};

use super::Removal;
use crate::engine::coalition::Coalition;
use crate::engine::error::{EngineError, Result};

/// Background rows may hold NaN here: tree models route it by their missing
/// direction, and the front door refuses it for models that cannot.
#[derive(Debug, Clone)]
pub struct Marginal<'a> {
    background: ArrayView2<'a, f64>,
}

impl<'a> Marginal<'a> {
    pub fn try_new(background: ArrayView2<'a, f64>) -> Result<Marginal<'a>> {
        require_rows(background, 1, "MARGINAL removal")?;
        Ok(Marginal { background })
    }
}

impl Removal for Marginal<'_> {
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
        weights.fill(1.0 / self.background.nrows() as f64);
    }
}

/// Writes each source row into `rows` with the present features replaced by
/// `x`. Shared by the removals whose rows are background rows.
pub(super) fn fill_from_rows(
    source: ArrayView2<'_, f64>,
    x: ArrayView1<'_, f64>,
    present: &[bool],
    rows: &mut ArrayViewMut2<'_, f64>,
) {
    debug_assert_eq!(rows.dim(), source.dim());
    for (mut row, reference) in rows.rows_mut().into_iter().zip(source.rows()) {
        for (((slot, &own), &other), &keep) in row.iter_mut().zip(x).zip(reference).zip(present) {
            *slot = if keep { own } else { other };
        }
    }
}

/// Refuses a background with fewer than `rows` rows or no columns.
pub(super) fn require_rows(
    background: ArrayView2<'_, f64>,
    rows: usize,
    needed_by: &str,
) -> Result<()> {
    if background.nrows() < rows || background.ncols() == 0 {
        return Err(EngineError::new(
            "background",
            format!(
                "{needed_by} needs at least {rows} background row(s) with at least one column; got {} × {}",
                background.nrows(),
                background.ncols()
            ),
        ));
    }
    Ok(())
}

/// Refuses a background with a NaN or infinite value, naming the first
/// column that has one.
pub(super) fn require_finite(background: ArrayView2<'_, f64>) -> Result<()> {
    for (j, column) in background.columns().into_iter().enumerate() {
        if let Some(i) = column.iter().position(|v| !v.is_finite()) {
            return Err(EngineError::new(
                "background",
                format!(
                    "column {j} has a missing or infinite value (row {i}); this removal needs finite background values"
                ),
            ));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, array};

    #[test]
    fn each_background_row_fills_the_missing_features_with_equal_weight() {
        // Interventional removal as defined in "A unified approach to
        // interpreting model predictions", NeurIPS 2017: x on the present
        // features, one background row elsewhere, uniform weights.
        let background = array![[10.0, 20.0, 30.0], [40.0, 50.0, 60.0]];
        let marginal = Marginal::try_new(background.view()).unwrap();
        let x = array![1.0, 2.0, 3.0];
        let mut rows = Array2::zeros((2, 3));
        let mut weights = [0.0; 2];
        marginal.fill(
            x.view(),
            &[false, true, false],
            Coalition::singleton(1),
            rows.view_mut(),
            &mut weights,
        );
        assert_eq!(rows, array![[10.0, 2.0, 30.0], [40.0, 2.0, 60.0]]);
        assert_eq!(weights, [0.5, 0.5]);
    }

    #[test]
    fn an_empty_background_is_refused() {
        let empty = Array2::<f64>::zeros((0, 3));
        assert_eq!(
            Marginal::try_new(empty.view()).unwrap_err().field,
            "background"
        );
    }
}
