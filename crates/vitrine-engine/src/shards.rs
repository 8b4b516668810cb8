//! One collection embedded in pieces, for collections that outgrow one
//! machine: part I of N of the files under the roots (chosen by a stable hash
//! of each root-relative path) is embedded without a store, anywhere, and any
//! number of parts are merged into one store without a forward pass. A whole
//! store can be taken out in the same shape (`from_store`).
//!
//! The rows of a shard are sorted by root and path, and carry nothing that
//! depends on when or where they were made (no failure times), so embedding
//! the same part of the same files again gives the same shard.

use std::collections::{HashMap, HashSet};
use std::fmt;
use std::path::PathBuf;
use std::str::FromStr;
use std::time::Instant;

use vitrine_model::encoder::Encoder;
use vitrine_store::{ChangeSet, FileError, ImageId, ImageRecord, ModelFingerprint, Store, Upsert};

use crate::error::EngineError;
use crate::ingest::{
    embed_chunk, fingerprint_of, now_unix_s, resolve_roots, IndexOptions, IndexReport, Pending,
};
use crate::progress::Progress;
use crate::walk::walk_root;

/// Part `index` of `count` (written `I/N`, counted from 0).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct ShardPart {
    pub index: u32,
    pub count: u32,
}

impl ShardPart {
    /// Whether a file with this root-relative path belongs to this part.
    pub fn holds(&self, rel_path: &str) -> bool {
        part_of(rel_path, self.count) == self.index
    }
}

/// The part a root-relative path falls into: the first eight bytes of its
/// BLAKE3 hash, little-endian, modulo `count`. Stable across machines,
/// platforms and releases (a format promise: shards of one run must agree).
pub fn part_of(rel_path: &str, count: u32) -> u32 {
    let hash = blake3::hash(rel_path.as_bytes());
    let mut first = [0u8; 8];
    first.copy_from_slice(&hash.as_bytes()[..8]);
    (u64::from_le_bytes(first) % u64::from(count.max(1))) as u32
}

impl fmt::Display for ShardPart {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

impl FromStr for ShardPart {
    type Err = EngineError;

    fn from_str(text: &str) -> Result<Self, Self::Err> {
        let invalid = || {
            EngineError::InvalidArgument(format!(
                "shard `{text}` is not I/N with 0 <= I < N (for example 0/4, the first of four)"
            ))
        };
        let (index, count) = text.split_once('/').ok_or_else(invalid)?;
        let index: u32 = index.trim().parse().map_err(|_| invalid())?;
        let count: u32 = count.trim().parse().map_err(|_| invalid())?;
        if count == 0 || index >= count {
            return Err(invalid());
        }
        Ok(ShardPart { index, count })
    }
}

/// An image of a shard: its record (`record.root` is an index into
/// [`Shard::roots`]) and its embedding as the model gave it.
#[derive(Clone, Debug, PartialEq)]
pub struct ShardImage {
    pub record: ImageRecord,
    pub embedding: Vec<f32>,
}

/// A file of a shard that could not be embedded (`root` indexes
/// [`Shard::roots`]).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ShardFailure {
    pub root: u32,
    pub rel_path: String,
    pub reason: String,
}

/// Embeddings and records of part of a collection (or of all of it).
#[derive(Clone, Debug, PartialEq)]
pub struct Shard {
    pub fingerprint: ModelFingerprint,
    /// `None` for a whole store taken out with [`from_store`].
    pub part: Option<ShardPart>,
    /// The roots, in the order the run was given them.
    pub roots: Vec<PathBuf>,
    pub images: Vec<ShardImage>,
    pub failures: Vec<ShardFailure>,
}

