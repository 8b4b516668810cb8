//! Nearest neighbours of an indexed image, an outside file or a vector.

use serde::{Deserialize, Serialize};
use vitrine_store::{ImageId, ImageRecord, Store};

use crate::catalog::{Catalog, ImageRef};
use crate::error::EngineError;

/// Restricts which images may be returned.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
pub struct NeighbourFilter {
    pub split: Option<String>,
    pub label: Option<String>,
    /// Relative path prefix, e.g. `train/mug/`.
    pub path_prefix: Option<String>,
}

impl NeighbourFilter {
    pub fn is_empty(&self) -> bool {
        self.split.is_none() && self.label.is_none() && self.path_prefix.is_none()
    }

    /// Whether an image with this record passes the filter.
    pub fn accepts_record(&self, record: &ImageRecord) -> bool {
        self.split
            .as_ref()
            .is_none_or(|s| record.split.as_ref() == Some(s))
            && self
                .label
                .as_ref()
                .is_none_or(|l| record.label.as_ref() == Some(l))
            && self
                .path_prefix
                .as_ref()
                .is_none_or(|p| record.rel_path.starts_with(p.as_str()))
    }

    /// `Ok` when the split and label it names exist in the collection, else
    /// an error that lists the known ones (a typo must not look like "no
    /// results").
    pub fn check_known(&self, catalog: &Catalog) -> Result<(), EngineError> {
        if let Some(split) = &self.split {
            catalog.check_split(split)?;
        }
        if let Some(label) = &self.label {
            catalog.check_label(label)?;
        }
        Ok(())
    }

    /// Why a filtered query found nothing, if the filter is the reason: an
    /// unknown split or label, or no image that passes every part of it.
    pub fn check_matches_some(&self, catalog: &Catalog) -> Result<(), EngineError> {
        if self.is_empty() {
            return Ok(());
        }
        self.check_known(catalog)?;
        if catalog.records.iter().any(|r| self.accepts_record(r)) {
            return Ok(());
        }
        let mut parts = Vec::new();
        if let Some(split) = &self.split {
            parts.push(format!("split `{split}`"));
        }
        if let Some(label) = &self.label {
            parts.push(format!("label `{label}`"));
        }
        if let Some(prefix) = &self.path_prefix {
            parts.push(format!("path prefix `{prefix}`"));
        }
        Err(EngineError::NoImageMatches(parts.join(" and ")))
    }
}

/// `Ok` for a usable number of neighbours.
pub fn check_k(k: usize) -> Result<(), EngineError> {
    if k == 0 {
        return Err(EngineError::InvalidArgument(
            "k (how many neighbours) must be at least 1".into(),
        ));
    }
    Ok(())
}

/// One neighbour with its cosine similarity to the query.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Neighbour {
    #[serde(flatten)]
    pub image: ImageRef,
    pub similarity: f32,
}

/// Up to `k` nearest neighbours of `query` (a unit vector), best first,
/// excluding `exclude` (the query image itself, when it is indexed).
pub fn nearest_to_vector(
    store: &Store,
    catalog: &Catalog,
    query: &[f32],
    k: usize,
    filter: &NeighbourFilter,
    exclude: Option<ImageId>,
) -> Result<Vec<Neighbour>, EngineError> {
    if query.len() != catalog.dim {
        return Err(EngineError::InvalidArgument(format!(
            "query vector has {} dimensions, the collection has {}",
            query.len(),
            catalog.dim
        )));
    }
    check_k(k)?;
    let accepts = |id: ImageId| {
        Some(id) != exclude && catalog.record(id).is_some_and(|r| filter.accepts_record(r))
    };
    let hits = catalog.nearest_rows(store, query, k, Some(&accepts))?;
    // Checked only when nothing was found, so answered queries pay nothing.
    if hits.is_empty() {
        filter.check_matches_some(catalog)?;
    }
    Ok(hits
        .into_iter()
        .map(|(row, similarity)| Neighbour {
            image: catalog.image_ref(row),
            similarity,
        })
        .collect())
}

/// Up to `k` nearest neighbours of an indexed image, itself excluded.
pub fn nearest_to_image(
    store: &Store,
    catalog: &Catalog,
    id: ImageId,
    k: usize,
    filter: &NeighbourFilter,
) -> Result<Vec<Neighbour>, EngineError> {
    let row = catalog.row(id).ok_or(EngineError::UnknownImage(id))?;
    let query = catalog.embedding_at(row).to_vec();
    nearest_to_vector(store, catalog, &query, k, filter, Some(id))
}
