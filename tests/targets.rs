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

/// Global importance against `sklearn.inspection.permutation_importance`
/// (scikit-learn, its bundled diabetes set, a LinearRegression; fixture made
/// by `tests/fixtures/make_fixtures.py`). Permutation importance estimates
/// the quantity of "Random forests" (Machine Learning 45(1), 2001):
/// mean over rows i and replacement rows k of the loss with x_ij replaced
/// by x_kj, less the loss of the model. DATASET_LOSS + LEAVE_ONE_OUT +
/// MARGINAL over the same rows applies the loss to the *averaged*
/// prediction instead (the convention in shared/DESIGN.md), so for a linear
/// model and squared error the two differ by exactly the Jensen gap
/// w_j² Var(x_j) (population variance). With it added back they must agree
/// within four std errors of the permutation estimate.
#[test]
fn dataset_loss_leave_one_out_matches_permutation_importance() {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/permutation_importance.json"
    );
    let fixture: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let numbers = |key: &str| -> Vec<f64> { serde_json::from_value(fixture[key].clone()).unwrap() };
    let weights = numbers("weights");
    let labels = numbers("labels");
    let rows: Vec<Vec<f64>> = serde_json::from_value(fixture["rows"].clone()).unwrap();
    let p = weights.len();
    let data = Array2::from_shape_fn((rows.len(), p), |(i, j)| rows[i][j]);
    let model = LinearModel::try_new(
        weights.clone(),
        fixture["intercept"].as_f64().unwrap(),
        Link::Identity,
    )
    .unwrap();
    let target = Target::DatasetLoss {
        rows: data.clone(),
        labels,
    };
    let removal = Marginal::try_new(data.view()).unwrap();
    let players = Players::singletons(p);
    let game = ModelGame::try_new(&model, &removal, &players, &[], &target).unwrap();
    let loo = exact::explain(&CachedGame::new(&game), Summary::LeaveOneOut)
        .unwrap()
        .values;

    let expected = numbers("importance_mean");
    let std_errors = numbers("importance_std_error");
    for j in 0..p {
        let column = data.column(j);
        let mean_j = mean(column.iter().copied());
        let variance = mean(column.iter().map(|x| (x - mean_j).powi(2)));
        let permutation_quantity = loo[j] + weights[j].powi(2) * variance;
        assert!(
            (permutation_quantity - expected[j]).abs() <= 4.0 * std_errors[j],
            "feature {j}: {permutation_quantity} vs {} ± {}",
            expected[j],
            std_errors[j]
        );
    }
}
