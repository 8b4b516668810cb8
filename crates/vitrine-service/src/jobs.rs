//! Background jobs (rescans, uploads, clustering): each runs on its own
//! thread once one of a fixed number of slots is free, and reports its state
//! and progress to a table that clients poll by job id.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{SystemTime, UNIX_EPOCH};

use parking_lot::{Condvar, Mutex};
use serde::Serialize;
use utoipa::ToSchema;
use vitrine_engine::ingest::IndexReport;
use vitrine_engine::progress::Progress;

use crate::error::ApiError;

/// Finished jobs remembered for polling; older ones are forgotten.
const FINISHED_JOBS_KEPT: usize = 1000;

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum JobKind {
    /// Re-index every root of the collection.
    Rescan,
    /// Index images just uploaded.
    Upload,
    /// Recompute the clustering.
    Clusters,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum JobState {
    Queued,
    Running,
    Succeeded,
    Failed,
}

impl JobState {
    pub const ALL: [JobState; 4] = [
        JobState::Queued,
        JobState::Running,
        JobState::Succeeded,
        JobState::Failed,
    ];

    pub fn name(self) -> &'static str {
        match self {
            JobState::Queued => "queued",
            JobState::Running => "running",
            JobState::Succeeded => "succeeded",
            JobState::Failed => "failed",
        }
    }
}

/// Counts of an index run.
#[derive(Clone, Debug, Default, Serialize, ToSchema)]
pub struct IndexCounts {
    pub new: usize,
    pub changed: usize,
    pub unchanged: usize,
    pub removed: usize,
    pub failed: usize,
    pub reused_embeddings: usize,
}

impl From<IndexReport> for IndexCounts {
    fn from(r: IndexReport) -> Self {
        Self {
            new: r.new,
            changed: r.changed,
            unchanged: r.unchanged,
            removed: r.removed,
            failed: r.failed,
            reused_embeddings: r.reused_embeddings,
        }
    }
}

#[derive(Clone, Debug, Serialize, ToSchema)]
pub struct JobProgress {
    /// Files processed so far.
    pub done: u64,
    /// Files to process (known once the walk is over; 0 before).
    pub total: u64,
}

/// A job as clients see it.
#[derive(Clone, Debug, Serialize, ToSchema)]
pub struct JobStatus {
    pub id: u64,
    pub kind: JobKind,
    pub collection: String,
    pub state: JobState,
    pub progress: JobProgress,
    /// Index counts, once an index job has succeeded.
    pub counts: Option<IndexCounts>,
    /// Why the job failed.
    pub error: Option<String>,
    pub created_unix_s: u64,
    pub started_unix_s: Option<u64>,
    pub finished_unix_s: Option<u64>,
}

/// A job's shared state; also the progress sink of an index run.
pub struct Job {
    status: Mutex<JobStatus>,
    done: AtomicU64,
    total: AtomicU64,
}

impl Job {
    fn status(&self) -> JobStatus {
        let mut status = self.status.lock().clone();
        status.progress = JobProgress {
            done: self.done.load(Ordering::Relaxed),
            total: self.total.load(Ordering::Relaxed),
        };
        status
    }

    fn finish(&self, outcome: Result<Option<IndexCounts>, String>) {
        let mut status = self.status.lock();
        status.finished_unix_s = Some(now_unix_s());
        match outcome {
            Ok(counts) => {
                status.state = JobState::Succeeded;
                status.counts = counts;
            }
            Err(error) => {
                status.state = JobState::Failed;
                status.error = Some(error);
            }
        }
    }
}

impl Progress for Job {
    // Called once per root: totals add up over the roots.
    fn begin(&self, _steps: &str, files_to_process: u64) {
        self.total.fetch_add(files_to_process, Ordering::Relaxed);
    }
    fn advance(&self, files_done: u64) {
        self.done.fetch_add(files_done, Ordering::Relaxed);
    }
    fn finish(&self) {}
}

fn now_unix_s() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_secs())
}

/// The work of a job: index counts for index jobs, or an error message.
pub type JobWork = Box<dyn FnOnce(&Job) -> Result<Option<IndexCounts>, String> + Send>;

pub struct Jobs {
    next_id: AtomicU64,
    table: Mutex<BTreeMap<u64, Arc<Job>>>,
    free_slots: Mutex<usize>,
    slot_freed: Condvar,
    closing: AtomicBool,
    threads: Mutex<Vec<JoinHandle<()>>>,
    /// Where jobs run their parallel work (see [`background_pool`]).
    pool: Arc<rayon::ThreadPool>,
}

impl Jobs {
    pub fn new(slots: usize, pool: Arc<rayon::ThreadPool>) -> Self {
        Self {
            pool,
            next_id: AtomicU64::new(1),
            table: Mutex::new(BTreeMap::new()),
            free_slots: Mutex::new(slots.max(1)),
            slot_freed: Condvar::new(),
            closing: AtomicBool::new(false),
            threads: Mutex::new(Vec::new()),
        }
    }

