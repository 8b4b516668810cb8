//! Walking folder trees to find candidate image files.
//!
//! Files are recognised as images by their content later, at decode time; the
//! walk only filters what is obviously not ours to look at (hidden entries and
//! configured ignore patterns), counts what it passes over (symbolic links it
//! does not follow, special files) and reports what it could not read.

use std::fs::FileType;
use std::io::ErrorKind;
use std::path::{Path, PathBuf};

use globset::{Glob, GlobSet, GlobSetBuilder};
use walkdir::WalkDir;

use crate::error::EngineError;

/// How to walk a root.
#[derive(Clone, Debug, Default)]
pub struct WalkOptions {
    /// Follow symbolic links (loops are detected and reported, not followed).
    pub follow_symlinks: bool,
    /// Glob patterns, matched against the path relative to the root.
    pub ignore_patterns: Vec<String>,
}

/// One regular file found under a root.
#[derive(Clone, Debug)]
pub struct FoundFile {
    pub abs_path: PathBuf,
    /// Relative to the root, with `/` separators on every platform.
    pub rel_path: String,
    pub byte_size: u64,
    pub modified_unix_ns: i64,
}

/// Something under a root that could not be looked at.
#[derive(Clone, Debug)]
pub struct WalkProblem {
    pub rel_path: String,
    pub reason: String,
}

/// The outcome of walking one root.
#[derive(Debug, Default)]
pub struct WalkResult {
    pub files: Vec<FoundFile>,
    pub problems: Vec<WalkProblem>,
    /// Symbolic links passed over because links are not followed.
    pub skipped_symlinks: usize,
    /// FIFOs, sockets and devices: never opened (reading a FIFO would block).
    pub skipped_special_files: usize,
}

impl WalkOptions {
    /// Fails on an invalid ignore pattern, so that a run can be refused
    /// before anything is written.
    pub fn check(&self) -> Result<(), EngineError> {
        build_ignore_set(&self.ignore_patterns).map(drop)
    }
}

/// Checks that `root` can be walked (it exists, is a folder and can be
/// listed) and returns its canonical path, the form a collection stores.
pub fn resolve_root(root: &Path) -> Result<PathBuf, EngineError> {
    let refused = |error: std::io::Error| match error.kind() {
        ErrorKind::NotFound => EngineError::RootNotFound {
            root: root.to_path_buf(),
        },
        _ => EngineError::UnreadableRoot {
            root: root.to_path_buf(),
            message: error.to_string(),
        },
    };
    let canonical = root.canonicalize().map_err(refused)?;
    let file_type = std::fs::metadata(&canonical).map_err(refused)?.file_type();
    if !file_type.is_dir() {
        return Err(not_a_folder(root, file_type));
    }
    std::fs::read_dir(&canonical).map_err(refused)?;
    Ok(canonical)
}

/// A collection stores a root as a folder and each image by its path relative
/// to it; a file root would be stored with an empty path. Indexing it under its
/// file name would need its parent as the root, and every later rescan of that
/// root would then take in the file's siblings too, so it is refused instead.
fn not_a_folder(root: &Path, file_type: FileType) -> EngineError {
    EngineError::RootNotAFolder {
        root: root.to_path_buf(),
        kind: kind_of(file_type),
    }
}

/// "a file", "a FIFO", ...: what a root that is not a folder is, for messages
/// (its symbolic links are already resolved).
fn kind_of(file_type: FileType) -> &'static str {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt;
        if file_type.is_fifo() {
            return "a FIFO";
        }
        if file_type.is_socket() {
            return "a socket";
        }
        if file_type.is_block_device() || file_type.is_char_device() {
            return "a device";
        }
    }
    if file_type.is_file() {
        "a file"
    } else {
        "a special file"
    }
}

fn build_ignore_set(patterns: &[String]) -> Result<GlobSet, EngineError> {
    let mut builder = GlobSetBuilder::new();
    for pattern in patterns {
        let glob = Glob::new(pattern).map_err(|source| EngineError::BadIgnorePattern {
            pattern: pattern.clone(),
            message: source.to_string(),
        })?;
        builder.add(glob);
    }
    builder
        .build()
        .map_err(|source| EngineError::BadIgnorePattern {
            pattern: patterns.join(", "),
            message: source.to_string(),
        })
}

fn relative_string(root: &Path, path: &Path) -> String {
    let rel = path.strip_prefix(root).unwrap_or(path);
    rel.components()
        .map(|c| c.as_os_str().to_string_lossy())
        .collect::<Vec<_>>()
        .join("/")
}

/// A folder under `root` named for a message: its relative path, or "the root
/// folder" for the root itself (whose relative path is empty).
fn describe_folder(root: &Path, folder: &Path) -> String {
    match relative_string(root, folder) {
        rel if rel.is_empty() => "the root folder".into(),
        rel => rel,
    }
}

fn is_hidden(name: &std::ffi::OsStr) -> bool {
    name.to_string_lossy().starts_with('.')
}

/// Lists the regular files under `root`, sorted by relative path. `root`
/// must be a folder.
pub fn walk_root(root: &Path, options: &WalkOptions) -> Result<WalkResult, EngineError> {
    let ignore = build_ignore_set(&options.ignore_patterns)?;
    let mut result = WalkResult::default();
    let walker = WalkDir::new(root)
        .follow_links(options.follow_symlinks)
        .sort_by_file_name()
        .into_iter()
        .filter_entry(|entry| {
            entry.depth() == 0
                || (!is_hidden(entry.file_name())
                    && !ignore.is_match(relative_string(root, entry.path())))
        });
    for entry in walker {
        match entry {
            Ok(entry) => {
                let file_type = entry.file_type();
                if entry.depth() == 0 {
                    if !file_type.is_dir() {
                        return Err(not_a_folder(root, file_type));
                    }
                    continue;
                }
                if file_type.is_dir() {
                    continue;
                }
                // Followed links report their target's type; only unfollowed ones are links here.
                if file_type.is_symlink() {
                    result.skipped_symlinks += 1;
                    continue;
                }
                if !file_type.is_file() {
                    result.skipped_special_files += 1;
                    continue;
                }
                let rel_path = relative_string(root, entry.path());
                match entry.metadata() {
                    Ok(meta) => result.files.push(FoundFile {
                        abs_path: entry.path().to_path_buf(),
                        rel_path,
                        byte_size: meta.len(),
                        modified_unix_ns: modified_unix_ns(&meta),
                    }),
                    Err(err) => result.problems.push(WalkProblem {
                        rel_path,
                        reason: format!("cannot read metadata: {err}"),
                    }),
                }
            }
            Err(err) => {
                let rel_path = err
                    .path()
                    .map(|p| relative_string(root, p))
                    .unwrap_or_default();
                let reason = match err.loop_ancestor() {
                    Some(ancestor) => format!(
                        "symbolic link loop back to {}",
                        describe_folder(root, ancestor)
                    ),
                    None => format!("cannot read: {err}"),
                };
                if rel_path.is_empty() {
                    return Err(EngineError::UnreadableRoot {
                        root: root.to_path_buf(),
                        message: err.to_string(),
                    });
                }
                result.problems.push(WalkProblem { rel_path, reason });
            }
        }
    }
    Ok(result)
}

fn modified_unix_ns(meta: &std::fs::Metadata) -> i64 {
    meta.modified()
        .ok()
        .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
        .map_or(0, |d| d.as_nanos() as i64)
}
