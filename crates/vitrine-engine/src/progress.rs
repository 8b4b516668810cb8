//! Progress of long work (indexing, near-pair checks, calibration), reported
//! to whoever shows it: the command line draws a bar or logs lines, the
//! service counts a job's files.

/// Receives progress. `begin` may be called more than once (once per root,
/// say); each call starts a new stretch of `total` steps.
pub trait Progress: Sync {
    /// Work of `total` steps starts; `steps` names what a step is ("images").
    fn begin(&self, steps: &str, total: u64);
    fn advance(&self, done: u64);
    fn finish(&self);
}

/// A progress sink that reports nothing.
pub struct NoProgress;

impl Progress for NoProgress {
    fn begin(&self, _: &str, _: u64) {}
    fn advance(&self, _: u64) {}
    fn finish(&self) {}
}
