//! Arbitrary bytes as an ONNX graph, read by the operator importer: a
//! native model, a reason to fall back to the graph runtime, or an error
//! naming a field, never a panic.
#![no_main]

use apportion::model::import::{self, OnnxChoice};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    let choice = OnnxChoice {
        output: "",
        column: 0,
        class_index: None,
        features: 0,
    };
    if let Err(error) = import::onnx_graph(bytes, choice) {
        assert!(
            !error.field.is_empty() && !error.message.trim().is_empty(),
            "{error:?}"
        );
    }
});
