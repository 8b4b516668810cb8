use std::collections::HashSet;
use std::fs;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use serde::de::DeserializeOwned;
use serde::Serialize;
use tracing::{info, warn};

use crate::distance::dot;
use crate::error::StoreError;
use crate::graph::{self, Graph, IndexManifest};
use crate::keys;
use crate::types::{ChangeSet, FileError, HnswParams, ImageId, ImageRecord, ModelFingerprint};

/// Format written by this build. Bump on any incompatible change of the key layout or
/// of a value encoding.
pub const FORMAT_VERSION: u32 = 1;
/// Oldest format this build can read.
pub const OLDEST_READABLE_FORMAT: u32 = 1;

/// When more than this fraction of the graph's nodes are images deleted from sled, the
/// graph is rebuilt instead of filtered (on open and before saving).
const MAX_DEAD_FRACTION: f64 = 0.2;

const DB_DIR: &str = "db";
const GRAPH_DIR: &str = "hnsw";

/// One collection on disk: a sled database holding image records, embeddings, roots,
/// per-file errors and meta data, plus the dumped HNSW graph over the embeddings.
///
/// Consistency between sled and the graph rests on three facts:
/// - an image id is never reused and its embedding never changes (a changed embedding
///   gets a new id), so a graph node whose id is live in sled is always correct;
/// - a dump becomes current only through one sled insert of its manifest, made after
///   the dump files are fsynced, and the manifest carries each file's size and blake3
///   checksum, so a half-written, truncated or unrecorded dump is never loaded;
/// - after loading, the graph is reconciled with sled: live ids missing from the graph
///   are inserted, graph ids no longer live are marked removed (searches step through
///   them but never return them), and each search result is re-checked against sled
///   before it is returned.
pub struct Store {
    dir: PathBuf,
    db: sled::Db,
    fingerprint: ModelFingerprint,
    params: HnswParams,
    /// Its nodes whose images have been removed from sled are marked removed.
    graph: Graph,
    live_count: usize,
    roots: Vec<(u32, PathBuf)>,
    manifest: Option<IndexManifest>,
    index_was_loaded: bool,
}

impl Store {
    /// Opens the store in `dir`, creating it when absent. Fails with `ModelMismatch`
    /// when the store was built with another model.
    pub fn create_or_open(dir: &Path, fingerprint: &ModelFingerprint) -> Result<Store, StoreError> {
        Store::create_or_open_with(dir, fingerprint, HnswParams::default())
    }

    pub fn create_or_open_with(
        dir: &Path,
        fingerprint: &ModelFingerprint,
        params: HnswParams,
    ) -> Result<Store, StoreError> {
        fs::create_dir_all(dir).map_err(|source| StoreError::Io {
            path: dir.to_path_buf(),
            source,
        })?;
        let db = open_db(dir)?;
        match read_meta::<u32>(&db, dir, keys::META_FORMAT)? {
            Some(found) => {
                check_format(dir, found)?;
                let stored = read_fingerprint(&db, dir)?;
                if &stored != fingerprint {
                    return Err(StoreError::ModelMismatch {
                        path: dir.to_path_buf(),
                        differing: stored.differing_fields(fingerprint),
                        stored: Box::new(stored),
                        requested: Box::new(fingerprint.clone()),
                    });
                }
            }
            None => {
                let mut batch = sled::Batch::default();
                batch.insert(
                    keys::META_FORMAT,
                    encode(&FORMAT_VERSION, keys::META_FORMAT)?,
                );
                batch.insert(
                    keys::META_FINGERPRINT,
                    encode(fingerprint, keys::META_FINGERPRINT)?,
                );
                batch.insert(keys::META_NEXT_ID, encode(&0u64, keys::META_NEXT_ID)?);
                batch.insert(keys::META_NEXT_ROOT, encode(&0u32, keys::META_NEXT_ROOT)?);
                let db_error = database_error(dir);
                db.apply_batch(batch).map_err(&db_error)?;
                db.flush().map_err(&db_error)?;
            }
        }
        Store::load(dir, db, params)
    }

    /// Opens an existing store (for queries). Fails with `NotAStore` when absent.
    pub fn open(dir: &Path) -> Result<Store, StoreError> {
        Store::open_with(dir, HnswParams::default())
    }

