//! Where an image's split and label come from: a path rule or a CSV manifest.

use std::collections::HashMap;
use std::path::Path;

use crate::error::EngineError;

/// Split and label of one image; either may be unknown.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct SplitLabel {
    pub split: Option<String>,
    pub label: Option<String>,
}

/// How split and label are derived from a file's path relative to its root.
#[derive(Clone, Debug, Default)]
pub enum SplitRule {
    /// The common image-folder convention: a folder named like `train`,
    /// `val`/`valid`/`validation` or `test` is the split, and the folder
    /// directly under it is the label (`train/mug/0001.jpg`).
    #[default]
    FolderConvention,
    /// A CSV manifest `path,split,label` (header row required), paths relative
    /// to the root; files absent from it have neither split nor label.
    Manifest(HashMap<String, SplitLabel>),
}

/// Maps a folder name to its canonical split name, if it names one.
pub fn canonical_split(folder: &str) -> Option<&'static str> {
    match folder.to_ascii_lowercase().as_str() {
        "train" | "training" => Some("train"),
        "val" | "valid" | "validation" => Some("val"),
        "test" | "testing" => Some("test"),
        _ => None,
    }
}

impl SplitRule {
    /// Reads a `path,split,label` manifest.
    pub fn from_manifest(path: &Path) -> Result<Self, EngineError> {
        let bad = |message: String| EngineError::BadManifest {
            path: path.to_path_buf(),
            message,
        };
        let mut reader = csv::Reader::from_path(path).map_err(|e| bad(e.to_string()))?;
        let headers = reader.headers().map_err(|e| bad(e.to_string()))?.clone();
        let column = |name: &str| {
            headers
                .iter()
                .position(|h| h.trim().eq_ignore_ascii_case(name))
                .ok_or_else(|| bad(format!("missing column `{name}`")))
        };
        let (path_col, split_col, label_col) =
            (column("path")?, column("split")?, column("label")?);
        let mut entries = HashMap::new();
        for (line, row) in reader.records().enumerate() {
            let row = row.map_err(|e| bad(format!("row {}: {e}", line + 2)))?;
            let field = |i: usize| {
                row.get(i)
                    .map(str::trim)
                    .filter(|v| !v.is_empty())
                    .map(str::to_owned)
            };
            let Some(image_path) = field(path_col) else {
                return Err(bad(format!("row {}: empty path", line + 2)));
            };
            let split = field(split_col).map(|s| canonical_split(&s).map_or(s, str::to_owned));
            entries.insert(
                image_path.trim_start_matches("./").to_owned(),
                SplitLabel {
                    split,
                    label: field(label_col),
                },
            );
        }
        Ok(SplitRule::Manifest(entries))
    }

    /// Split and label of the file at `rel_path` (`/`-separated).
    pub fn assign(&self, rel_path: &str) -> SplitLabel {
        match self {
            SplitRule::FolderConvention => {
                let folders: Vec<&str> = rel_path.split('/').collect();
                let folders = &folders[..folders.len().saturating_sub(1)];
                for (i, folder) in folders.iter().enumerate() {
                    if let Some(split) = canonical_split(folder) {
                        return SplitLabel {
                            split: Some(split.to_owned()),
                            label: folders.get(i + 1).map(|l| (*l).to_owned()),
                        };
                    }
                }
                SplitLabel::default()
            }
            SplitRule::Manifest(entries) => entries.get(rel_path).cloned().unwrap_or_default(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(rel_path: &str, split: Option<&str>, label: Option<&str>) {
        let got = SplitRule::FolderConvention.assign(rel_path);
        assert_eq!(got.split.as_deref(), split, "{rel_path}");
        assert_eq!(got.label.as_deref(), label, "{rel_path}");
    }

    #[test]
    fn folder_convention() {
        check("train/mug/a.jpg", Some("train"), Some("mug"));
        check("data/Validation/bowl/x/y.png", Some("val"), Some("bowl"));
        check("test/a.jpg", Some("test"), None);
        check("unsorted/a.jpg", None, None);
        check("train.jpg", None, None);
    }

    #[test]
    fn manifest() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("m.csv");
        std::fs::write(
            &path,
            "path,split,label\na/b.jpg,validation,vase\nc.png,,\n",
        )
        .unwrap();
        let rule = SplitRule::from_manifest(&path).unwrap();
        assert_eq!(
            rule.assign("a/b.jpg"),
            SplitLabel {
                split: Some("val".into()),
                label: Some("vase".into())
            }
        );
        assert_eq!(rule.assign("c.png"), SplitLabel::default());
        assert_eq!(rule.assign("missing.png"), SplitLabel::default());
        std::fs::write(&path, "file,split\n").unwrap();
        assert!(SplitRule::from_manifest(&path).is_err());
    }
}
