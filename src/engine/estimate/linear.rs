//! The closed form for a linear model under MARGINAL or FIXED removal with
//! the OUTPUT target: no coalition is evaluated, the attribution is read off
//! the weights.

use super::Estimate;
use crate::engine::error::{EngineError, Result};
use crate::engine::model::LinearForm;
use crate::engine::players::Players;

/// Closed form for a linear model under marginal (or fixed) removal with the
/// OUTPUT target: `phi_player = Σ_{j ∈ player} w_j (x_j − reference_j)`,
/// where `reference` is the background mean (marginal) or the fixed values.
/// The game is additive, so Shapley, Banzhaf, leave-one-out and include-one
/// all equal this ("A unified approach to interpreting model predictions",
/// NeurIPS 2017). `value_full = w·x + b` and `value_empty = w·reference + b`,
/// both raw outputs whatever the model's link.
pub fn explain(
    model: LinearForm<'_>,
    players: &Players,
    instance: &[f64],
    reference: &[f64],
) -> Result<Estimate> {
    let weights = model.weights;
    let features = weights.len();
    if players.features() != features {
        return Err(EngineError::new(
            "features",
            format!(
                "{} features described for a model with {features} inputs",
                players.features()
            ),
        ));
    }
    if instance.len() != features {
        return Err(EngineError::new(
            "instance",
            format!("has {} values; the model takes {features}", instance.len()),
        ));
    }
    if let Some(j) = instance.iter().position(|v| !v.is_finite()) {
        return Err(EngineError::new(
            "instance",
            format!("value {j} is missing or infinite; a linear model needs every value"),
        ));
    }
    if reference.len() != features || reference.iter().any(|v| !v.is_finite()) {
        return Err(EngineError::new(
            "background",
            format!("the reference row must hold {features} finite values"),
        ));
    }
    let values = (0..players.len())
        .map(|player| {
            players
                .members(player)
                .iter()
                .map(|&j| weights[j] * (instance[j] - reference[j]))
                .sum()
        })
        .collect();
    let output =
        |row: &[f64]| model.intercept + row.iter().zip(weights).map(|(x, w)| x * w).sum::<f64>();
    Ok(Estimate::exact(values, output(instance), output(reference)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grouped_weights_add_up_within_the_group() {
        // Additivity of the linear game: a group's share is the sum of its
        // features' shares ("A unified approach to interpreting model
        // predictions", NeurIPS 2017). Hand arithmetic:
        // a: 2·(1−0) = 2; g = {b, c}: −1·(3−1) + 0.5·(4−2) = −1.
        let model = LinearForm {
            weights: &[2.0, -1.0, 0.5],
            intercept: 0.25,
        };
        let names: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
        let groups: Vec<String> = ["", "g", "g"].iter().map(|s| s.to_string()).collect();
        let players = Players::try_new(&names, &groups).unwrap();
        let estimate = explain(model, &players, &[1.0, 3.0, 4.0], &[0.0, 1.0, 2.0]).unwrap();
        assert_eq!(estimate.values, vec![2.0, -1.0]);
        assert_eq!(estimate.value_full, 0.25 + 2.0 - 3.0 + 2.0);
        assert_eq!(estimate.value_empty, 0.25 - 1.0 + 1.0);
        assert_eq!(estimate.efficiency_gap(), 0.0);
        assert!(estimate.converged && estimate.std_errors == vec![0.0, 0.0]);
    }

    #[test]
    fn mismatched_lengths_name_their_field() {
        let model = LinearForm {
            weights: &[1.0, 1.0],
            intercept: 0.0,
        };
        let players = Players::singletons(2);
        let three = Players::singletons(3);
        assert_eq!(
            explain(model, &three, &[0.0, 0.0], &[0.0, 0.0])
                .unwrap_err()
                .field,
            "features"
        );
        assert_eq!(
            explain(model, &players, &[0.0], &[0.0, 0.0])
                .unwrap_err()
                .field,
            "instance"
        );
        assert_eq!(
            explain(model, &players, &[f64::NAN, 0.0], &[0.0, 0.0])
                .unwrap_err()
                .field,
            "instance"
        );
        assert_eq!(
            explain(model, &players, &[0.0, 0.0], &[0.0])
                .unwrap_err()
                .field,
            "background"
        );
    }
}
