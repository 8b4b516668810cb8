//! Walking folder trees to find candidate image files.
//!
//! Files are recognised as images by their content later, at decode time; the
//! walk only filters what is obviously not ours to look at (hidden entries and
//! configured ignore patterns) and reports what it could not read.

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

fn is_hidden(name: &std::ffi::OsStr) -> bool {
    name.to_string_lossy().starts_with('.')
}

/// Lists the regular files under `root`, sorted by relative path.
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
                if !entry.file_type().is_file() {
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
                        relative_string(root, ancestor)
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