    pub fn open_with(dir: &Path, params: HnswParams) -> Result<Store, StoreError> {
        if !dir.join(DB_DIR).is_dir() {
            return Err(StoreError::NotAStore {
                path: dir.to_path_buf(),
            });
        }
        let db = open_db(dir)?;
        match read_meta::<u32>(&db, dir, keys::META_FORMAT)? {
            Some(found) => check_format(dir, found)?,
            None => {
                return Err(StoreError::NotAStore {
                    path: dir.to_path_buf(),
                })
            }
        }
        Store::load(dir, db, params)
    }

    /// A note kept on a pair of file contents (named by their content hashes)
    /// under `kind`, for example a verdict that is costly to compute again.
    /// Notes are a cache beside the collection: no commit touches them, and
    /// a note on contents no longer indexed is simply never asked for.
    pub fn pair_note(
        &self,
        kind: &[u8; 8],
        first: &[u8; 32],
        second: &[u8; 32],
    ) -> Result<Option<Vec<u8>>, StoreError> {
        Ok(self
            .db
            .get(keys::pair_note(kind, first, second))
            .map_err(self.db_error())?
            .map(|value| value.to_vec()))
    }

    /// Keeps notes on pairs of file contents (see [`Store::pair_note`]), in one
    /// batch. Not flushed: losing the latest notes in a crash costs only time.
    pub fn put_pair_notes(
        &self,
        kind: &[u8; 8],
        notes: &[([u8; 32], [u8; 32], Vec<u8>)],
    ) -> Result<(), StoreError> {
        let mut batch = sled::Batch::default();
        for (first, second, note) in notes {
            batch.insert(&keys::pair_note(kind, first, second)[..], note.as_slice());
        }
        self.db.apply_batch(batch).map_err(self.db_error())
    }

    /// Appends a person's decision (bytes the caller encodes) to the collection's
    /// decision log and returns its sequence number, counting from 1. Durable
    /// when this returns; concurrent appends each get their own number. No
    /// commit or index run touches the log.
    pub fn append_decision(&self, decision: &[u8]) -> Result<u64, StoreError> {
        loop {
            let last = self
                .db
                .scan_prefix([keys::DECISION])
                .next_back()
                .transpose()
                .map_err(self.db_error())?;
            let next = match last {
                None => 1,
                Some((key, _)) => {
                    keys::id_of(&key)
                        .ok_or_else(|| self.corrupt(&key, "malformed decision key".into()))?
                        + 1
                }
            };
            let swapped = self
                .db
                .compare_and_swap(keys::decision(next), None as Option<&[u8]>, Some(decision))
                .map_err(self.db_error())?;
            // Another writer took this number first: take the next one.
            if swapped.is_ok() {
                self.db.flush().map_err(self.db_error())?;
                return Ok(next);
            }
        }
    }

    /// The decision log, in the order the decisions were made.
    pub fn decisions(&self) -> Result<Vec<(u64, Vec<u8>)>, StoreError> {
        self.db
            .scan_prefix([keys::DECISION])
            .map(|entry| {
                let (key, value) = entry.map_err(self.db_error())?;
                let sequence = keys::id_of(&key)
                    .ok_or_else(|| self.corrupt(&key, "malformed decision key".into()))?;
                Ok((sequence, value.to_vec()))
            })
            .collect()
    }

    /// Deletes the pair notes that name a file content no image has any more: a changed
    /// or removed file leaves its notes behind, which nothing would read again. Returns
    /// how many were deleted.
    pub fn forget_orphan_pair_notes(&self) -> Result<usize, StoreError> {
        let mut live = HashSet::new();
        for entry in self.records() {
            live.insert(entry?.1.content_hash);
        }
        let mut batch = sled::Batch::default();
        let mut forgotten = 0;
        for entry in self.db.scan_prefix([keys::PAIR_NOTE]) {
            let (key, _) = entry.map_err(self.db_error())?;
            let kept = keys::hashes_of_pair_note(&key)
                .is_some_and(|(first, second)| live.contains(&first) && live.contains(&second));
            if !kept {
                batch.remove(key);
                forgotten += 1;
            }
        }
        self.db.apply_batch(batch).map_err(self.db_error())?;
        Ok(forgotten)
    }

