//! Which model behaviour a coalition value measures.
//!
//! Removal averages in the space the target names: OUTPUT averages raw
//! outputs, PROBABILITY averages probabilities, LOSS applies the loss to the
//! averaged prediction (probability under a logistic link, output otherwise).
//! Log loss uses the natural logarithm; squared error is `(y - ŷ)²`.

use ndarray::Array2;

use super::error::{EngineError, Result};
use super::model::Link;

#[derive(Debug, Clone, PartialEq)]
pub enum Target {
    /// The raw model output (margin).
    Output,
    /// The probability from a logistic link.
    Probability,
    /// The loss of this one prediction against `label`.
    Loss { label: f64 },
    /// Loss reduction over a labelled data set: `v(S) = loss(∅) - loss(S)`,
    /// each loss the mean over the rows, so a useful feature scores positive.
    DatasetLoss { rows: Array2<f64>, labels: Vec<f64> },
}

impl Target {
    /// For DATASET_LOSS, that the data set has at least one row of `inputs`
    /// columns and one label per row; other targets carry no data set.
    pub fn check_dataset(&self, inputs: usize) -> Result<()> {
        let Target::DatasetLoss { rows, labels } = self else {
            return Ok(());
        };
        if rows.ncols() != inputs || rows.nrows() == 0 {
            return Err(EngineError::new(
                "dataset",
                format!(
                    "needs at least one row of {inputs} columns, got {} × {}",
                    rows.nrows(),
                    rows.ncols()
                ),
            ));
        }
        if labels.len() != rows.nrows() {
            return Err(EngineError::new(
                "dataset.labels",
                format!("{} labels for {} rows", labels.len(), rows.nrows()),
            ));
        }
        Ok(())
    }

    pub fn name(&self) -> &'static str {
        match self {
            Target::Output => "OUTPUT",
            Target::Probability => "PROBABILITY",
            Target::Loss { .. } => "LOSS",
            Target::DatasetLoss { .. } => "DATASET_LOSS",
        }
    }
}

/// The scale on which filled rows are averaged before a coalition value is
/// read off.
pub(crate) fn averaging_scale(target: &Target, link: Link) -> Link {
    match target {
        Target::Output => Link::Identity,
        Target::Probability => Link::Logistic,
        Target::Loss { .. } | Target::DatasetLoss { .. } => link,
    }
}

/// Loss of an averaged prediction: log loss for probabilities (clamped away
/// from 0 and 1 so a confident miss is large but finite), squared error
/// otherwise.
pub fn loss(link: Link, label: f64, prediction: f64) -> f64 {
    match link {
        Link::Identity => (label - prediction).powi(2),
        Link::Logistic => {
            let p = prediction.clamp(1e-15, 1.0 - 1e-15);
            -(label * p.ln() + (1.0 - label) * (1.0 - p).ln())
        }
    }
}

/// The derivative of [`loss`] in the prediction, for the delta-method
/// variance of a loss of averaged random draws (any text on the delta
/// method; the clamp of [`loss`] is applied first, as there).
pub fn loss_slope(link: Link, label: f64, prediction: f64) -> f64 {
    match link {
        Link::Identity => -2.0 * (label - prediction),
        Link::Logistic => {
            let p = prediction.clamp(1e-15, 1.0 - 1e-15);
            -label / p + (1.0 - label) / (1.0 - p)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn losses_match_their_textbook_definitions() {
        // Log loss with the natural logarithm: -ln(0.8) for a positive at 0.8
        // (common practice, no source).
        assert!((loss(Link::Logistic, 1.0, 0.8) - 0.8f64.ln().abs()).abs() < 1e-15);
        assert!((loss(Link::Logistic, 0.0, 0.8) - 0.2f64.ln().abs()).abs() < 1e-15);
        assert_eq!(loss(Link::Identity, 3.0, 1.0), 4.0);
    }

    #[test]
    fn loss_slopes_match_central_differences() {
        // The derivative against a central difference of the loss itself
        // (common practice, no source).
        for (link, label, p) in [
            (Link::Logistic, 1.0, 0.8),
            (Link::Logistic, 0.0, 0.3),
            (Link::Identity, 3.0, 1.0),
        ] {
            let h = 1e-6;
            let numeric = (loss(link, label, p + h) - loss(link, label, p - h)) / (2.0 * h);
            assert!(
                (loss_slope(link, label, p) - numeric).abs() < 1e-6,
                "{link:?}"
            );
        }
    }
}