/// Embeds the files of `part` under `roots`. Reads the files only; no store
/// is involved. The report counts the part's files as new.
pub fn embed_shard(
    encoder: &Encoder,
    roots: &[PathBuf],
    options: &IndexOptions,
    part: ShardPart,
    progress: &dyn Progress,
) -> Result<(Shard, IndexReport), EngineError> {
    let roots = resolve_roots(roots, options)?;
    let mut report = IndexReport::default();
    let mut shard = Shard {
        fingerprint: fingerprint_of(encoder),
        part: Some(part),
        roots: roots.clone(),
        images: Vec::new(),
        failures: Vec::new(),
    };
    let mut walks = Vec::with_capacity(roots.len());
    for root in &roots {
        let walked = walk_root(root, &options.walk)?;
        report.skipped_symlinks += walked.skipped_symlinks;
        report.skipped_special_files += walked.skipped_special_files;
        walks.push(walked);
    }
    let total: usize = walks
        .iter()
        .map(|walked| {
            walked
                .files
                .iter()
                .filter(|f| part.holds(&f.rel_path))
                .count()
        })
        .sum();
    progress.begin("images", total as u64);
    for (root_index, walked) in walks.into_iter().enumerate() {
        let root_index = root_index as u32;
        for problem in walked.problems.iter().filter(|p| part.holds(&p.rel_path)) {
            report.failed += 1;
            shard.failures.push(ShardFailure {
                root: root_index,
                rel_path: problem.rel_path.clone(),
                reason: problem.reason.clone(),
            });
        }
        let pending: Vec<Pending> = walked
            .files
            .into_iter()
            .filter(|file| part.holds(&file.rel_path))
            .map(|file| Pending {
                file,
                replaces: None,
            })
            .collect();
        for chunk in pending.chunks(options.commit_every.max(1)) {
            let changes = embed_chunk(None, encoder, root_index, chunk, options, &mut report)?;
            shard
                .images
                .extend(changes.upserts.into_iter().map(|upsert| ShardImage {
                    record: upsert.record,
                    embedding: upsert.embedding,
                }));
            shard
                .failures
                .extend(changes.errors.into_iter().map(|error| ShardFailure {
                    root: error.root,
                    rel_path: error.rel_path,
                    reason: error.reason,
                }));
            progress.advance(chunk.len() as u64);
        }
    }
    progress.finish();
    shard.images.sort_by(|a, b| {
        (a.record.root, &a.record.rel_path).cmp(&(b.record.root, &b.record.rel_path))
    });
    shard
        .failures
        .sort_by(|a, b| (a.root, &a.rel_path).cmp(&(b.root, &b.rel_path)));
    Ok((shard, report))
}

/// Everything a store holds about its images, as one shard without a part:
/// what `export` writes.
pub fn from_store(store: &Store) -> Result<Shard, EngineError> {
    let store_roots = store.roots();
    let position: HashMap<u32, u32> = store_roots
        .iter()
        .enumerate()
        .map(|(position, (id, _))| (*id, position as u32))
        .collect();
    let root_position = |id: u32| {
        position.get(&id).copied().ok_or_else(|| {
            EngineError::InvalidArgument(format!(
                "the store names root {id}, which it does not list"
            ))
        })
    };
    let mut images = Vec::with_capacity(store.len());
    for entry in store.records() {
        let (id, mut record) = entry?;
        let embedding = store.embedding(id)?.ok_or(EngineError::UnknownImage(id))?;
        record.root = root_position(record.root)?;
        images.push(ShardImage { record, embedding });
    }
    let mut failures = Vec::new();
    for error in store.errors()? {
        failures.push(ShardFailure {
            root: root_position(error.root)?,
            rel_path: error.rel_path,
            reason: error.reason,
        });
    }
    images.sort_by(|a, b| {
        (a.record.root, &a.record.rel_path).cmp(&(b.record.root, &b.record.rel_path))
    });
    failures.sort_by(|a, b| (a.root, &a.rel_path).cmp(&(b.root, &b.rel_path)));
    Ok(Shard {
        fingerprint: store.fingerprint().clone(),
        part: None,
        roots: store_roots.into_iter().map(|(_, path)| path).collect(),
        images,
        failures,
    })
}

/// Counts of one merge.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct MergeReport {
    pub shards: usize,
    pub new: usize,
    pub changed: usize,
    pub unchanged: usize,
    /// Failed files recorded (or still recorded) with their reason.
    pub failed: usize,
    /// Images of the merged roots that no shard holds any more; only removed
    /// when the shards are every part of one partition (all I of one N).
    pub removed: usize,
    /// Whether the shards were every part of one partition, so that what
    /// they no longer hold could be removed.
    pub complete_partition: bool,
    pub store_seconds: f64,
}

impl fmt::Display for MergeReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{} merged: {} new, {} changed, {} unchanged, {} removed, {} failed",
            crate::ingest::counted(self.shards, "shard", "shards"),
            self.new,
            self.changed,
            self.unchanged,
            self.removed,
            self.failed
        )
    }
}

/// A partition: its number of parts and the roots it divides.
type Partition<'s> = (u32, &'s [PathBuf]);

