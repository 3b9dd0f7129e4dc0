//! Linear models: output = w · x + b, with an identity or logistic link.

use ndarray::ArrayView2;

use crate::engine::error::{EngineError, Result};
use crate::engine::model::{LinearForm, Link, Model, Structure};

#[derive(Debug, Clone, PartialEq)]
pub struct LinearModel {
    weights: Vec<f64>,
    intercept: f64,
    link: Link,
}

impl LinearModel {
    pub fn try_new(weights: Vec<f64>, intercept: f64, link: Link) -> Result<LinearModel> {
        if weights.is_empty() {
            return Err(EngineError::new(
                "linear.weights",
                "at least one weight is required",
            ));
        }
        if let Some(j) = weights.iter().position(|w| !w.is_finite()) {
            return Err(EngineError::new(
                "linear.weights",
                format!("weight {j} is not a finite number"),
            ));
        }
        if !intercept.is_finite() {
            return Err(EngineError::new(
                "linear.intercept",
                "must be a finite number",
            ));
        }
        Ok(LinearModel {
            weights,
            intercept,
            link,
        })
    }

    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    pub fn intercept(&self) -> f64 {
        self.intercept
    }

    /// The weights and intercept, as the closed form reads them.
    pub fn form(&self) -> LinearForm<'_> {
        LinearForm {
            weights: &self.weights,
            intercept: self.intercept,
        }
    }
}

impl Model for LinearModel {
    fn inputs(&self) -> usize {
        self.weights.len()
    }

    fn link(&self) -> Link {
        self.link
    }

    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        for (row, slot) in rows.rows().into_iter().zip(out.iter_mut()) {
            *slot = self.intercept
                + row
                    .iter()
                    .zip(&self.weights)
                    .map(|(x, w)| x * w)
                    .sum::<f64>();
        }
    }

    fn structure(&self) -> Structure<'_> {
        Structure::Linear(self.form())
    }

    fn kind(&self) -> &'static str {
        "linear"
    }
}