    /// Queues `work`; it starts when a slot is free.
    pub fn submit(
        self: &Arc<Self>,
        kind: JobKind,
        collection: &str,
        work: JobWork,
    ) -> Result<JobStatus, ApiError> {
        if self.closing.load(Ordering::SeqCst) {
            return Err(ApiError::unavailable(
                "shutting_down",
                "the server is shutting down and takes no new jobs",
            ));
        }
        let id = self.next_id.fetch_add(1, Ordering::Relaxed);
        let job = Arc::new(Job {
            status: Mutex::new(JobStatus {
                id,
                kind,
                collection: collection.to_owned(),
                state: JobState::Queued,
                progress: JobProgress { done: 0, total: 0 },
                counts: None,
                error: None,
                created_unix_s: now_unix_s(),
                started_unix_s: None,
                finished_unix_s: None,
            }),
            done: AtomicU64::new(0),
            total: AtomicU64::new(0),
        });
        self.remember(id, job.clone());
        let jobs = self.clone();
        let thread_job = job.clone();
        let handle = std::thread::Builder::new()
            .name(format!("vitrine-job-{id}"))
            .spawn(move || jobs.run(&thread_job, work))
            .map_err(|e| ApiError::internal(format!("cannot start a job thread: {e}")))?;
        let mut threads = self.threads.lock();
        threads.retain(|t| !t.is_finished());
        threads.push(handle);
        Ok(job.status())
    }

    fn remember(&self, id: u64, job: Arc<Job>) {
        let mut table = self.table.lock();
        table.insert(id, job);
        let finished: Vec<u64> = table
            .iter()
            .filter(|(_, j)| j.status.lock().finished_unix_s.is_some())
            .map(|(&id, _)| id)
            .collect();
        for id in finished
            .iter()
            .take(finished.len().saturating_sub(FINISHED_JOBS_KEPT))
        {
            table.remove(id);
        }
    }

    fn run(&self, job: &Job, work: JobWork) {
        {
            let mut free = self.free_slots.lock();
            while *free == 0 && !self.closing.load(Ordering::SeqCst) {
                self.slot_freed.wait(&mut free);
            }
            if self.closing.load(Ordering::SeqCst) {
                job.finish(Err(
                    "cancelled: the server shut down before the job started".into(),
                ));
                return;
            }
            *free -= 1;
        }
        {
            let mut status = job.status.lock();
            status.state = JobState::Running;
            status.started_unix_s = Some(now_unix_s());
        }
        // A panicking job must not keep its slot for ever. The work runs on the
        // background pool only once it has its slot, so that no pool thread
        // sits waiting for one.
        let outcome = self
            .pool
            .install(|| std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| work(job))))
            .unwrap_or_else(|_| Err("the job failed unexpectedly; see the server log".into()));
        job.finish(outcome);
        *self.free_slots.lock() += 1;
        self.slot_freed.notify_one();
    }

    pub fn get(&self, id: u64) -> Option<JobStatus> {
        self.table.lock().get(&id).map(|job| job.status())
    }

    /// How many remembered jobs are in each state.
    pub fn count_by_state(&self) -> BTreeMap<JobState, usize> {
        let mut counts: BTreeMap<JobState, usize> = JobState::ALL.iter().map(|&s| (s, 0)).collect();
        for job in self.table.lock().values() {
            *counts.entry(job.status.lock().state).or_default() += 1;
        }
        counts
    }

    /// Takes no new jobs, cancels queued ones and waits for running ones to
    /// finish, so that no index run is cut between two commits.
    pub fn shut_down(&self) {
        self.closing.store(true, Ordering::SeqCst);
        self.slot_freed.notify_all();
        let threads: Vec<JoinHandle<()>> = std::mem::take(&mut *self.threads.lock());
        if !threads.is_empty() {
            tracing::info!("waiting for {} background jobs to finish", threads.len());
        }
        for thread in threads {
            if thread.join().is_err() {
                tracing::error!("a background job panicked");
            }
        }
    }
}

/// The thread pool of background work (index jobs, precomputed reports).
/// Interactive requests (a search by upload, a neighbour query) run their
/// parallel work on rayon's global pool instead: rayon's workers finish
/// their own queue before taking outside work, so sharing one pool made a
/// search wait for a whole round of background verification. With two pools
/// the operating system shares the cores between them.
pub fn background_pool() -> Result<rayon::ThreadPool, rayon::ThreadPoolBuildError> {
    rayon::ThreadPoolBuilder::new()
        .thread_name(|i| format!("vitrine-background-{i}"))
        .build()
}
