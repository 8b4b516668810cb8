//! The in-memory HNSW graph and its dump files.
//!
//! hnsw_rs builds the graph and writes the dumps; searches run on the compact copy in
//! `compact.rs`, which `dump.rs` can also read straight from a dump.
//!
//! hnsw_rs ties a reloaded `Hnsw<'b, ..>` to the `HnswIo` that loaded it (`'a: 'b`),
//! because with memory-mapped reloads the vectors live in the loader's mapping. We keep
//! both in one self-referential cell (self_cell), so a loaded graph and a freshly built
//! one (owning an unused default `HnswIo`) have the same type and can live in `Store`.

use std::collections::{HashMap, HashSet};
use std::fs::File;
use std::io::Read;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};
use std::sync::{Arc, PoisonError, RwLock, RwLockReadGuard};

use hnsw_rs::anndists::dist::distances::Distance;
use hnsw_rs::prelude::{AnnT, Hnsw, HnswIo, Point, PointId};
use serde::{Deserialize, Serialize};

use crate::compact::{self, Links, Vectors};
use crate::distance::dot;
use crate::dump;
use crate::error::StoreError;
use crate::types::{HnswParams, ImageId};

/// hnsw_rs caps the number of layers at 16.
pub(crate) const MAX_LAYERS: usize = 16;
/// Below this many points, inserting on one thread beats rayon's overhead.
const PARALLEL_INSERT_MIN: usize = 256;

/// Cosine distance `1 - <a, b>` between L2-normalised vectors, clamped at zero.
///
/// hnsw_rs' `DistDot` asserts `1 - <a, b> >= 0`, which rounding breaks when a vector
/// meets itself (its dot product can come out as 1.0000001), so a query equal to a
/// stored embedding would panic. The clamp also maps NaN to 0, keeping the graph's own
/// `dist >= 0` assertions true.
///
/// hnsw_rs records the distance's type name (`vitrine_store::graph::CosineDistance`) in
/// each dump and refuses to reload a dump under another name: moving or renaming this
/// type makes existing dumps unloadable, and stores then rebuild their graph once.
#[derive(Default, Clone, Copy)]
pub struct CosineDistance;

impl Distance<f32> for CosineDistance {
    fn eval(&self, a: &[f32], b: &[f32]) -> f32 {
        (1.0 - dot(a, b)).max(0.0)
    }
}

type CosineHnsw<'a> = Hnsw<'a, f32, CosineDistance>;

self_cell::self_cell!(
    struct GraphCell {
        owner: HnswIo,
        #[not_covariant]
        dependent: CosineHnsw,
    }
);

/// One dump file as recorded in the manifest: enough to detect a missing, truncated
/// or altered file before hnsw_rs reads it (its loader panics on malformed input).
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

/// The dump a graph was loaded from or last written to, while the graph still equals it.
struct SavedDump {
    dir: PathBuf,
    manifest: IndexManifest,
}

