//! The committed OpenAPI document must equal the one the code generates.
//! Regenerate with: cargo run -- openapi > openapi/openapi.json

#[test]
fn committed_spec_matches_generated() {
    let generated = tailtally::api::openapi::pretty_json();
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/openapi/openapi.json");
    let committed = std::fs::read_to_string(path).unwrap_or_default();
    assert!(
        committed == generated,
        "openapi/openapi.json is out of date: run `cargo run -- openapi > openapi/openapi.json` and commit it"
    );
}