/// Refuses shards that cannot be merged together, from their headers alone:
/// two models, the same part twice, or parts of partitions of different
/// sizes or roots (a folder holding the files of an older run beside a new
/// one), which would let stale rows overwrite new ones.
pub fn check_mergeable<'s>(
    headers: impl IntoIterator<Item = (&'s ModelFingerprint, Option<ShardPart>, &'s [PathBuf])>,
) -> Result<(), EngineError> {
    let mut first: Option<(&ModelFingerprint, Option<Partition>)> = None;
    let mut parts_seen = HashSet::new();
    for (fingerprint, part, roots) in headers {
        let partition = part.map(|p| (p.count, roots));
        match first {
            None => first = Some((fingerprint, partition)),
            Some((model, first_partition)) => {
                check_same_model(model, fingerprint)?;
                if let (Some(a), Some(b)) = (first_partition, partition) {
                    if a != b {
                        return Err(EngineError::InvalidArgument(format!(
                            "these files come from different runs: parts of {} over {} and \
                             parts of {} over {}; merge one run's files at a time",
                            a.0,
                            describe_roots(a.1),
                            b.0,
                            describe_roots(b.1)
                        )));
                    }
                }
            }
        }
        if let Some(part) = part {
            if !parts_seen.insert(part) {
                return Err(EngineError::InvalidArgument(format!(
                    "part {part} is given twice; give each part once"
                )));
            }
        }
    }
    Ok(())
}

fn describe_roots(roots: &[PathBuf]) -> String {
    let names: Vec<String> = roots.iter().map(|r| r.display().to_string()).collect();
    names.join(", ")
}

/// Merges shards into a store, one at a time, in small atomic commits: a
/// kill leaves a store that opens, and merging the same shards again
/// finishes the work (an image whose record is already stored is left as
/// it is, so a second merge of the same shard changes nothing).
pub struct ShardMerge<'a> {
    store: &'a mut Store,
    commit_every: usize,
    report: MergeReport,
    /// What the store holds, by (root id, path), read once and kept up to
    /// date with every commit.
    stored: HashMap<(u32, String), (ImageId, ImageRecord)>,
    recorded_errors: HashMap<(u32, String), String>,
    /// (store root id, path) of every file a merged shard holds.
    seen: HashSet<(u32, String)>,
    merged_roots: HashSet<u32>,
    parts: Vec<Option<ShardPart>>,
    root_lists: HashSet<Vec<PathBuf>>,
}

impl<'a> ShardMerge<'a> {
    pub fn new(store: &'a mut Store, commit_every: usize) -> Result<Self, EngineError> {
        let mut stored = HashMap::new();
        for entry in store.records() {
            let (id, record) = entry?;
            stored.insert((record.root, record.rel_path.clone()), (id, record));
        }
        let recorded_errors = store
            .errors()?
            .into_iter()
            .map(|error| ((error.root, error.rel_path), error.reason))
            .collect();
        Ok(ShardMerge {
            store,
            commit_every: commit_every.max(1),
            report: MergeReport::default(),
            stored,
            recorded_errors,
            seen: HashSet::new(),
            merged_roots: HashSet::new(),
            parts: Vec::new(),
            root_lists: HashSet::new(),
        })
    }

    /// Adds one shard; a shard of another model than the store's is refused
    /// before anything of it is written.
    pub fn add(&mut self, shard: &Shard, progress: &dyn Progress) -> Result<(), EngineError> {
        check_same_model(self.store.fingerprint(), &shard.fingerprint)?;
        let started = Instant::now();
        let mut root_ids = Vec::with_capacity(shard.roots.len());
        for root in &shard.roots {
            root_ids.push(self.store.add_root(root)?);
        }
        self.merged_roots.extend(root_ids.iter().copied());
        let store_root = |index: u32| {
            root_ids.get(index as usize).copied().ok_or_else(|| {
                EngineError::InvalidArgument(format!(
                    "a row names root {index}, but the shard lists {} roots",
                    root_ids.len()
                ))
            })
        };

        progress.begin("images", (shard.images.len() + shard.failures.len()) as u64);
        let mut changes = ChangeSet::default();
        for image in &shard.images {
            let mut record = image.record.clone();
            record.root = store_root(record.root)?;
            let key = (record.root, record.rel_path.clone());
            let replaces = match self.stored.get(&key) {
                Some((_, stored)) if *stored == record => {
                    self.report.unchanged += 1;
                    None
                }
                Some((id, _)) => {
                    self.report.changed += 1;
                    Some(Some(*id))
                }
                None => {
                    self.report.new += 1;
                    Some(None)
                }
            };
            if self.recorded_errors.contains_key(&key) {
                changes.cleared_errors.push(key.clone());
            }
            if let Some(replaces) = replaces {
                changes.upserts.push(Upsert {
                    replaces,
                    record,
                    embedding: image.embedding.clone(),
                });
            }
            self.seen.insert(key);
            if changes.upserts.len() + changes.cleared_errors.len() >= self.commit_every {
                self.commit(std::mem::take(&mut changes))?;
            }
            progress.advance(1);
        }
        for failure in &shard.failures {
            let key = (store_root(failure.root)?, failure.rel_path.clone());
            self.report.failed += 1;
            if self.recorded_errors.get(&key) != Some(&failure.reason) {
                changes.errors.push(FileError {
                    root: key.0,
                    rel_path: key.1.clone(),
                    reason: failure.reason.clone(),
                    at_unix_s: now_unix_s(),
                });
            }
            self.seen.insert(key);
            progress.advance(1);
        }
        self.commit(changes)?;
        progress.finish();
        self.report.shards += 1;
        self.parts.push(shard.part);
        self.root_lists.insert(shard.roots.clone());
        self.report.store_seconds += started.elapsed().as_secs_f64();
        Ok(())
    }