/// The HNSW graph over a store's embeddings. Public so that benchmarks can build and
/// search it without a store around it.
///
/// hnsw_rs builds the graph (`builder`) and writes the dumps; searches run on a
/// compact copy of its layers (`links`, over `vectors`). Opening a store reads the
/// dump straight into the compact form; hnsw_rs' own structure is only read from the
/// dump when the graph must change. After insertions the compact links are dropped and
/// copied again from hnsw_rs by the next search, so a run of commits pays for one copy.
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
    builder: Option<GraphCell>,
    saved: Option<SavedDump>,
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
            builder: None,
            saved: None,
        }
    }

    /// Builds a graph from (id, L2-normalised vector) pairs, inserting in parallel on
    /// rayon's current pool.
    pub fn build(params: &HnswParams, dim: usize, items: &[(ImageId, &[f32])]) -> Graph {
        let mut graph = Graph::empty(params, dim);
        graph
            .insert(items)
            .expect("a new graph has no dump to load");
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
            builder: None,
            saved: Some(SavedDump {
                dir: dir.to_path_buf(),
                manifest: manifest.clone(),
            }),
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

    /// Keeps `id` out of every later search result (hnsw_rs cannot delete nodes).
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
        self.saved.is_none()
    }

    /// Inserts (id, L2-normalised vector) pairs. Ids already in the graph are skipped:
    /// an id's embedding never changes, so its node is still right. Fails only when
    /// hnsw_rs' structure has to be read from the dump and the dump is no longer
    /// intact; the graph is then unchanged.
    pub(crate) fn insert(&mut self, items: &[(ImageId, &[f32])]) -> Result<(), LoadFailure> {
        let dim = self.vectors.dim();
        let mut fresh: Vec<(&[f32], usize)> = Vec::new();
        let mut seen = HashSet::new();
        for (id, vector) in items {
            if vector.len() == dim && !self.contains(*id) && seen.insert(*id) {
                fresh.push((*vector, *id as usize));
            }
        }
        if fresh.is_empty() {
            return Ok(());
        }
        let capacity = self.len() + fresh.len();
        self.builder(capacity)?.with_dependent(|_, hnsw| {
            if fresh.len() >= PARALLEL_INSERT_MIN {
                hnsw.parallel_insert_slice(&fresh);
            } else {
                for item in &fresh {
                    hnsw.insert_slice(*item);
                }
            }
        });
        for (vector, id) in fresh {
            let id = id as ImageId;
            self.node_of.insert(id, to_node(self.image_ids.len()));
            self.image_ids.push(id);
            self.removed.push(false);
            self.vectors.push(vector);
        }
        *self.links.get_mut().unwrap_or_else(PoisonError::into_inner) = None;
        self.saved = None;
        Ok(())
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

    /// The compact links, copied from hnsw_rs first if insertions dropped them.
    fn current_links(&self) -> RwLockReadGuard<'_, Option<Links>> {
        loop {
            let links = self.links.read().unwrap_or_else(PoisonError::into_inner);
            if links.is_some() {
                return links;
            }
            drop(links);
            let mut slot = self.links.write().unwrap_or_else(PoisonError::into_inner);
            if slot.is_none() {
                *slot = Some(self.copy_links());
            }
        }
    }

    /// hnsw_rs' layers in compact form. Each list is ordered by the distance hnsw_rs
    /// recorded, then by id, exactly as when read from a dump, so a reopened store
    /// answers exactly as before.
    ///
    /// Runs on the calling thread: it holds the links' write lock, and a rayon task
    /// stolen meanwhile could be a search waiting for that same lock.
    fn copy_links(&self) -> Links {
        let builder = self
            .builder
            .as_ref()
            .expect("links are only dropped by insertions, which create the builder");
        builder.with_dependent(|_, hnsw| {
            let points: Vec<Arc<Point<f32>>> = if hnsw.get_point_indexation().get_nb_point() == 0 {
                Vec::new()
            } else {
                hnsw.get_point_indexation().into_iter().collect()
            };
            // hnsw_rs names points by (layer, rank in layer); points come layer by
            // layer in rank order.
            let mut node_at: Vec<Vec<u32>> = Vec::new();
            for point in &points {
                let PointId(layer, _) = point.get_point_id();
                let layer = usize::from(layer);
                if node_at.len() <= layer {
                    node_at.resize_with(layer + 1, Vec::new);
                }
                node_at[layer].push(self.node_of[&(point.get_origin_id() as ImageId)]);
            }
            let entry = node_at.last().and_then(|top| top.first().copied());
            let per_point: Vec<(u32, Vec<Vec<u32>>)> = points
                .iter()
                .map(|point| {
                    let level = usize::from(point.get_point_id().0);
                    let lists = point
                        .get_neighborhood_id()
                        .into_iter()
                        .take(level + 1)
                        .map(|mut list| {
                            list.sort_by(|a, b| {
                                a.distance.total_cmp(&b.distance).then(a.d_id.cmp(&b.d_id))
                            });
                            list.iter()
                                .map(|n| node_at[usize::from(n.p_id.0)][n.p_id.1 as usize])
                                .collect()
                        })
                        .collect();
                    (self.node_of[&(point.get_origin_id() as ImageId)], lists)
                })
                .collect();
            let mut lists = vec![Vec::new(); self.len()];
            for (node, node_lists) in per_point {
                lists[node as usize] = node_lists;
            }
            Links::new(lists.into_iter(), entry)
        })
    }

    /// hnsw_rs' graph, read from the saved dump (or made empty) on first use.
    fn builder(&mut self, capacity: usize) -> Result<&GraphCell, LoadFailure> {
        if self.builder.is_none() {
            let cell = match &self.saved {
                Some(saved) if !self.image_ids.is_empty() => {
                    load_builder(&saved.dir, &saved.manifest, &self.node_of)?
                }
                _ => GraphCell::new(HnswIo::default(), |_| {
                    Hnsw::new(
                        self.params.max_nb_connection,
                        capacity.max(1),
                        MAX_LAYERS,
                        self.params.ef_construction,
                        CosineDistance,
                    )
                }),
            };
            self.builder = Some(cell);
        }
        Ok(self.builder.as_ref().expect("just filled"))
    }

    /// Writes the graph as `basename.hnsw.{graph,data}` in `dir`, fsyncs both files and
    /// the directory, and returns their manifest. Must not be called on an empty graph
    /// (hnsw_rs cannot dump a graph without an entry point).
    pub(crate) fn dump(
        &mut self,
        dir: &Path,
        generation: u64,
    ) -> Result<IndexManifest, StoreError> {
        let basename = dump_basename(generation);
        let dump_error = |reason: String| StoreError::IndexDump {
            path: dir.join(&basename),
            reason,
        };
        let capacity = self.len();
        let builder = self
            .builder(capacity)
            .map_err(|failure| dump_error(failure.to_string()))?;
        // hnsw_rs panics when it cannot create the files.
        let written = catch_unwind(AssertUnwindSafe(|| {
            builder.with_dependent(|_, hnsw| hnsw.file_dump(dir, &basename))
        }))
        .map_err(|_| dump_error("hnsw_rs panicked while writing".into()))?
        .map_err(|error| dump_error(error.to_string()))?;
        if written != basename {
            return Err(dump_error(format!(
                "hnsw_rs wrote basename {written} instead of {basename}"
            )));
        }
        let mut files = Vec::new();
        for suffix in ["hnsw.graph", "hnsw.data"] {
            let name = format!("{basename}.{suffix}");
            let path = dir.join(&name);
            let io_error = |source| StoreError::Io {
                path: path.clone(),
                source,
            };
            File::open(&path)
                .and_then(|file| file.sync_all())
                .map_err(io_error)?;
            let (len, blake3) = checksum(&path).map_err(io_error)?;
            files.push(DumpFile { name, len, blake3 });
        }
        sync_dir(dir)?;
        let manifest = IndexManifest {
            generation,
            basename,
            max_nb_connection: self.params.max_nb_connection,
            ef_construction: self.params.ef_construction,
            points: self.len() as u64,
            files,
        };
        self.saved = Some(SavedDump {
            dir: dir.to_path_buf(),
            manifest: manifest.clone(),
        });
        Ok(manifest)
    }
}

