//! Arbitrary bytes as an ExplainRequest, converted as the server converts
//! it and validated and planned against a registered model: an error naming
//! a field, or a job, never a panic. The job is not run (its cost is what
//! the planner bounds; the samplers have their own tests).
#![no_main]

use std::sync::{Arc, OnceLock};
use std::time::Duration;

use apportion::engine::players::Players;
use apportion::engine::prepared::PreparedModel;
use apportion::model::{LinearModel, Link};
use apportion::service::convert;
use apportion::service::proto::ExplainRequest;
use libfuzzer_sys::fuzz_target;
use prost::Message;

/// A four-feature logistic model over eight background rows.
fn model() -> &'static Arc<PreparedModel> {
    static MODEL: OnceLock<Arc<PreparedModel>> = OnceLock::new();
    MODEL.get_or_init(|| {
        let linear = LinearModel::try_new(vec![0.5, -1.0, 2.0, 0.25], 0.1, Link::Logistic)
            .expect("a valid model");
        let background = ndarray::Array2::from_shape_fn((8, 4), |(i, j)| (i * 4 + j) as f64 / 7.0);
        Arc::new(
            PreparedModel::try_new(Arc::new(linear), Players::singletons(4), background, 50.0)
                .expect("a valid background"),
        )
    })
}

fuzz_target!(|bytes: &[u8]| {
    let Ok(request) = ExplainRequest::decode(bytes) else {
        return;
    };
    match convert::explain_request(&request, Duration::from_millis(20)) {
        Ok(engine) => {
            if let Err(error) = apportion::engine::prepare(model(), engine) {
                assert!(
                    !error.field.is_empty() && !error.message.is_empty(),
                    "{error:?}"
                );
            }
        }
        Err(error) => assert!(!error.to_string().is_empty()),
    }
});
