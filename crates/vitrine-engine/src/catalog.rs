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
        let (stored_ids, mut embeddings) = store.all_embeddings()?;
        let dim = store.fingerprint().dim;
        let roots: HashMap<u32, PathBuf> = store.roots().into_iter().collect();
        let mut stored_records = Vec::with_capacity(stored_ids.len());
        for &id in &stored_ids {
            let record = store.record(id)?.ok_or(EngineError::UnknownImage(id))?;
            stored_records.push(Some(record));
        }
        let place = |record: &Option<ImageRecord>| {
            let record = record.as_ref().expect("every record is read above");
            (roots.get(&record.root), record.rel_path.clone())
        };
        let mut order: Vec<usize> = (0..stored_ids.len()).collect();
        order.sort_by_cached_key(|&i| place(&stored_records[i]));
        let ids: Vec<ImageId> = order.iter().map(|&i| stored_ids[i]).collect();
        let records = order
            .iter()
            .map(|&i| stored_records[i].take().expect("each row is taken once"))
            .collect();
        // In place: a copy would double the largest allocation of a query.
        gather_rows(&mut embeddings, dim, &order);
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

/// Neighbours asked for beyond `k` in [`Catalog::nearest_rows`]: below the
/// graph's default search width, so they cost no extra search steps.
const TIED_EXTRA: usize = 8;

/// Reorders the rows of a row-major matrix in place so that row `r` becomes
/// the old row `order[r]` (`order` a permutation), with one row of scratch:
/// each cycle of the permutation is followed once.
fn gather_rows(data: &mut [f32], width: usize, order: &[usize]) {
    let mut placed = vec![false; order.len()];
    let mut scratch = vec![0.0f32; width];
    for start in 0..order.len() {
        if placed[start] || order[start] == start {
            continue;
        }
        scratch.copy_from_slice(&data[start * width..(start + 1) * width]);
        let mut row = start;
        loop {
            placed[row] = true;
            let from = order[row];
            if from == start {
                data[row * width..(row + 1) * width].copy_from_slice(&scratch);
                break;
            }
            data.copy_within(from * width..(from + 1) * width, row * width);
            row = from;
        }
    }
}

fn distinct<'a>(values: impl Iterator<Item = &'a str>) -> Vec<String> {
    let set: BTreeSet<&str> = values.collect();
    set.into_iter().map(str::to_owned).collect()
}

pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rows_are_gathered_in_place_as_a_copy_would_gather_them() {
        let width = 3;
        let order = [4, 2, 0, 1, 3, 5, 7, 6];
        let data: Vec<f32> = (0..order.len() * width).map(|v| v as f32).collect();
        let copied: Vec<f32> = order
            .iter()
            .flat_map(|&i| data[i * width..(i + 1) * width].to_vec())
            .collect();
        let mut in_place = data.clone();
        gather_rows(&mut in_place, width, &order);
        assert_eq!(in_place, copied);
    }
}
