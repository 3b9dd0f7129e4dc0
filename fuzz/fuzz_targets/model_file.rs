//! Arbitrary bytes as the JSON model file `apportion register` reads, and
//! the request it builds converted as the server converts it.
#![no_main]

use std::path::PathBuf;
use std::sync::OnceLock;

use apportion::client;
use apportion::registry::ModelSpec;
use libfuzzer_sys::fuzz_target;

/// One file, rewritten per input (a model file names other files by path,
/// so it is read from disk as the CLI reads it).
fn path() -> &'static PathBuf {
    static DIR: OnceLock<tempfile::TempDir> = OnceLock::new();
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        DIR.get_or_init(|| tempfile::tempdir().expect("a temporary folder"))
            .path()
            .join("model.json")
    })
}

fuzz_target!(|bytes: &[u8]| {
    std::fs::write(path(), bytes).expect("the temporary file is writable");
    match client::registration(path(), None, None) {
        Ok(request) => {
            if let Err(error) = ModelSpec::try_from(request) {
                assert!(!error.to_string().trim().is_empty());
            }
        }
        Err(error) => assert!(!error.to_string().trim().is_empty()),
    }
});