    /// Reads everything but the records into memory and brings the graph in line with
    /// sled: loads the recorded dump when it is intact, otherwise rebuilds.
    fn load(dir: &Path, db: sled::Db, params: HnswParams) -> Result<Store, StoreError> {
        let fingerprint = read_fingerprint(&db, dir)?;
        let graph_dir = dir.join(GRAPH_DIR);
        fs::create_dir_all(&graph_dir).map_err(|source| StoreError::Io {
            path: graph_dir.clone(),
            source,
        })?;
        let manifest = read_meta::<IndexManifest>(&db, dir, keys::META_INDEX)?;
        let mut store = Store {
            dir: dir.to_path_buf(),
            db,
            graph: Graph::empty(&params, fingerprint.dim),
            fingerprint,
            params,
            live_count: 0,
            roots: Vec::new(),
            manifest,
            index_was_loaded: false,
        };
        store.roots = store.read_roots()?;
        // Listing the live ids (a scan of sled) and reading the dump are independent.
        let (live, loaded) = rayon::join(
            || store.live_ids(),
            || {
                let manifest = store.manifest.as_ref()?;
                let dim = store.fingerprint.dim;
                Graph::load(&graph_dir, manifest, &params, dim)
                    .inspect_err(|failure| {
                        warn!(store = %dir.display(), %failure, "rebuilding the hnsw index");
                    })
                    .ok()
            },
        );
        let live = live?;
        store.live_count = live.len();
        let loaded = loaded.and_then(|mut graph| {
            let dead: Vec<ImageId> = graph
                .image_ids()
                .iter()
                .filter(|id| !live.contains(id))
                .copied()
                .collect();
            if dead.len() as f64 > MAX_DEAD_FRACTION * graph.len() as f64 {
                info!(store = %dir.display(), dead = dead.len(), nodes = graph.len(),
                      "rebuilding the hnsw index: too many removed images");
                return None;
            }
            for id in dead {
                graph.mark_removed(id);
            }
            Some(graph)
        });
        match loaded {
            Some(graph) => {
                let missing: Vec<ImageId> = live
                    .iter()
                    .filter(|id| !graph.contains(**id))
                    .copied()
                    .collect();
                store.graph = graph;
                let mut vectors = Vec::with_capacity(missing.len());
                for id in missing {
                    let vector = store.embedding(id)?.ok_or_else(|| StoreError::Corrupt {
                        path: dir.to_path_buf(),
                        key: keys::describe(&keys::embedding(id)),
                        reason: "image record without embedding".into(),
                    })?;
                    vectors.push((id, vector));
                }
                let items: Vec<(ImageId, &[f32])> =
                    vectors.iter().map(|(id, v)| (*id, v.as_slice())).collect();
                store.index_was_loaded = true;
                store.graph.insert(&items);
            }
            None => {
                store.rebuild_graph()?;
                // A rebuild is expensive; keep its result for the next open.
                if store.graph.len() > 0 || store.manifest.is_some() {
                    store.save_index()?;
                }
            }
        }
        store.remove_stale_dumps();
        Ok(store)
    }

