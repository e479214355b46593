//! The OpenAPI file, compiled into the binary as YAML (the form people edit and review)
//! and converted to JSON once, on first use, for `/openapi.json`.

use std::sync::OnceLock;

/// The contract as written in `openapi/openapi.yaml`.
pub const OPENAPI_YAML: &str = include_str!("../../openapi/openapi.yaml");

/// The contract as JSON bytes, converted once per process.
pub fn openapi_json() -> Result<&'static [u8], String> {
    static JSON: OnceLock<Result<Vec<u8>, String>> = OnceLock::new();
    JSON.get_or_init(|| {
        let value: serde_json::Value =
            serde_norway::from_str(OPENAPI_YAML).map_err(|e| e.to_string())?;
        serde_json::to_vec(&value).map_err(|e| e.to_string())
    })
    .as_ref()
    .map(Vec::as_slice)
    .map_err(Clone::clone)
}
