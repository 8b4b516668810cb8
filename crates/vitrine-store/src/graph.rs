//! The HNSW graph over a store's embeddings and its dump files.
//!
//! Searches run on the compact, read-only `Links` (`compact.rs`); insertions grow the
//! lockable `Layers` (`construct.rs`), made from the links by the first insertion and
//! frozen into links again by the next search. Dumps keep hnsw_rs' file layout
//! (`dump.rs`).

use std::collections::{HashMap, HashSet};
use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::{PoisonError, RwLock, RwLockReadGuard};

use serde::{Deserialize, Serialize};

use crate::compact::{self, Links, Vectors};
use crate::construct::Layers;
use crate::dump;
use crate::error::StoreError;
use crate::types::{HnswParams, ImageId};

/// hnsw_rs' dump layout has 16 layers.
pub(crate) const MAX_LAYERS: usize = 16;

/// hnsw_rs' view of the graph's distance, `1 - <a, b>` clamped at zero, for the tests
/// that load dumps with hnsw_rs: it loads a dump only under a distance type of the
/// recorded name (`dump::DISTANCE_NAME`), so this type must keep its path.
#[cfg(test)]
#[derive(Default)]
pub(crate) struct CosineDistance;

#[cfg(test)]
impl hnsw_rs::anndists::dist::distances::Distance<f32> for CosineDistance {
    fn eval(&self, a: &[f32], b: &[f32]) -> f32 {
        (1.0 - crate::distance::dot(a, b)).max(0.0)
    }
}

/// One dump file as recorded in the manifest: enough to detect a missing, truncated
/// or altered file before it is read.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct DumpFile {
    pub name: String,
    pub len: u64,
    pub blake3: [u8; 32],
}

/// Which dump is the current graph. Recorded in sled with a single insert, after the
/// dump files are written and fsynced.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct IndexManifest {
    pub generation: u64,
    pub basename: String,
    pub max_nb_connection: usize,
    pub ef_construction: usize,
    pub points: u64,
    pub files: Vec<DumpFile>,
}

impl IndexManifest {
    pub fn disk_bytes(&self) -> u64 {
        self.files.iter().map(|f| f.len).sum()
    }
}

/// Why a recorded dump could not be used (the store then rebuilds from sled).
#[derive(Debug)]
pub enum LoadFailure {
    ParamsChanged,
    FileMissing(PathBuf),
    FileAltered(PathBuf),
    Unreadable(String),
}

impl std::fmt::Display for LoadFailure {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            LoadFailure::ParamsChanged => write!(f, "hnsw parameters changed"),
            LoadFailure::FileMissing(p) => write!(f, "dump file {} is missing", p.display()),
            LoadFailure::FileAltered(p) => write!(
                f,
                "dump file {} does not match its recorded size and checksum",
                p.display()
            ),
            LoadFailure::Unreadable(reason) => write!(f, "dump could not be read: {reason}"),
        }
    }
}

pub fn dump_basename(generation: u64) -> String {
    format!("gen-{generation:020}")
}

/// True for file names that `Graph::dump` creates, whatever their generation.
pub fn is_dump_file_name(name: &str) -> bool {
    name.starts_with("gen-") && (name.ends_with(".hnsw.graph") || name.ends_with(".hnsw.data"))
}

/// The HNSW graph over a store's embeddings. Public so that benchmarks can build and
/// search it without a store around it.
///
/// Searches run on `links`; insertions grow `layers`, made from the links by the first
/// insertion. After insertions the links are dropped and frozen again from the layers
/// by the next search, so a run of commits pays for one copy. Opening a store reads
/// the dump straight into links.
pub struct Graph {
    params: HnswParams,
    /// Node `n`'s vector, image id and removal mark.
    vectors: Vectors,
    image_ids: Vec<ImageId>,
    removed: Vec<bool>,
    removed_count: usize,
    node_of: HashMap<ImageId, u32>,
    /// `None` between an insertion and the next search.
    links: RwLock<Option<Links>>,
    /// `None` until the first insertion.
    layers: Option<Layers>,
    /// True while the graph equals the dump it was loaded from or last written to.
    saved: bool,
}