    /// The store's directory, for messages that name it.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    pub fn fingerprint(&self) -> &ModelFingerprint {
        &self.fingerprint
    }

    pub fn params(&self) -> &HnswParams {
        &self.params
    }

    /// Sets the search-time candidate list size (see [`HnswParams::ef_search`]).
    pub fn set_ef_search(&mut self, ef_search: usize) {
        self.params.ef_search = ef_search;
    }

    /// Registers a root folder and returns its id; a root registered before keeps its id.
    pub fn add_root(&mut self, path: &Path) -> Result<u32, StoreError> {
        if let Some((id, _)) = self.roots.iter().find(|(_, p)| p == path) {
            return Ok(*id);
        }
        let text = path.to_str().ok_or_else(|| StoreError::NonUtf8Path {
            path: path.to_path_buf(),
        })?;
        let id = read_meta::<u32>(&self.db, &self.dir, keys::META_NEXT_ROOT)?.unwrap_or(0);
        let mut batch = sled::Batch::default();
        batch.insert(&keys::root(id), text.as_bytes());
        batch.insert(
            keys::META_NEXT_ROOT,
            encode(&(id + 1), keys::META_NEXT_ROOT)?,
        );
        self.apply_durably(batch)?;
        self.roots.push((id, path.to_path_buf()));
        Ok(id)
    }

    pub fn roots(&self) -> Vec<(u32, PathBuf)> {
        self.roots.clone()
    }

    pub fn id_for_path(&self, root: u32, rel_path: &str) -> Result<Option<ImageId>, StoreError> {
        let key = keys::path(root, rel_path);
        match self.db.get(&key).map_err(self.db_error())? {
            None => Ok(None),
            Some(value) => {
                let bytes: [u8; 8] = value.as_ref().try_into().map_err(|_| {
                    self.corrupt(&key, "path index entry is not an image id".into())
                })?;
                Ok(Some(ImageId::from_be_bytes(bytes)))
            }
        }
    }

    pub fn record(&self, id: ImageId) -> Result<Option<ImageRecord>, StoreError> {
        self.get_decoded(&keys::record(id))
    }

    /// The image's L2-normalised embedding.
    pub fn embedding(&self, id: ImageId) -> Result<Option<Vec<f32>>, StoreError> {
        let key = keys::embedding(id);
        match self.db.get(key).map_err(self.db_error())? {
            None => Ok(None),
            Some(bytes) => keys::decode_embedding(&bytes, self.fingerprint.dim)
                .map(Some)
                .ok_or_else(|| self.corrupt(&key, "embedding has the wrong length".into())),
        }
    }

    /// The embedding of any stored image whose file bytes hash to `hash`, so identical
    /// files are embedded once.
    pub fn embedding_by_content_hash(
        &self,
        hash: &[u8; 32],
    ) -> Result<Option<Vec<f32>>, StoreError> {
        let prefix = keys::content_hash_prefix(hash);
        let Some(entry) = self.db.scan_prefix(prefix).next() else {
            return Ok(None);
        };
        let (key, _) = entry.map_err(self.db_error())?;
        let id = keys::id_of_content_hash(&key)
            .ok_or_else(|| self.corrupt(&key, "content hash entry without image id".into()))?;
        self.embedding(id)
    }

    pub fn records(&self) -> impl Iterator<Item = Result<(ImageId, ImageRecord), StoreError>> + '_ {
        self.db.scan_prefix([keys::RECORD]).map(move |entry| {
            let (key, value) = entry.map_err(self.db_error())?;
            let id = keys::id_of(&key)
                .ok_or_else(|| self.corrupt(&key, "malformed record key".into()))?;
            let record = postcard::from_bytes(&value)
                .map_err(|error| self.corrupt(&key, error.to_string()))?;
            Ok((id, record))
        })
    }

    /// Every embedding, as ids and a row-major `ids.len() x dim` matrix.
    pub fn all_embeddings(&self) -> Result<(Vec<ImageId>, Vec<f32>), StoreError> {
        let dim = self.fingerprint.dim;
        let mut ids = Vec::with_capacity(self.live_count);
        let mut matrix = Vec::with_capacity(self.live_count * dim);
        for entry in self.db.scan_prefix([keys::EMBEDDING]) {
            let (key, value) = entry.map_err(self.db_error())?;
            let id = keys::id_of(&key)
                .ok_or_else(|| self.corrupt(&key, "malformed embedding key".into()))?;
            let vector = keys::decode_embedding(&value, dim)
                .ok_or_else(|| self.corrupt(&key, "embedding has the wrong length".into()))?;
            ids.push(id);
            matrix.extend_from_slice(&vector);
        }
        Ok((ids, matrix))
    }

    /// Applies `changes` atomically and durably; returns the id of each upsert, in order.
    ///
    /// Removals are applied first, then upserts, then recorded errors, then cleared
    /// errors. An upsert whose (normalised) embedding equals the one it replaces keeps
    /// the image id; otherwise the replaced image is removed and a new id is assigned.
    /// A successful upsert also clears any recorded error for its path.
    pub fn commit(&mut self, changes: ChangeSet) -> Result<Vec<ImageId>, StoreError> {
        if changes.is_empty() {
            return Ok(Vec::new());
        }
        let mut batch = sled::Batch::default();
        let mut next_id = read_meta::<u64>(&self.db, &self.dir, keys::META_NEXT_ID)?.unwrap_or(0);
        let removals: HashSet<ImageId> = changes.removals.iter().copied().collect();
        let mut removed: Vec<ImageId> = Vec::new();
        for &id in &removals {
            if let Some(record) = self.record(id)? {
                stage_unindex(&mut batch, id, &record);
                batch.remove(&keys::record(id));
                batch.remove(&keys::embedding(id));
                removed.push(id);
            }
        }

        let mut assigned = Vec::with_capacity(changes.upserts.len());
        let mut new_vectors: Vec<(ImageId, Vec<f32>)> = Vec::new();
        let mut seen_paths: HashSet<(u32, String)> = HashSet::new();
        let mut replaced: HashSet<ImageId> = HashSet::new();
        for upsert in changes.upserts {
            let record = upsert.record;
            let what = || format!("{} in root {}", record.rel_path, record.root);
            if !seen_paths.insert((record.root, record.rel_path.clone())) {
                return Err(StoreError::DuplicateInChangeSet {
                    root: record.root,
                    rel_path: record.rel_path,
                });
            }
            if !self.roots.iter().any(|(root, _)| *root == record.root) {
                return Err(StoreError::UnknownRoot {
                    root: record.root,
                    rel_path: record.rel_path,
                });
            }
            let vector = normalised(upsert.embedding, self.fingerprint.dim, what)?;
            let holder = self
                .id_for_path(record.root, &record.rel_path)?
                .filter(|id| !removals.contains(id));
            let previous = match upsert.replaces {
                Some(id) if removals.contains(&id) => {
                    return Err(StoreError::ConflictingChange { id })
                }
                Some(id) => {
                    if holder.is_some_and(|holder| holder != id) {
                        // The path belongs to another image that is not being removed.
                        return Err(StoreError::ConflictingChange { id });
                    }
                    Some(id)
                }
                None => holder,
            };
            let id = match previous {
                Some(old_id) => {
                    if !replaced.insert(old_id) {
                        return Err(StoreError::ConflictingChange { id: old_id });
                    }
                    let old_record = self
                        .record(old_id)?
                        .ok_or(StoreError::UnknownImage { id: old_id })?;
                    stage_unindex(&mut batch, old_id, &old_record);
                    if self.embedding(old_id)?.as_deref() == Some(vector.as_slice()) {
                        old_id
                    } else {
                        batch.remove(&keys::record(old_id));
                        batch.remove(&keys::embedding(old_id));
                        removed.push(old_id);
                        next_id += 1;
                        next_id - 1
                    }
                }
                None => {
                    next_id += 1;
                    next_id - 1
                }
            };
            let record_key = keys::record(id);
            batch.insert(&record_key, encode(&record, &record_key)?);
            batch.insert(keys::path(record.root, &record.rel_path), &id.to_be_bytes());
            batch.insert(&keys::content_hash(&record.content_hash, id)[..], &[]);
            batch.remove(keys::file_error(record.root, &record.rel_path));
            if previous != Some(id) {
                batch.insert(&keys::embedding(id), keys::encode_embedding(&vector));
                new_vectors.push((id, vector));
            }
            assigned.push(id);
        }

        for error in &changes.errors {
            let key = keys::file_error(error.root, &error.rel_path);
            let value = encode(error, &key)?;
            batch.insert(key, value);
        }
        for (root, rel_path) in &changes.cleared_errors {
            batch.remove(keys::file_error(*root, rel_path));
        }
        batch.insert(keys::META_NEXT_ID, encode(&next_id, keys::META_NEXT_ID)?);
        self.apply_durably(batch)?;

        self.live_count = self.live_count + new_vectors.len() - removed.len();
        for id in removed {
            self.graph.mark_removed(id);
        }
        let items: Vec<(ImageId, &[f32])> = new_vectors
            .iter()
            .map(|(id, v)| (*id, v.as_slice()))
            .collect();
        self.graph.insert(&items);
        Ok(assigned)
    }

    pub fn errors(&self) -> Result<Vec<FileError>, StoreError> {
        self.db
            .scan_prefix([keys::FILE_ERROR])
            .map(|entry| {
                let (key, value) = entry.map_err(self.db_error())?;
                postcard::from_bytes(&value).map_err(|error| self.corrupt(&key, error.to_string()))
            })
            .collect()
    }

    /// Number of images in the store.
    pub fn len(&self) -> usize {
        self.live_count
    }

    pub fn is_empty(&self) -> bool {
        self.live_count == 0
    }

    /// Up to `k` images nearest to `query` by cosine similarity, most similar first,
    /// restricted to ids for which `filter` (if any) returns true. `query` need not be
    /// normalised.
    ///
    /// The graph cannot delete nodes: the search steps through removed images and
    /// those `filter` rejects but never returns them, and keeps going until it holds
    /// `max(ef_search, k)` acceptable images or has seen every node it can reach. Each
    /// result is re-checked in sled.
    pub fn search(
        &self,
        query: &[f32],
        k: usize,
        filter: Option<&dyn Fn(ImageId) -> bool>,
    ) -> Result<Vec<(ImageId, f32)>, StoreError> {
        let query = normalised(query.to_vec(), self.fingerprint.dim, || "the query".into())?;
        if k == 0 || self.graph.len() == 0 {
            return Ok(Vec::new());
        }
        let candidates = self
            .graph
            .search(&query, self.params.ef_search.max(k), filter);
        let mut hits = Vec::with_capacity(k);
        for (id, similarity) in candidates {
            if !self
                .db
                .contains_key(keys::record(id))
                .map_err(self.db_error())?
            {
                continue;
            }
            hits.push((id, similarity));
            if hits.len() == k {
                break;
            }
        }
        Ok(hits)
    }

    /// Persists the graph: dumps it under a new generation, records that generation in
    /// sled, then deletes older dumps. Rebuilds first when too many nodes are removed
    /// images. Does nothing when the recorded dump already holds this graph (removals
    /// alone do not change it). Call at the end of an indexing run (and periodically
    /// during long ones).
    pub fn save_index(&mut self) -> Result<(), StoreError> {
        if self.graph.removed_count() as f64 > MAX_DEAD_FRACTION * self.graph.len() as f64 {
            self.rebuild_graph()?;
        }
        if !self.graph.has_unsaved_changes() {
            return Ok(());
        }
        let manifest = if self.graph.len() == 0 {
            None
        } else {
            let generation = self.manifest.as_ref().map_or(1, |m| m.generation + 1);
            let graph_dir = self.dir.join(GRAPH_DIR);
            Some(self.graph.dump(&graph_dir, generation)?)
        };
        match &manifest {
            // One insert of the manifest switches generations atomically; flush() makes
            // it durable (see `apply_durably`).
            Some(manifest) => {
                let value = encode(manifest, keys::META_INDEX)?;
                self.db
                    .insert(keys::META_INDEX, value)
                    .map_err(self.db_error())?;
            }
            None => {
                self.db.remove(keys::META_INDEX).map_err(self.db_error())?;
            }
        }
        self.db.flush().map_err(self.db_error())?;
        self.manifest = manifest;
        self.remove_stale_dumps();
        Ok(())
    }

    /// True when the graph was loaded from its dump at open rather than rebuilt.
    pub fn index_was_loaded(&self) -> bool {
        self.index_was_loaded
    }

    /// Size of the current dump files in bytes (0 before the first save).
    pub fn index_disk_bytes(&self) -> u64 {
        self.manifest.as_ref().map_or(0, IndexManifest::disk_bytes)
    }

    /// Replaces the graph with one built from sled's embeddings, in parallel.
    fn rebuild_graph(&mut self) -> Result<(), StoreError> {
        let (ids, matrix) = self.all_embeddings()?;
        let dim = self.fingerprint.dim;
        let items: Vec<(ImageId, &[f32])> = ids
            .iter()
            .zip(matrix.chunks_exact(dim.max(1)))
            .map(|(id, vector)| (*id, vector))
            .collect();
        info!(store = %self.dir.display(), images = items.len(), "building the hnsw index");
        self.graph = Graph::build(&self.params, dim, &items);
        self.index_was_loaded = false;
        Ok(())
    }

    /// Deletes dump files other than the current manifest's. Failing to delete one only
    /// wastes disk space, so it is logged, not returned.
    fn remove_stale_dumps(&self) {
        let graph_dir = self.dir.join(GRAPH_DIR);
        let current: HashSet<&str> = self
            .manifest
            .iter()
            .flat_map(|m| m.files.iter().map(|f| f.name.as_str()))
            .collect();
        let entries = match fs::read_dir(&graph_dir) {
            Ok(entries) => entries,
            Err(error) => {
                warn!(dir = %graph_dir.display(), %error, "cannot list hnsw dumps");
                return;
            }
        };
        for entry in entries.flatten() {
            let name = entry.file_name();
            let Some(name) = name.to_str() else { continue };
            if graph::is_dump_file_name(name) && !current.contains(name) {
                if let Err(error) = fs::remove_file(entry.path()) {
                    warn!(file = %entry.path().display(), %error, "cannot delete old hnsw dump");
                }
            }
        }
    }

    /// Applies `batch` atomically and makes it durable.
    ///
    /// sled 0.34: `apply_batch` applies all writes of a `Batch` to one tree atomically
    /// (readers and recovery see all or none of them). `flush` "synchronously flushes all
    /// dirty IO buffers and calls fsync. If this succeeds, it is guaranteed that all
    /// previous writes will be recovered if the system crashes" (sled's doc comment).
    fn apply_durably(&self, batch: sled::Batch) -> Result<(), StoreError> {
        self.db.apply_batch(batch).map_err(self.db_error())?;
        self.db.flush().map_err(self.db_error())?;
        Ok(())
    }

    fn read_roots(&self) -> Result<Vec<(u32, PathBuf)>, StoreError> {
        self.db
            .scan_prefix([keys::ROOT])
            .map(|entry| {
                let (key, value) = entry.map_err(self.db_error())?;
                let id = keys::root_of(&key)
                    .ok_or_else(|| self.corrupt(&key, "malformed root key".into()))?;
                let path = std::str::from_utf8(&value)
                    .map_err(|_| self.corrupt(&key, "root path is not UTF-8".into()))?;
                Ok((id, PathBuf::from(path)))
            })
            .collect()
    }

    fn live_ids(&self) -> Result<HashSet<ImageId>, StoreError> {
        self.db
            .scan_prefix([keys::RECORD])
            .map(|entry| {
                let (key, _) = entry.map_err(self.db_error())?;
                keys::id_of(&key).ok_or_else(|| self.corrupt(&key, "malformed record key".into()))
            })
            .collect()
    }

    fn get_decoded<T: DeserializeOwned>(&self, key: &[u8]) -> Result<Option<T>, StoreError> {
        match self.db.get(key).map_err(self.db_error())? {
            None => Ok(None),
            Some(bytes) => postcard::from_bytes(&bytes)
                .map(Some)
                .map_err(|error| self.corrupt(key, error.to_string())),
        }
    }

    fn db_error(&self) -> impl Fn(sled::Error) -> StoreError + '_ {
        database_error(&self.dir)
    }

    fn corrupt(&self, key: &[u8], reason: String) -> StoreError {
        StoreError::Corrupt {
            path: self.dir.clone(),
            key: keys::describe(key),
            reason,
        }
    }
}

