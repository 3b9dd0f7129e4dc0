//! Arbitrary bytes as a RegisterModelRequest, converted into the stored
//! registration as the server converts it: a spec or a clear error.
#![no_main]

use apportion::registry::ModelSpec;
use apportion::service::proto::RegisterModelRequest;
use libfuzzer_sys::fuzz_target;
use prost::Message;

fuzz_target!(|bytes: &[u8]| {
    let Ok(request) = RegisterModelRequest::decode(bytes) else {
        return;
    };
    if let Err(error) = ModelSpec::try_from(request) {
        assert!(!error.to_string().trim().is_empty());
    }
});
