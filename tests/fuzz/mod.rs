//! Fuzz targets on stable Rust (proptest): random mutations of the committed corpus
//! (`tests/fuzz/corpus/formula`, `tests/fuzz/corpus/request`) through the formula
//! compiler and the request-reading job functions, plus regression tests for what the
//! fuzzers (these and `tests/fuzz/schema.sh`) found.
//!
//! Bounded in CI by proptest's case count (`PROPTEST_CASES`, 256 by default); a long
//! run sets `TACIT_FUZZ_CASES`, e.g.
//! `TACIT_FUZZ_CASES=200000 cargo test --release --locked --test main fuzz:: -- --nocapture`.

mod formula;
mod regressions;
mod request;

use proptest::test_runner::Config;
use std::path::PathBuf;

/// The corpus files of one kind, sorted by name, as text.
fn corpus(kind: &str) -> Vec<(String, String)> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fuzz/corpus")
        .join(kind);
    let mut files: Vec<_> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    let out: Vec<_> = files
        .into_iter()
        .map(|p| {
            let name = p.file_name().unwrap().to_string_lossy().into_owned();
            (name, std::fs::read_to_string(&p).unwrap())
        })
        .collect();
    assert!(!out.is_empty(), "no corpus in {}", dir.display());
    out
}

/// Proptest's configuration with `TACIT_FUZZ_CASES` cases when set (the long run), else
/// proptest's own default (`PROPTEST_CASES`, or 256).
fn config() -> Config {
    let mut c = Config::default();
    if let Some(n) = std::env::var("TACIT_FUZZ_CASES")
        .ok()
        .and_then(|s| s.parse().ok())
    {
        c.cases = n;
    }
    c
}
