//! The in-memory HNSW graph and its dump files.
//!
//! hnsw_rs ties a reloaded `Hnsw<'b, ..>` to the `HnswIo` that loaded it (`'a: 'b`),
//! because with memory-mapped reloads the vectors live in the loader's mapping. We keep
//! both in one self-referential cell (self_cell), so a loaded graph and a freshly built
//! one (owning an unused default `HnswIo`) have the same type and can live in `Store`.

use std::collections::HashSet;
use std::fs::File;
use std::io::Read;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};

use hnsw_rs::anndists::dist::distances::Distance;
use hnsw_rs::prelude::{AnnT, Hnsw, HnswIo};
use serde::{Deserialize, Serialize};

use crate::error::StoreError;
use crate::types::{HnswParams, ImageId};

/// hnsw_rs caps the number of layers at 16.
const MAX_LAYERS: usize = 16;
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

/// Dot product of two equally long vectors. Uses AVX2 + FMA when the CPU has
/// them (checked once at run time, so one binary serves every x86-64 machine);
/// distance evaluations dominate HNSW build and search time.
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma")
        {
            // SAFETY: the features the function is compiled for were just detected.
            return unsafe { dot_avx2_fma(a, b) };
        }
    }
    dot_portable(a, b)
}

/// Eight independent partial sums, which the compiler can map onto SIMD lanes
/// (a single running sum forces strictly sequential float additions).
fn dot_portable(a: &[f32], b: &[f32]) -> f32 {
    const LANES: usize = 8;
    let a_chunks = a.chunks_exact(LANES);
    let b_chunks = b.chunks_exact(LANES);
    let tail: f32 = a_chunks
        .remainder()
        .iter()
        .zip(b_chunks.remainder())
        .map(|(x, y)| x * y)
        .sum();
    let mut sums = [0.0f32; LANES];
    for (x, y) in a_chunks.zip(b_chunks) {
        for lane in 0..LANES {
            sums[lane] += x[lane] * y[lane];
        }
    }
    sums.iter().sum::<f32>() + tail
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_avx2_fma(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    // Four accumulators hide the FMA latency.
    let mut acc = [_mm256_setzero_ps(); 4];
    let mut i = 0;
    while i + 32 <= n {
        for (k, sum) in acc.iter_mut().enumerate() {
            let x = _mm256_loadu_ps(pa.add(i + 8 * k));
            let y = _mm256_loadu_ps(pb.add(i + 8 * k));
            *sum = _mm256_fmadd_ps(x, y, *sum);
        }
        i += 32;
    }
    while i + 8 <= n {
        acc[0] = _mm256_fmadd_ps(
            _mm256_loadu_ps(pa.add(i)),
            _mm256_loadu_ps(pb.add(i)),
            acc[0],
        );
        i += 8;
    }
    let sum = _mm256_add_ps(_mm256_add_ps(acc[0], acc[1]), _mm256_add_ps(acc[2], acc[3]));
    let mut lanes = [0f32; 8];
    _mm256_storeu_ps(lanes.as_mut_ptr(), sum);
    let mut total: f32 = lanes.iter().sum();
    while i < n {
        total += *pa.add(i) * *pb.add(i);
        i += 1;
    }
    total
}

#[cfg(test)]
mod dot_tests {
    use super::*;

    #[test]
    fn simd_and_portable_agree() {
        for n in [0, 1, 7, 8, 31, 32, 33, 384, 385] {
            let a: Vec<f32> = (0..n).map(|i| ((i * 37 % 11) as f32 - 5.0) / 7.0).collect();
            let b: Vec<f32> = (0..n).map(|i| ((i * 13 % 17) as f32 - 8.0) / 9.0).collect();
            let exact: f64 = a
                .iter()
                .zip(&b)
                .map(|(x, y)| f64::from(*x) * f64::from(*y))
                .sum();
            assert!((f64::from(dot(&a, &b)) - exact).abs() < 1e-4, "n = {n}");
            assert!(
                (f64::from(dot_portable(&a, &b)) - exact).abs() < 1e-4,
                "n = {n}"
            );
        }
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

pub struct Graph {
    cell: GraphCell,
    ids: HashSet<ImageId>,
    dim: usize,
}

impl Graph {
    pub fn empty(params: &HnswParams, dim: usize, capacity: usize) -> Graph {
        let cell = GraphCell::new(HnswIo::default(), |_| {
            Hnsw::new(
                params.max_nb_connection,
                capacity.max(1),
                MAX_LAYERS,
                params.ef_construction,
                CosineDistance,
            )
        });
        Graph {
            cell,
            ids: HashSet::new(),
            dim,
        }
    }

    /// Builds a graph from (id, L2-normalised vector) pairs, inserting in parallel.
    pub fn build(params: &HnswParams, dim: usize, items: &[(ImageId, &[f32])]) -> Graph {
        let mut graph = Graph::empty(params, dim, items.len());
        graph.insert(items);
        graph
    }

    /// Loads the dump described by `manifest` from `dir` after checking each file's
    /// size and checksum. `dim` is the store's embedding dimension.
    pub fn load(
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
        let (ids, loaded_dim) = cell.with_dependent(|_, hnsw| {
            let indexation = hnsw.get_point_indexation();
            if indexation.get_nb_point() == 0 {
                return (HashSet::new(), dim);
            }
            let ids: HashSet<ImageId> = indexation
                .into_iter()
                .map(|point| point.get_origin_id() as ImageId)
                .collect();
            (ids, indexation.get_data_dimension())
        });
        if loaded_dim != dim {
            return Err(LoadFailure::Unreadable(format!(
                "dump holds {loaded_dim}-dimensional vectors, the store {dim}-dimensional"
            )));
        }
        if ids.len() as u64 != manifest.points {
            return Err(LoadFailure::Unreadable(format!(
                "dump holds {} points, the manifest records {}",
                ids.len(),
                manifest.points
            )));
        }
        Ok(Graph { cell, ids, dim })
    }

    pub fn len(&self) -> usize {
        self.ids.len()
    }

    pub fn contains(&self, id: ImageId) -> bool {
        self.ids.contains(&id)
    }

    pub fn ids(&self) -> &HashSet<ImageId> {
        &self.ids
    }

    /// Inserts (id, L2-normalised vector) pairs. Ids already in the graph are skipped:
    /// an id's embedding never changes, so its node is still right.
    pub fn insert(&mut self, items: &[(ImageId, &[f32])]) {
        let fresh: Vec<(&[f32], usize)> = items
            .iter()
            .filter(|(id, vector)| vector.len() == self.dim && !self.ids.contains(id))
            .map(|(id, vector)| (*vector, *id as usize))
            .collect();
        self.cell.with_dependent(|_, hnsw| {
            if fresh.len() >= PARALLEL_INSERT_MIN {
                hnsw.parallel_insert_slice(&fresh);
            } else {
                for item in &fresh {
                    hnsw.insert_slice(*item);
                }
            }
        });
        self.ids.extend(fresh.iter().map(|(_, id)| *id as ImageId));
    }

    /// Up to `k` nearest nodes as (id, cosine distance), nearest first.
    pub fn search(&self, query: &[f32], k: usize, ef: usize) -> Vec<(ImageId, f32)> {
        if self.ids.is_empty() || k == 0 {
            return Vec::new();
        }
        self.cell.with_dependent(|_, hnsw| {
            hnsw.search(query, k, ef.max(k))
                .into_iter()
                .map(|n| (n.d_id as ImageId, n.distance))
                .collect()
        })
    }

    /// Writes the graph as `basename.hnsw.{graph,data}` in `dir`, fsyncs both files and
    /// the directory, and returns their manifest. Must not be called on an empty graph
    /// (hnsw_rs cannot dump a graph without an entry point).
    pub fn dump(
        &self,
        dir: &Path,
        generation: u64,
        params: &HnswParams,
    ) -> Result<IndexManifest, StoreError> {
        let basename = dump_basename(generation);
        let dump_error = |reason: String| StoreError::IndexDump {
            path: dir.join(&basename),
            reason,
        };
        // hnsw_rs panics when it cannot create the files.
        let written = catch_unwind(AssertUnwindSafe(|| {
            self.cell
                .with_dependent(|_, hnsw| hnsw.file_dump(dir, &basename))
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
        Ok(IndexManifest {
            generation,
            basename,
            max_nb_connection: params.max_nb_connection,
            ef_construction: params.ef_construction,
            points: self.ids.len() as u64,
            files,
        })
    }
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
