//! One served collection: its store, the snapshot readers use, and memos of
//! expensive whole-collection answers.
//!
//! Concurrency: the [`Store`] sits behind a read-write lock and everything a
//! reader needs besides HNSW searches (records, embeddings, roots, errors)
//! lives in an immutable [`Snapshot`] behind an `Arc` that readers clone. A
//! writer (an index job) holds the write lock while it writes and, before
//! releasing it, installs a fresh snapshot, so a reader holding the read lock
//! always sees a snapshot that matches the store. The engine's indexer needs
//! `&mut Store` for its whole run, so while a job runs neighbour queries are
//! answered by exact search over the last snapshot (the true nearest
//! neighbours of the last committed state) instead of waiting, and
//! whole-collection analyses wait a bounded time and then answer 503.

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicU8, Ordering};
use std::sync::{Arc, OnceLock};
use std::time::Duration;

use parking_lot::{Mutex, RwLock};
use serde::Serialize;
use utoipa::ToSchema;
use vitrine_engine::catalog::{dot, Catalog};
use vitrine_engine::clusters::{ClusterOptions, ClusterReport};
use vitrine_engine::decisions::{self, Action, DecisionState, LoggedDecision};
use vitrine_engine::duplicates::{DuplicateOptions, DuplicateReport, LeakOptions, LeakReport};
use vitrine_engine::labels::{LabelOptions, SuggestionReport, SuspectReport};
use vitrine_engine::neighbours::{
    check_k, nearest_to_image, nearest_to_vector, Neighbour, NeighbourFilter,
};
use vitrine_engine::verify::{PairVerifier, VerifyOptions};
use vitrine_engine::EngineError;
use vitrine_model::encoder::Encoder;
use vitrine_store::{FileError, ImageId, ModelFingerprint, Store};

use crate::error::ApiError;

/// How long recording a decision waits for an index job to release the store.
const BUSY_WAIT_FOR_DECISIONS: Duration = Duration::from_secs(5);

/// Everything readers need about a collection at one committed state.
pub struct Snapshot {
    pub catalog: Catalog,
    pub errors: Vec<FileError>,
    pub fingerprint: ModelFingerprint,
    pub roots: Vec<(u32, PathBuf)>,
    pub index_disk_bytes: u64,
    /// Increases with every installed snapshot; keys the memos.
    pub generation: u64,
}

impl Snapshot {
    fn load(store: &Store, generation: u64) -> Result<Self, EngineError> {
        Ok(Self {
            catalog: Catalog::load(store)?,
            errors: store.errors()?,
            fingerprint: store.fingerprint().clone(),
            roots: store.roots(),
            index_disk_bytes: store.index_disk_bytes(),
            generation,
        })
    }
}

/// The last answer computed for one key at one generation.
pub struct Memo<K, V> {
    slot: Mutex<Option<(u64, K, Arc<V>)>>,
}

impl<K: PartialEq, V> Default for Memo<K, V> {
    fn default() -> Self {
        Self {
            slot: Mutex::new(None),
        }
    }
}

impl<K: PartialEq, V> Memo<K, V> {
    /// The memoised answer for (`generation`, `key`), else `compute`'s, kept.
    /// Concurrent callers wait for one computation rather than repeat it.
    pub fn get_or_try<E>(
        &self,
        generation: u64,
        key: K,
        compute: impl FnOnce() -> Result<V, E>,
    ) -> Result<Arc<V>, E> {
        let mut slot = self.slot.lock();
        if let Some((g, k, value)) = slot.as_ref() {
            if *g == generation && *k == key {
                return Ok(value.clone());
            }
        }
        let value = Arc::new(compute()?);
        *slot = Some((generation, key, value.clone()));
        Ok(value)
    }
}

/// Where the default duplicate and leak reports of a collection stand.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum PrecomputedReports {
    /// Not computed at start (`precompute = false`): the first reader computes them.
    Off,
    /// Waiting for another collection's reports to finish.
    Queued,
    Computing,
    Ready,
    /// Computing them failed (logged); the first reader tries again.
    Failed,
}

impl PrecomputedReports {
    /// In declaration order, so that `ALL[state as usize] == state`.
    const ALL: [Self; 5] = [
        Self::Off,
        Self::Queued,
        Self::Computing,
        Self::Ready,
        Self::Failed,
    ];
}

/// What a neighbour query starts from.
pub enum Query<'a> {
    Image(ImageId),
    Vector(&'a [f32]),
}

