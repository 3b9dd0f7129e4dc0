//! The interface the engine needs from a model: batched predictions of raw
//! outputs, the link to the probability scale, and — where a model-specific
//! exact algorithm exists — the structure that algorithm reads. Concrete
//! models live in [`crate::model`] and depend on this, never the reverse.

use ndarray::ArrayView2;

use super::trees::TreeEnsemble;

/// How a raw output maps to the probability scale.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Link {
    /// The output already is the prediction (regression, or a score).
    Identity,
    /// Probability = 1 / (1 + e^-output).
    Logistic,
}

impl Link {
    /// The prediction on the link's natural scale: the output itself for
    /// `Identity`, the probability for `Logistic`.
    pub fn apply(self, output: f64) -> f64 {
        match self {
            Link::Identity => output,
            Link::Logistic => logistic(output),
        }
    }
}

/// The logistic function, written to stay finite for large |t|.
pub fn logistic(t: f64) -> f64 {
    if t >= 0.0 {
        1.0 / (1.0 + (-t).exp())
    } else {
        let e = t.exp();
        e / (1.0 + e)
    }
}

/// What the engine may know of a model's inside, so the planner can pick a
/// model-specific exact algorithm.
#[derive(Debug, Clone, Copy)]
pub enum Structure<'a> {
    Linear(LinearForm<'a>),
    Trees(&'a TreeEnsemble),
    /// Only predictions are available.
    Opaque,
}

/// A model that can be explained.
pub trait Model: Send + Sync {
    /// Number of input features (columns of every row batch).
    fn inputs(&self) -> usize;

    fn link(&self) -> Link;

    /// Raw outputs of `rows` (shape `n × inputs()`) written to `out[..n]`.
    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]);

    /// Whether NaN inputs are meaningful (trees route them by their default
    /// direction); otherwise the engine refuses NaN instances.
    fn accepts_missing(&self) -> bool {
        false
    }

    fn structure(&self) -> Structure<'_> {
        Structure::Opaque
    }

    /// A short kind name for logs and the API (`linear`, `trees`, …).
    fn kind(&self) -> &'static str;
}

/// What the linear closed form reads: output = weights · x + intercept.
#[derive(Debug, Clone, Copy)]
pub struct LinearForm<'a> {
    pub weights: &'a [f64],
    pub intercept: f64,
}
