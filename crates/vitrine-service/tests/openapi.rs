//! The OpenAPI document: valid OpenAPI 3 (checked by the
//! `openapi-spec-validator` package from PyPI) and equal to the checked-in
//! copy that clients and the page are written against.

use std::path::PathBuf;
use std::process::Command;

const REGENERATE: &str =
    "regenerate it with `VITRINE_UPDATE_OPENAPI=1 cargo test -p vitrine-service --test openapi` \
     (or `vitrine serve --print-openapi > crates/vitrine-service/openapi.json`)";

fn checked_in_path() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("openapi.json")
}

#[test]
fn document_equals_the_checked_in_copy() {
    let generated = format!("{}\n", vitrine_service::openapi_json());
    let path = checked_in_path();
    if std::env::var_os("VITRINE_UPDATE_OPENAPI").is_some() {
        std::fs::write(&path, &generated).expect("writing openapi.json");
        eprintln!("wrote {}", path.display());
        return;
    }
    let checked_in = std::fs::read_to_string(&path).unwrap_or_default();
    assert!(
        checked_in == generated,
        "{} differs from the document the code generates; {REGENERATE}",
        path.display()
    );
}

#[test]
fn document_is_valid_openapi() {
    let Some(python) = std::env::var_os("VITRINE_PYTHON") else {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must set VITRINE_PYTHON (tools/test-all does)"
        );
        eprintln!("notice: VITRINE_PYTHON is not set; skipping the OpenAPI validation (tools/test-all sets it)");
        return;
    };
    let dir = tempfile::tempdir().expect("a temporary folder");
    let document = dir.path().join("openapi.json");
    std::fs::write(&document, vitrine_service::openapi_json()).expect("writing the document");
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/validate_openapi.py");
    let output = Command::new(python)
        .arg(&script)
        .arg(&document)
        .output()
        .expect("running the validator");
    assert!(
        output.status.success(),
        "openapi-spec-validator rejected the document:\n{}{}",
        String::from_utf8_lossy(&output.stdout),
        String::from_utf8_lossy(&output.stderr)
    );
}
