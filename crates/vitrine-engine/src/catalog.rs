//! An in-memory view of a collection's records and embeddings, taken once per
//! query (or kept by the service and refreshed after writes).

use std::collections::{BTreeSet, HashMap};
use std::path::PathBuf;

use serde::{Deserialize, Serialize};
use vitrine_store::{ImageId, ImageRecord, Store};

use crate::error::EngineError;

/// How results name an image: its id and where it lives.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ImageRef {
    pub id: ImageId,
    /// Relative to its root, `/`-separated.
    pub path: String,
    /// The root folder the path is relative to.
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
}

/// Records and embeddings of every image, with row `i` of `embeddings`
/// belonging to `ids[i]`. Rows are in the order of root folder and path, so
/// that answers which break ties by row are the same for every store that
/// holds the same files, whatever ids the images got (a merged store numbers
/// them in another order than an index run).
pub struct Catalog {
    pub ids: Vec<ImageId>,
    pub records: Vec<ImageRecord>,
    /// Row-major `ids.len() × dim`, L2-normalised.
    pub embeddings: Vec<f32>,
    pub dim: usize,
    row_of: HashMap<ImageId, usize>,
    roots: HashMap<u32, PathBuf>,
}

impl Catalog {
    pub fn load(store: &Store) -> Result<Self, EngineError> {
        let (stored_ids, stored_embeddings) = store.all_embeddings()?;
        let dim = store.fingerprint().dim;
        let roots: HashMap<u32, PathBuf> = store.roots().into_iter().collect();
        let mut stored_records = Vec::with_capacity(stored_ids.len());
        for &id in &stored_ids {
            let record = store.record(id)?.ok_or(EngineError::UnknownImage(id))?;
            stored_records.push(record);
        }
        let mut order: Vec<usize> = (0..stored_ids.len()).collect();
        order.sort_by(|&a, &b| {
            let place = |i: usize| {
                let record: &ImageRecord = &stored_records[i];
                (roots.get(&record.root), &record.rel_path)
            };
            place(a).cmp(&place(b))
        });
        let ids: Vec<ImageId> = order.iter().map(|&i| stored_ids[i]).collect();
        let mut embeddings = Vec::with_capacity(stored_embeddings.len());
        for &i in &order {
            embeddings.extend_from_slice(&stored_embeddings[i * dim..(i + 1) * dim]);
        }
        let records = order.iter().map(|&i| stored_records[i].clone()).collect();
        let row_of = ids.iter().enumerate().map(|(row, &id)| (id, row)).collect();
        Ok(Self {
            ids,
            records,
            embeddings,
            dim,
            row_of,
            roots,
        })
    }

    /// The `k` rows nearest to `query` among the images `filter` accepts,
    /// most similar first. Images tied in similarity (the identical
    /// embeddings of byte copies) are ordered by row, and the graph is asked
    /// for a few more than `k`, so that the cut at `k` falls by path too.
    pub fn nearest_rows(
        &self,
        store: &Store,
        query: &[f32],
        k: usize,
        filter: Option<&dyn Fn(ImageId) -> bool>,
    ) -> Result<Vec<(usize, f32)>, EngineError> {
        let mut rows: Vec<(usize, f32)> = store
            .search(query, k + TIED_EXTRA, filter)?
            .into_iter()
            .filter_map(|(id, similarity)| Some((self.row(id)?, similarity)))
            .collect();
        rows.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
        rows.truncate(k);
        Ok(rows)
    }

    pub fn len(&self) -> usize {
        self.ids.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// The id of the image at a root-relative path (the first root's when
    /// several roots hold that path).
    pub fn id_of_path(&self, path: &str) -> Result<ImageId, EngineError> {
        self.records
            .iter()
            .position(|record| record.rel_path == path)
            .map(|row| self.ids[row])
            .ok_or_else(|| EngineError::UnknownPath(path.to_owned()))
    }

    pub fn row(&self, id: ImageId) -> Option<usize> {
        self.row_of.get(&id).copied()
    }

    pub fn embedding_at(&self, row: usize) -> &[f32] {
        &self.embeddings[row * self.dim..(row + 1) * self.dim]
    }

    pub fn record(&self, id: ImageId) -> Option<&ImageRecord> {
        self.row(id).map(|row| &self.records[row])
    }

    pub fn root_path(&self, root: u32) -> Option<&PathBuf> {
        self.roots.get(&root)
    }

    /// The absolute path of an indexed image.
    pub fn absolute_path(&self, id: ImageId) -> Option<PathBuf> {
        let record = self.record(id)?;
        Some(self.roots.get(&record.root)?.join(&record.rel_path))
    }

    pub fn image_ref(&self, row: usize) -> ImageRef {
        let record = &self.records[row];
        ImageRef {
            id: self.ids[row],
            path: record.rel_path.clone(),
            root: self
                .roots
                .get(&record.root)
                .map(|p| p.display().to_string())
                .unwrap_or_default(),
            split: record.split.clone(),
            label: record.label.clone(),
        }
    }

    /// Every split an image is in, sorted.
    pub fn splits(&self) -> Vec<String> {
        distinct(self.records.iter().filter_map(|r| r.split.as_deref()))
    }

    /// Every label an image has, sorted.
    pub fn labels(&self) -> Vec<String> {
        distinct(self.records.iter().filter_map(|r| r.label.as_deref()))
    }

    /// `Ok` when some image is in `split`, else an error naming the known splits.
    pub fn check_split(&self, split: &str) -> Result<(), EngineError> {
        let known = self.splits();
        if known.iter().any(|s| s == split) {
            Ok(())
        } else {
            Err(EngineError::UnknownSplit {
                split: split.to_owned(),
                known,
            })
        }
    }

    /// `Ok` when some image has `label`, else an error naming the known labels.
    pub fn check_label(&self, label: &str) -> Result<(), EngineError> {
        let known = self.labels();
        if known.iter().any(|l| l == label) {
            Ok(())
        } else {
            Err(EngineError::UnknownLabel {
                label: label.to_owned(),
                known,
            })
        }
    }

    /// Cosine similarity of two rows (embeddings are unit vectors).
    pub fn similarity(&self, a: usize, b: usize) -> f32 {
        dot(self.embedding_at(a), self.embedding_at(b))
    }
}

/// Neighbours asked for beyond `k` in [`Catalog::nearest_rows`]: within the
/// graph's search width (64), so they cost no extra search steps.
const TIED_EXTRA: usize = 8;

fn distinct<'a>(values: impl Iterator<Item = &'a str>) -> Vec<String> {
    let set: BTreeSet<&str> = values.collect();
    set.into_iter().map(str::to_owned).collect()
}

pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}