/// Removes the path and content-hash index entries of an image.
fn stage_unindex(batch: &mut sled::Batch, id: ImageId, record: &ImageRecord) {
    batch.remove(keys::path(record.root, &record.rel_path));
    batch.remove(&keys::content_hash(&record.content_hash, id)[..]);
}

/// `vector` scaled to unit L2 norm, after checking its dimension and values.
fn normalised(
    mut vector: Vec<f32>,
    dim: usize,
    what: impl Fn() -> String,
) -> Result<Vec<f32>, StoreError> {
    if vector.len() != dim {
        return Err(StoreError::DimensionMismatch {
            what: what(),
            expected: dim,
            found: vector.len(),
        });
    }
    let norm = dot(&vector, &vector).sqrt();
    if !norm.is_finite() || norm == 0.0 || vector.iter().any(|x| !x.is_finite()) {
        return Err(StoreError::InvalidEmbedding { what: what() });
    }
    vector.iter_mut().for_each(|x| *x /= norm);
    Ok(vector)
}

/// How long opening waits for sled's file lock. A store dropped a moment ago keeps
/// the lock until sled's background flusher thread has exited, so an immediate
/// reopen in the same process (a restart, a test) would otherwise fail at random.
const LOCK_WAIT: Duration = Duration::from_secs(5);