pub struct Collection {
    pub name: String,
    pub dir: PathBuf,
    store: RwLock<Store>,
    snapshot: RwLock<Arc<Snapshot>>,
    generations: AtomicU64,
    /// Duplicate reports by their options and the decisions they saw.
    pub duplicates: Memo<(DuplicateOptions, u64), DuplicateReport>,
    /// Leak reports by their options and the decisions they saw.
    pub leaks: Memo<(LeakOptions, u64), LeakReport>,
    /// Counts recorded decisions, so that reports made before one are not served after it.
    decisions_recorded: AtomicU64,
    /// The decision log replayed for the snapshot generation it was loaded
    /// at. Held while a decision is checked against it and appended, so that
    /// two reviewers deciding on one item cannot both pass the check.
    decisions: Mutex<Option<(u64, DecisionState)>>,
    /// Lives as long as the collection, so that pair verdicts outlast one
    /// query: another threshold or a new generation re-checks only new pairs.
    verifier: OnceLock<Arc<PairVerifier>>,
    /// Set when the service shuts down: verification stops, now and later.
    verification_stopped: AtomicBool,
    /// A [`PrecomputedReports`] as its discriminant.
    precomputed: AtomicU8,
    /// Clusterings by their options.
    pub clusters: Memo<ClusterOptions, ClusterReport>,
    /// Label suggestions by their options.
    pub label_suggestions: Memo<LabelOptions, SuggestionReport>,
    /// Label suspects by their options.
    pub label_suspects: Memo<LabelOptions, SuspectReport>,
}

impl Collection {
    pub fn open(name: String, dir: PathBuf) -> Result<Self, EngineError> {
        let store = Store::open(&dir)?;
        let snapshot = Snapshot::load(&store, 0)?;
        Ok(Self {
            name,
            dir,
            store: RwLock::new(store),
            snapshot: RwLock::new(Arc::new(snapshot)),
            generations: AtomicU64::new(0),
            duplicates: Memo::default(),
            leaks: Memo::default(),
            decisions_recorded: AtomicU64::new(0),
            decisions: Mutex::new(None),
            verifier: OnceLock::new(),
            verification_stopped: AtomicBool::new(false),
            precomputed: AtomicU8::new(0),
            clusters: Memo::default(),
            label_suggestions: Memo::default(),
            label_suspects: Memo::default(),
        })
    }

    /// The collection's near-duplicate verifier, made with `encoder` on first use
    /// (the service has one model, checked against the collection by the caller).
    pub fn verifier(&self, encoder: Arc<Encoder>) -> Arc<PairVerifier> {
        let verifier = self
            .verifier
            .get_or_init(|| Arc::new(PairVerifier::new(encoder, VerifyOptions::default())));
        // A verifier made while the service stops is stopped too.
        if self.verification_stopped.load(Ordering::SeqCst) {
            verifier.stop();
        }
        verifier.clone()
    }

    /// Stops verification in this collection, now and later (see
    /// [`PairVerifier::stop`]).
    pub fn stop_verification(&self) {
        self.verification_stopped.store(true, Ordering::SeqCst);
        if let Some(verifier) = self.verifier.get() {
            verifier.stop();
        }
    }

    pub fn precomputed_reports(&self) -> PrecomputedReports {
        PrecomputedReports::ALL[usize::from(self.precomputed.load(Ordering::SeqCst))]
    }

    pub fn set_precomputed_reports(&self, state: PrecomputedReports) {
        self.precomputed.store(state as u8, Ordering::SeqCst);
    }

    pub fn verification_stopped(&self) -> bool {
        self.verification_stopped.load(Ordering::SeqCst)
    }

    /// How many decisions this service has recorded: part of the memo keys of
    /// the reports that decisions change.
    pub fn decisions_recorded(&self) -> u64 {
        self.decisions_recorded.load(Ordering::SeqCst)
    }

    /// Checks and appends a decision (see [`decisions::record`]), one at a time.
    pub fn record_decision(
        &self,
        by: &str,
        action: Action,
        seen: Option<u64>,
    ) -> Result<LoggedDecision, ApiError> {
        let mut cached = self.decisions.lock();
        let recorded = self.with_store(BUSY_WAIT_FOR_DECISIONS, |store, snapshot| {
            let state = match &mut *cached {
                Some((generation, state)) if *generation == snapshot.generation => state,
                stale => {
                    let state = DecisionState::load(store, &snapshot.catalog)?;
                    &mut stale.insert((snapshot.generation, state)).1
                }
            };
            decisions::record(store, &snapshot.catalog, state, by, action, seen)
                .map_err(ApiError::from)
        })?;
        self.decisions_recorded.fetch_add(1, Ordering::SeqCst);
        Ok(recorded)
    }

