//! Arbitrary bytes as a model file of that library (the first class when it
//! has several): trees, or an error naming a field, never a panic.
#![no_main]

use apportion::model::import;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    if let Err(error) = import::xgboost_json(bytes, None) {
        assert!(
            !error.field.is_empty() && !error.message.trim().is_empty(),
            "{error:?}"
        );
    }
});