impl Graph {
    pub(crate) fn empty(params: &HnswParams, dim: usize) -> Graph {
        Graph {
            params: *params,
            vectors: Vectors::with_capacity(dim, 0),
            image_ids: Vec::new(),
            removed: Vec::new(),
            removed_count: 0,
            node_of: HashMap::new(),
            links: RwLock::new(Some(Links::new(std::iter::empty(), None))),
            layers: None,
            saved: false,
        }
    }

    /// Builds a graph from (id, L2-normalised vector) pairs, inserting in parallel on
    /// rayon's current pool.
    pub fn build(params: &HnswParams, dim: usize, items: &[(ImageId, &[f32])]) -> Graph {
        let mut graph = Graph::empty(params, dim);
        graph.insert(items);
        graph
    }

    /// Loads the dump described by `manifest` from `dir` after checking each file's
    /// size and checksum. `dim` is the store's embedding dimension.
    pub(crate) fn load(
        dir: &Path,
        manifest: &IndexManifest,
        params: &HnswParams,
        dim: usize,
    ) -> Result<Graph, LoadFailure> {
        if manifest.max_nb_connection != params.max_nb_connection
            || manifest.ef_construction != params.ef_construction
        {
            return Err(LoadFailure::ParamsChanged);
        }
        let dump = dump::read(dir, manifest, dim)?;
        let node_of: HashMap<ImageId, u32> = dump
            .image_ids
            .iter()
            .enumerate()
            .map(|(node, id)| (*id, node as u32))
            .collect();
        if node_of.len() != dump.image_ids.len() {
            return Err(LoadFailure::Unreadable("dump holds an id twice".into()));
        }
        Ok(Graph {
            params: *params,
            removed: vec![false; dump.image_ids.len()],
            removed_count: 0,
            vectors: dump.vectors,
            image_ids: dump.image_ids,
            node_of,
            links: RwLock::new(Some(dump.links)),
            layers: None,
            saved: true,
        })
    }

    pub(crate) fn len(&self) -> usize {
        self.image_ids.len()
    }

    pub(crate) fn contains(&self, id: ImageId) -> bool {
        self.node_of.contains_key(&id)
    }

    /// Every image id in the graph, removed ones included.
    pub(crate) fn image_ids(&self) -> &[ImageId] {
        &self.image_ids
    }

    /// Keeps `id` out of every later search result (nodes stay in the graph as paths
    /// for searches, until too many are removed and the store rebuilds the graph).
    pub(crate) fn mark_removed(&mut self, id: ImageId) {
        if let Some(&node) = self.node_of.get(&id) {
            let mark = &mut self.removed[node as usize];
            if !*mark {
                *mark = true;
                self.removed_count += 1;
            }
        }
    }

    /// Number of nodes marked removed.
    pub(crate) fn removed_count(&self) -> usize {
        self.removed_count
    }

    /// False while the graph equals the dump it was loaded from or last written to.
    pub(crate) fn has_unsaved_changes(&self) -> bool {
        !self.saved
    }

    /// Inserts (id, L2-normalised vector) pairs, in parallel on rayon's current pool.
    /// Ids already in the graph are skipped: an id's embedding never changes, so its
    /// node is still right.
    pub(crate) fn insert(&mut self, items: &[(ImageId, &[f32])]) {
        let dim = self.vectors.dim();
        let mut seen = HashSet::new();
        let fresh: Vec<(ImageId, &[f32])> = items
            .iter()
            .filter(|(id, vector)| vector.len() == dim && !self.contains(*id) && seen.insert(*id))
            .copied()
            .collect();
        if fresh.is_empty() {
            return;
        }
        let links = self.links.get_mut().unwrap_or_else(PoisonError::into_inner);
        let layers = self.layers.get_or_insert_with(|| {
            let links = links
                .as_ref()
                .expect("links are only dropped by insertions, which make the layers");
            Layers::from_links(&self.params, links)
        });
        let first = to_node(self.image_ids.len());
        for (id, vector) in fresh {
            self.node_of.insert(id, to_node(self.image_ids.len()));
            self.image_ids.push(id);
            self.removed.push(false);
            self.vectors.push(vector);
            layers.add_node(id);
        }
        layers.link(&self.vectors, first..to_node(self.image_ids.len()));
        *links = None;
        self.saved = false;
    }