    /// The current snapshot; cheap.
    pub fn snapshot(&self) -> Arc<Snapshot> {
        self.snapshot.read().clone()
    }

    /// Runs `f` with shared access to the store and its matching snapshot,
    /// waiting at most `wait` for a writer to finish.
    pub fn with_store<R>(
        &self,
        wait: Duration,
        f: impl FnOnce(&Store, &Snapshot) -> Result<R, ApiError>,
    ) -> Result<R, ApiError> {
        let store = self.store.try_read_for(wait).ok_or_else(|| {
            ApiError::unavailable(
                "collection_busy",
                format!(
                    "an index job is writing collection `{}`; retry when it finishes",
                    self.name
                ),
            )
        })?;
        let snapshot = self.snapshot();
        f(&store, &snapshot)
    }

    /// Runs a writer with exclusive access to the store, then installs a new
    /// snapshot before other threads can see the store again (also when the
    /// writer failed half-way: what it committed is visible).
    pub fn write<R>(
        &self,
        f: impl FnOnce(&mut Store) -> Result<R, EngineError>,
    ) -> Result<R, EngineError> {
        let mut store = self.store.write();
        let outcome = f(&mut store);
        let generation = self.generations.fetch_add(1, Ordering::SeqCst) + 1;
        let fresh = Snapshot::load(&store, generation)?;
        *self.snapshot.write() = Arc::new(fresh);
        outcome
    }

    /// Up to `k` nearest neighbours, best first: from the HNSW index when the
    /// store is free, else exactly from the snapshot (see the module comment).
    pub fn nearest(
        &self,
        query: Query<'_>,
        k: usize,
        filter: &NeighbourFilter,
    ) -> Result<Vec<Neighbour>, ApiError> {
        if let Some(store) = self.store.try_read() {
            let snapshot = self.snapshot();
            let catalog = &snapshot.catalog;
            return Ok(match query {
                Query::Image(id) => nearest_to_image(&store, catalog, id, k, filter)?,
                Query::Vector(vector) => {
                    let unit = unit_query(catalog, vector)?;
                    nearest_to_vector(&store, catalog, &unit, k, filter, None)?
                }
            });
        }
        let snapshot = self.snapshot();
        exact_nearest(&snapshot.catalog, query, k, filter)
    }
}

/// The query vector scaled to unit length, once checked to have the
/// collection's dimension and a finite, non-zero length.
fn unit_query(catalog: &Catalog, vector: &[f32]) -> Result<Vec<f32>, ApiError> {
    if vector.len() != catalog.dim {
        return Err(ApiError::bad_request(
            "dimension_mismatch",
            format!(
                "query vector has {} dimensions, the collection has {}",
                vector.len(),
                catalog.dim
            ),
        ));
    }
    let norm = dot(vector, vector).sqrt();
    if !norm.is_normal() {
        return Err(ApiError::bad_request(
            "invalid_vector",
            "query vector is not a finite, non-zero vector",
        ));
    }
    Ok(vector.iter().map(|v| v / norm).collect())
}

/// Brute-force nearest neighbours over a catalog, with the same validation
/// and exclusions as the engine's index search.
fn exact_nearest(
    catalog: &Catalog,
    query: Query<'_>,
    k: usize,
    filter: &NeighbourFilter,
) -> Result<Vec<Neighbour>, ApiError> {
    let (vector, exclude) = match query {
        Query::Image(id) => {
            let row = catalog.row(id).ok_or(EngineError::UnknownImage(id))?;
            (catalog.embedding_at(row).to_vec(), Some(row))
        }
        Query::Vector(vector) => (unit_query(catalog, vector)?, None),
    };
    check_k(k)?;
    let mut scored: Vec<(usize, f32)> = (0..catalog.len())
        .filter(|&row| Some(row) != exclude && filter.accepts_record(&catalog.records[row]))
        .map(|row| (row, dot(&vector, catalog.embedding_at(row))))
        .collect();
    if scored.is_empty() {
        filter.check_matches_some(catalog)?;
    }
    scored.sort_unstable_by(|a, b| b.1.total_cmp(&a.1));
    scored.truncate(k);
    Ok(scored
        .into_iter()
        .map(|(row, similarity)| Neighbour {
            image: catalog.image_ref(row),
            similarity,
        })
        .collect())
}
