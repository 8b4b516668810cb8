//! What a collection holds: counts per root, split and label, its model, and
//! the files that failed.

use std::collections::BTreeMap;
use std::path::PathBuf;

use serde::{Deserialize, Serialize};
use vitrine_store::{FileError, ModelFingerprint};

use crate::catalog::Catalog;
use crate::decisions::DecisionCounts;

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct CollectionStatus {
    pub images: usize,
    pub errors: usize,
    pub model: String,
    pub model_id: String,
    pub dimension: usize,
    pub pooling: String,
    pub roots: Vec<String>,
    /// Every root with its image count: a root stays recorded when it holds
    /// none (its failed files are recorded against it, and a rescan revisits it).
    pub images_per_root: BTreeMap<String, usize>,
    pub splits: BTreeMap<String, usize>,
    /// Keyed `split/label`; `(none)` stands for a missing split or label.
    pub labels: BTreeMap<String, usize>,
    pub index_disk_bytes: u64,
    /// What people decided: copies confirmed by dropping one side, reported
    /// pairs overturned as not copies, labels and splits given.
    pub decisions: DecisionCounts,
    /// Only when asked for (see [`CollectionStatus::new`]).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub error_list: Vec<ErrorLine>,
}

/// One file that could not be indexed.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ErrorLine {
    pub root: String,
    pub path: String,
    pub reason: String,
}

/// The parts of a committed collection that its status is counted from.
pub struct StatusSource<'a> {
    pub catalog: &'a Catalog,
    pub errors: &'a [FileError],
    pub fingerprint: &'a ModelFingerprint,
    pub roots: &'a [(u32, PathBuf)],
    pub index_disk_bytes: u64,
    pub decisions: DecisionCounts,
}

impl CollectionStatus {
    /// Counts `source`; lists each failed file when `list_errors`.
    pub fn new(source: &StatusSource<'_>, list_errors: bool) -> Self {
        let roots: BTreeMap<u32, &PathBuf> = source.roots.iter().map(|(id, p)| (*id, p)).collect();
        let mut images_per_root_id: BTreeMap<u32, usize> =
            roots.keys().map(|&id| (id, 0)).collect();
        let mut splits = BTreeMap::new();
        let mut labels = BTreeMap::new();
        for record in &source.catalog.records {
            *images_per_root_id.entry(record.root).or_insert(0) += 1;
            let split = record.split.as_deref().unwrap_or("(none)");
            let label = record.label.as_deref().unwrap_or("(none)");
            *labels.entry(format!("{split}/{label}")).or_insert(0) += 1;
            *splits.entry(split.to_owned()).or_insert(0) += 1;
        }
        let root_name = |id: u32| {
            roots
                .get(&id)
                .map(|p| p.display().to_string())
                .unwrap_or_default()
        };
        let fingerprint = source.fingerprint;
        Self {
            images: source.catalog.len(),
            errors: source.errors.len(),
            model: fingerprint.to_string(),
            model_id: fingerprint.model_id.clone(),
            dimension: fingerprint.dim,
            pooling: fingerprint.pooling.clone(),
            roots: roots.values().map(|p| p.display().to_string()).collect(),
            images_per_root: images_per_root_id
                .iter()
                .map(|(&id, &count)| (root_name(id), count))
                .collect(),
            splits,
            labels,
            index_disk_bytes: source.index_disk_bytes,
            decisions: source.decisions.clone(),
            error_list: if list_errors {
                source
                    .errors
                    .iter()
                    .map(|e| ErrorLine {
                        root: root_name(e.root),
                        path: e.rel_path.clone(),
                        reason: e.reason.clone(),
                    })
                    .collect()
            } else {
                Vec::new()
            },
        }
    }
}