    /// Up to `ef` nearest nodes not marked removed and accepted by `filter` (if any),
    /// as (id, cosine similarity), most similar first (ties by id).
    pub fn search(
        &self,
        query: &[f32],
        ef: usize,
        filter: Option<&dyn Fn(ImageId) -> bool>,
    ) -> Vec<(ImageId, f32)> {
        if self.image_ids.is_empty() || ef == 0 || query.len() != self.vectors.dim() {
            return Vec::new();
        }
        let links = self.current_links();
        let links = links.as_ref().expect("current_links fills the links");
        let query = self.vectors.query(query);
        let mut hits: Vec<(ImageId, f32)> =
            compact::search(&self.vectors, links, query.padded(0), ef, |node| {
                // Most searches have neither removals nor a filter: skip both lookups.
                let removed = self.removed_count > 0 && self.removed[node as usize];
                !removed && filter.is_none_or(|accept| accept(self.image_ids[node as usize]))
            })
            .into_iter()
            .map(|(similarity, node)| (self.image_ids[node as usize], similarity))
            .collect();
        hits.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
        hits
    }

    /// The compact links, frozen from the layers first if insertions dropped them.
    ///
    /// Freezes on the calling thread: it holds the links' write lock, and a rayon task
    /// stolen meanwhile could be a search waiting for that same lock.
    fn current_links(&self) -> RwLockReadGuard<'_, Option<Links>> {
        loop {
            let links = self.links.read().unwrap_or_else(PoisonError::into_inner);
            if links.is_some() {
                return links;
            }
            drop(links);
            let mut slot = self.links.write().unwrap_or_else(PoisonError::into_inner);
            if slot.is_none() {
                let layers = self
                    .layers
                    .as_ref()
                    .expect("links are only dropped by insertions, which make the layers");
                let nodes = (0..self.len() as u32).map(|node| layers.lists(node));
                *slot = Some(Links::new(nodes, layers.entry()));
            }
        }
    }

    /// Writes the graph as `basename.hnsw.{graph,data}` in `dir`, fsyncs both files and
    /// the directory, and returns their manifest. Must not be called on an empty graph
    /// (the layout needs an entry point).
    pub(crate) fn dump(
        &mut self,
        dir: &Path,
        generation: u64,
    ) -> Result<IndexManifest, StoreError> {
        let basename = dump_basename(generation);
        let files = {
            let links = self.current_links();
            let links = links.as_ref().expect("current_links fills the links");
            let graph = dump::Written {
                vectors: &self.vectors,
                image_ids: &self.image_ids,
                links,
                params: &self.params,
            };
            dump::write(dir, &basename, &graph).map_err(|source| StoreError::Io {
                path: dir.join(&basename),
                source,
            })?
        };
        sync_dir(dir)?;
        let manifest = IndexManifest {
            generation,
            basename,
            max_nb_connection: self.params.max_nb_connection,
            ef_construction: self.params.ef_construction,
            points: self.len() as u64,
            files,
        };
        self.saved = true;
        Ok(manifest)
    }
}

fn to_node(index: usize) -> u32 {
    u32::try_from(index).expect("more than 4 billion images in one graph")
}

/// Makes renames/creations/deletions in `dir` durable (POSIX needs an fsync of the
/// directory itself for that).
pub fn sync_dir(dir: &Path) -> Result<(), StoreError> {
    #[cfg(unix)]
    {
        File::open(dir)
            .and_then(|d| d.sync_all())
            .map_err(|source| StoreError::Io {
                path: dir.to_path_buf(),
                source,
            })?;
    }
    #[cfg(not(unix))]
    let _ = dir;
    Ok(())
}
