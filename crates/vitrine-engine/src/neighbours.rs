//! Nearest neighbours of an indexed image, an outside file or a vector.

use serde::Serialize;
use vitrine_store::{ImageId, Store};

use crate::catalog::{Catalog, ImageRef};
use crate::error::EngineError;

/// Restricts which images may be returned.
#[derive(Clone, Debug, Default)]
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

    fn accepts(&self, catalog: &Catalog, id: ImageId) -> bool {
        let Some(record) = catalog.record(id) else {
            return false;
        };
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
}

/// One neighbour with its cosine similarity to the query.
#[derive(Clone, Debug, Serialize)]
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
    let accepts = |id: ImageId| Some(id) != exclude && filter.accepts(catalog, id);
    let hits = store.search(query, k, Some(&accepts))?;
    Ok(hits
        .into_iter()
        .filter_map(|(id, similarity)| {
            catalog.row(id).map(|row| Neighbour {
                image: catalog.image_ref(row),
                similarity,
            })
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