fn open_db(dir: &Path) -> Result<sled::Db, StoreError> {
    let started = Instant::now();
    loop {
        match sled::Config::new().path(dir.join(DB_DIR)).open() {
            // sled reports a held lock only as an `Other` i/o error with this message.
            Err(sled::Error::Io(error))
                if error.to_string().starts_with("could not acquire lock") =>
            {
                if started.elapsed() >= LOCK_WAIT {
                    return Err(StoreError::InUse {
                        path: dir.to_path_buf(),
                        waited: LOCK_WAIT,
                    });
                }
                std::thread::sleep(Duration::from_millis(20));
            }
            result => return result.map_err(database_error(dir)),
        }
    }
}

fn database_error(dir: &Path) -> impl Fn(sled::Error) -> StoreError + '_ {
    move |source| StoreError::Database {
        path: dir.to_path_buf(),
        source,
    }
}

fn check_format(dir: &Path, found: u32) -> Result<(), StoreError> {
    if found > FORMAT_VERSION {
        return Err(StoreError::NewerFormat {
            path: dir.to_path_buf(),
            found,
            supported: FORMAT_VERSION,
        });
    }
    if found < OLDEST_READABLE_FORMAT {
        return Err(StoreError::OlderFormat {
            path: dir.to_path_buf(),
            found,
            oldest_readable: OLDEST_READABLE_FORMAT,
        });
    }
    Ok(())
}