/// hnsw_rs' own reload of a dump, after checking each file's size and checksum; it
/// must hold exactly the points `node_of` knows.
fn load_builder(
    dir: &Path,
    manifest: &IndexManifest,
    node_of: &HashMap<ImageId, u32>,
) -> Result<GraphCell, LoadFailure> {
    for file in &manifest.files {
        let path = dir.join(&file.name);
        let (len, hash) = match checksum(&path) {
            Ok(found) => found,
            Err(error) if error.kind() == std::io::ErrorKind::NotFound => {
                return Err(LoadFailure::FileMissing(path))
            }
            Err(error) => return Err(LoadFailure::Unreadable(error.to_string())),
        };
        if len != file.len || hash != file.blake3 {
            return Err(LoadFailure::FileAltered(path));
        }
    }
    // The checksums make a malformed dump unlikely, but hnsw_rs asserts (panics)
    // instead of returning errors on bad input, so a panic is still caught here.
    let loaded = catch_unwind(AssertUnwindSafe(|| {
        GraphCell::try_new(HnswIo::new(dir, &manifest.basename), |io| {
            io.load_hnsw_with_dist(CosineDistance)
        })
    }));
    let mut cell = match loaded {
        Ok(Ok(cell)) => cell,
        Ok(Err(error)) => return Err(LoadFailure::Unreadable(error.to_string())),
        Err(_) => return Err(LoadFailure::Unreadable("hnsw_rs panicked".into())),
    };
    // A reloaded hnsw_rs graph extends candidates when inserting, a new one does
    // not; keep insertion behaviour the same whichever way the graph was made.
    cell.with_dependent_mut(|_, hnsw| hnsw.set_extend_candidates(false));
    let same_points = cell.with_dependent(|_, hnsw| {
        let indexation = hnsw.get_point_indexation();
        indexation.get_nb_point() == node_of.len()
            && indexation
                .into_iter()
                .all(|point| node_of.contains_key(&(point.get_origin_id() as ImageId)))
    });
    if !same_points {
        return Err(LoadFailure::Unreadable(
            "hnsw_rs reloaded other points than the dump holds".into(),
        ));
    }
    Ok(cell)
}

fn to_node(index: usize) -> u32 {
    u32::try_from(index).expect("more than 4 billion images in one graph")
}

fn checksum(path: &Path) -> std::io::Result<(u64, [u8; 32])> {
    let mut file = File::open(path)?;
    let mut hasher = blake3::Hasher::new();
    let mut buffer = vec![0u8; 1 << 20];
    let mut len = 0u64;
    loop {
        let read = file.read(&mut buffer)?;
        if read == 0 {
            break;
        }
        hasher.update(&buffer[..read]);
        len += read as u64;
    }
    Ok((len, *hasher.finalize().as_bytes()))
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