    /// Commits `changes` and keeps the view of the store in step with it.
    fn commit(&mut self, changes: ChangeSet) -> Result<(), EngineError> {
        if changes.is_empty() {
            return Ok(());
        }
        // What the view needs of the changes (not their embeddings), taken
        // before the store takes them.
        let records: Vec<ImageRecord> = changes.upserts.iter().map(|u| u.record.clone()).collect();
        let cleared = changes.cleared_errors.clone();
        let errors = changes.errors.clone();
        let removed: HashSet<ImageId> = changes.removals.iter().copied().collect();
        let ids = self.store.commit(changes)?;
        for (record, id) in records.into_iter().zip(ids) {
            self.stored
                .insert((record.root, record.rel_path.clone()), (id, record));
        }
        for key in cleared {
            self.recorded_errors.remove(&key);
        }
        for error in errors {
            self.recorded_errors
                .insert((error.root, error.rel_path), error.reason);
        }
        if !removed.is_empty() {
            self.stored.retain(|_, (id, _)| !removed.contains(id));
        }
        Ok(())
    }

    /// The one partition the merged shards make up, if they are every part
    /// of it over the same roots.
    fn complete_partition(&self) -> Option<u32> {
        let count = self.parts.first().copied().flatten()?.count;
        let indices: HashSet<u32> = self
            .parts
            .iter()
            .map(|part| part.filter(|p| p.count == count).map(|p| p.index))
            .collect::<Option<_>>()?;
        (indices.len() == count as usize && self.root_lists.len() == 1).then_some(count)
    }

    /// Removes what a complete partition no longer holds (images and the
    /// errors of files that are gone, as an index run does), then saves the
    /// graph.
    pub fn finish(mut self) -> Result<MergeReport, EngineError> {
        let started = Instant::now();
        self.report.complete_partition = self.complete_partition().is_some();
        if self.report.complete_partition {
            let vanished = |key: &(u32, String)| {
                self.merged_roots.contains(&key.0) && !self.seen.contains(key)
            };
            let removals: Vec<ImageId> = self
                .stored
                .iter()
                .filter(|(key, _)| vanished(key))
                .map(|(_, (id, _))| *id)
                .collect();
            let cleared_errors: Vec<(u32, String)> = self
                .recorded_errors
                .keys()
                .filter(|key| vanished(key))
                .cloned()
                .collect();
            self.report.removed = removals.len();
            self.commit(ChangeSet {
                removals,
                cleared_errors,
                ..ChangeSet::default()
            })?;
        }
        self.store.save_index()?;
        if self.report.changed + self.report.removed > 0 {
            self.store.forget_orphan_pair_notes()?;
        }
        self.report.store_seconds += started.elapsed().as_secs_f64();
        Ok(self.report)
    }
}

/// Shards and stores of two models never mix.
pub fn check_same_model(
    expected: &ModelFingerprint,
    found: &ModelFingerprint,
) -> Result<(), EngineError> {
    if expected == found {
        return Ok(());
    }
    Err(EngineError::ShardOfAnotherModel {
        expected: expected.to_string(),
        found: found.to_string(),
        differing: expected.differing_fields(found),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parts_are_parsed_and_checked() {
        assert_eq!(
            "1/4".parse::<ShardPart>().unwrap(),
            ShardPart { index: 1, count: 4 }
        );
        for bad in ["4/4", "1", "a/4", "0/0", "-1/3"] {
            let message = bad.parse::<ShardPart>().unwrap_err().to_string();
            assert!(
                message.contains(bad) && message.contains("I/N"),
                "{message}"
            );
        }
    }

    #[test]
    fn every_path_falls_into_exactly_one_part_and_parts_are_balanced() {
        let count = 4;
        let mut sizes = [0usize; 4];
        for i in 0..4000 {
            let path = format!("train/cat/{i:05}.jpg");
            let holders: Vec<u32> = (0..count)
                .filter(|&index| ShardPart { index, count }.holds(&path))
                .collect();
            assert_eq!(holders.len(), 1, "{path}");
            sizes[holders[0] as usize] += 1;
        }
        // A uniform hash puts 1,000 ± 3 standard deviations (about 82) in each.
        for size in sizes {
            assert!((900..=1100).contains(&size), "{sizes:?}");
        }
    }
}
