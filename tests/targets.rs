//! Coalition values of each target through `ModelGame`, against a direct
//! computation from the definitions in shared/DESIGN.md ("Conventions"):
//! removal averages in the target's space and losses apply to the averaged
//! prediction. The definitions are common practice, no source; the check is
//! that the engine's batched path computes exactly them.

use apportion::engine::estimate::exact;
use apportion::engine::removal::Marginal;
use apportion::engine::{CachedGame, Coalition, Game, ModelGame, Players, Summary, Target};
use apportion::model::{LinearModel, Link, Model, logistic};
use ndarray::{Array2, array};

fn background() -> Array2<f64> {
    array![
        [0.0, 1.0, -1.0],
        [2.0, -1.0, 0.5],
        [1.0, 0.0, 3.0],
        [-2.0, 2.0, 1.0]
    ]
}

/// v(S) by hand: each background row with the instance's values on S.
fn outputs_under(model: &LinearModel, x: &[f64], coalition: Coalition) -> Vec<f64> {
    background()
        .rows()
        .into_iter()
        .map(|z| {
            let row: Vec<f64> = (0..3)
                .map(|j| if coalition.contains(j) { x[j] } else { z[j] })
                .collect();
            let mut out = [0.0];
            model.predict(
                Array2::from_shape_vec((1, 3), row).unwrap().view(),
                &mut out,
            );
            out[0]
        })
        .collect()
}

fn mean(values: impl Iterator<Item = f64>) -> f64 {
    let v: Vec<f64> = values.collect();
    v.iter().sum::<f64>() / v.len() as f64
}

fn values_of(model: &LinearModel, x: &[f64], target: &Target) -> Vec<f64> {
    let bg = background();
    let removal = Marginal::try_new(bg.view()).unwrap();
    let players = Players::singletons(3);
    let game = ModelGame::try_new(model, &removal, &players, x, target).unwrap();
    let coalitions: Vec<Coalition> = (0..8).map(Coalition::from_bits).collect();
    let mut out = vec![0.0; 8];
    game.values(&coalitions, &mut out);
    assert_eq!(
        game.model_rows(),
        8 * 4,
        "one model row per background row per coalition"
    );
    out
}

#[test]
fn probability_averages_probabilities_and_loss_applies_to_the_average() {
    let model = LinearModel::try_new(vec![0.8, -1.5, 0.3], 0.2, Link::Logistic).unwrap();
    let x = [1.5, -0.5, 2.0];
    let probability = values_of(&model, &x, &Target::Probability);
    let output = values_of(&model, &x, &Target::Output);
    let loss = values_of(&model, &x, &Target::Loss { label: 1.0 });
    for bits in 0..8 {
        let outs = outputs_under(&model, &x, Coalition::from_bits(bits));
        let p = mean(outs.iter().map(|o| logistic(*o)));
        assert!((probability[bits as usize] - p).abs() < 1e-15);
        assert!((output[bits as usize] - mean(outs.iter().copied())).abs() < 1e-14);
        // Log loss with the natural logarithm, on the averaged probability.
        assert!((loss[bits as usize] + p.ln()).abs() < 1e-14);
    }
}

#[test]
fn squared_error_has_no_half_factor() {
    let model = LinearModel::try_new(vec![1.0, 2.0, -1.0], 0.5, Link::Identity).unwrap();
    let x = [0.5, 1.0, -2.0];
    let loss = values_of(&model, &x, &Target::Loss { label: 3.0 });
    for bits in 0..8 {
        let prediction = mean(outputs_under(&model, &x, Coalition::from_bits(bits)).into_iter());
        assert!((loss[bits as usize] - (3.0 - prediction).powi(2)).abs() < 1e-12);
    }
}

/// DATASET_LOSS reports loss reduction: zero for the empty coalition,
/// positive leave-one-out for the feature the labels depend on, zero for a
/// feature with zero weight.
#[test]
fn dataset_loss_is_a_loss_reduction() {
    let model = LinearModel::try_new(vec![2.0, 0.0, 0.0], 0.0, Link::Identity).unwrap();
    let rows = array![[1.0, 5.0, 0.0], [-1.0, 2.0, 1.0], [0.5, -3.0, 2.0]];
    let labels: Vec<f64> = rows.column(0).iter().map(|x| 2.0 * x).collect();
    let target = Target::DatasetLoss {
        rows: rows.clone(),
        labels: labels.clone(),
    };
    let bg = background();
    let removal = Marginal::try_new(bg.view()).unwrap();
    let players = Players::singletons(3);
    let game = ModelGame::try_new(&model, &removal, &players, &[], &target).unwrap();
    let cached = CachedGame::new(&game);
    assert_eq!(cached.value(Coalition::EMPTY), 0.0);
    // With feature 0 present the model is exact on every row, so the value
    // is the whole mean squared error of the empty coalition.
    let background_mean_prediction = 2.0 * mean(bg.column(0).iter().copied());
    let empty_loss = mean(
        labels
            .iter()
            .map(|y| (y - background_mean_prediction).powi(2)),
    );
    assert!((cached.value(Coalition::full(3)) - empty_loss).abs() < 1e-12);
    let loo = exact::explain(&cached, Summary::LeaveOneOut)
        .unwrap()
        .values;
    assert!(loo[0] > 0.0 && loo[1] == 0.0 && loo[2] == 0.0, "{loo:?}");
}

#[test]
fn mismatched_instances_are_refused_with_the_field() {
    let model = LinearModel::try_new(vec![1.0, 2.0, -1.0], 0.5, Link::Identity).unwrap();
    let bg = background();
    let removal = Marginal::try_new(bg.view()).unwrap();
    let players = Players::singletons(3);
    let err = ModelGame::try_new(&model, &removal, &players, &[1.0], &Target::Output)
        .err()
        .unwrap();
    assert_eq!(err.field, "instance");
}