fn read_fingerprint(db: &sled::Db, dir: &Path) -> Result<ModelFingerprint, StoreError> {
    read_meta(db, dir, keys::META_FINGERPRINT)?.ok_or_else(|| StoreError::Corrupt {
        path: dir.to_path_buf(),
        key: keys::describe(keys::META_FINGERPRINT),
        reason: "missing".into(),
    })
}

fn read_meta<T: DeserializeOwned>(
    db: &sled::Db,
    dir: &Path,
    key: &[u8],
) -> Result<Option<T>, StoreError> {
    match db.get(key).map_err(database_error(dir))? {
        None => Ok(None),
        Some(bytes) => {
            postcard::from_bytes(&bytes)
                .map(Some)
                .map_err(|error| StoreError::Corrupt {
                    path: dir.to_path_buf(),
                    key: keys::describe(key),
                    reason: error.to_string(),
                })
        }
    }
}

fn encode<T: Serialize + ?Sized>(value: &T, key: &[u8]) -> Result<Vec<u8>, StoreError> {
    postcard::to_allocvec(value).map_err(|error| StoreError::Encode {
        key: keys::describe(key),
        reason: error.to_string(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fingerprint() -> ModelFingerprint {
        ModelFingerprint {
            model_id: "test-vit".into(),
            weights_sha256: "ffeeddccbbaa99887766".into(),
            preprocess: "resize-224".into(),
            pooling: "cls".into(),
            dim: 4,
        }
    }

    fn rewrite_format(dir: &Path, version: u32) {
        let db = open_db(dir).unwrap();
        db.insert(
            keys::META_FORMAT,
            encode(&version, keys::META_FORMAT).unwrap(),
        )
        .unwrap();
        db.flush().unwrap();
    }

    #[test]
    fn newer_format_names_found_and_supported_versions() {
        let dir = tempfile::tempdir().unwrap();
        drop(Store::create_or_open(dir.path(), &fingerprint()).unwrap());
        rewrite_format(dir.path(), FORMAT_VERSION + 1);
        for result in [
            Store::open(dir.path()),
            Store::create_or_open(dir.path(), &fingerprint()),
        ] {
            let error = result.err().expect("a newer format must be refused");
            let message = error.to_string();
            assert!(matches!(error, StoreError::NewerFormat { .. }));
            assert!(
                message.contains(&format!("format version {}", FORMAT_VERSION + 1)),
                "{message}"
            );
            assert!(
                message.contains(&format!("(format version {FORMAT_VERSION})")),
                "{message}"
            );
        }
    }

    #[test]
    fn older_unreadable_format_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        drop(Store::create_or_open(dir.path(), &fingerprint()).unwrap());
        rewrite_format(dir.path(), OLDEST_READABLE_FORMAT - 1);
        let error = Store::open(dir.path()).err().expect("must be refused");
        assert!(matches!(error, StoreError::OlderFormat { .. }), "{error}");
    }

    #[test]
    fn self_similarity_is_one_without_panicking() {
        // Rounding makes dot > 1 for some unit vectors compared with themselves (which
        // hnsw_rs' own distance asserts against). Search for each stored vector exactly.
        let dir = tempfile::tempdir().unwrap();
        let mut store = Store::create_or_open(dir.path(), &fingerprint()).unwrap();
        store.add_root(Path::new("/r")).unwrap();
        let vectors: Vec<Vec<f32>> = (1..200)
            .map(|i| {
                let x = i as f32;
                vec![x.sin(), (x * 0.7).cos(), (x * 1.3).sin(), 0.3]
            })
            .collect();
        let upserts = vectors
            .iter()
            .enumerate()
            .map(|(i, v)| crate::Upsert {
                replaces: None,
                record: ImageRecord {
                    root: 0,
                    rel_path: format!("{i}.png"),
                    byte_size: 1,
                    modified_unix_ns: 0,
                    content_hash: [0; 32],
                    pixel_hash: [0; 32],
                    width: 1,
                    height: 1,
                    split: None,
                    label: None,
                },
                embedding: v.clone(),
            })
            .collect();
        let ids = store
            .commit(ChangeSet {
                upserts,
                ..ChangeSet::default()
            })
            .unwrap();
        for (id, vector) in ids.iter().zip(&vectors) {
            let hits = store.search(vector, 1, None).unwrap();
            assert_eq!(hits[0].0, *id);
            assert!((hits[0].1 - 1.0).abs() < 1e-5);
        }
    }
}
