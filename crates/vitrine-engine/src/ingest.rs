//! Incremental indexing: walk roots, embed what is new or changed, drop what
//! vanished, record what failed — committing in small atomic steps so that a
//! kill at any moment leaves a store that opens and a run that resumes.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::{Instant, SystemTime, UNIX_EPOCH};

use rayon::prelude::*;
use vitrine_imaging::{decode_bytes, preprocess, DecodeOptions, ImagingError, PreparedImage};
use vitrine_model::config::ModelSpec;
use vitrine_model::encoder::Encoder;
use vitrine_store::{ChangeSet, FileError, ImageId, ImageRecord, ModelFingerprint, Store, Upsert};

use crate::error::EngineError;
use crate::progress::Progress;
use crate::splits::SplitRule;
use crate::walk::{resolve_root, walk_root, FoundFile, WalkOptions};

/// The fingerprint that ties a store to the model that filled it.
pub fn fingerprint_of(encoder: &Encoder) -> ModelFingerprint {
    let spec: &ModelSpec = encoder.spec();
    ModelFingerprint {
        model_id: spec.id.clone(),
        weights_sha256: spec.weights_sha256.clone(),
        preprocess: serde_json::to_string(&spec.preprocess).unwrap_or_default(),
        pooling: serde_json::to_value(spec.pooling)
            .ok()
            .and_then(|v| v.as_str().map(str::to_owned))
            .unwrap_or_default(),
        dim: encoder.embedding_dim(),
    }
}

/// What an index run should do.
#[derive(Clone, Debug)]
pub struct IndexOptions {
    pub walk: WalkOptions,
    pub split_rule: SplitRule,
    pub decode: DecodeOptions,
    /// Images per forward pass.
    pub batch_size: usize,
    /// Images decoded, embedded and committed together; a kill loses at most
    /// this much work.
    pub commit_every: usize,
}

impl Default for IndexOptions {
    fn default() -> Self {
        Self {
            walk: WalkOptions::default(),
            split_rule: SplitRule::default(),
            decode: DecodeOptions::default(),
            batch_size: 16,
            commit_every: 64,
        }
    }
}

/// Counts of one index run, over all roots.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct IndexReport {
    pub new: usize,
    pub changed: usize,
    pub unchanged: usize,
    pub removed: usize,
    pub failed: usize,
    /// Images whose bytes matched an already embedded image, so no forward
    /// pass was needed.
    pub reused_embeddings: usize,
    /// Files that are not images and do not claim to be (no image extension).
    pub skipped_non_images: usize,
    /// Symbolic links passed over because links are not followed.
    pub skipped_symlinks: usize,
    /// FIFOs, sockets and devices, which are never opened.
    pub skipped_special_files: usize,
    /// Wall time spent reading, hashing, decoding and preprocessing.
    pub decode_seconds: f64,
    /// Wall time spent in forward passes.
    pub forward_seconds: f64,
    /// Wall time spent committing to the store and saving the index.
    pub store_seconds: f64,
}

impl std::fmt::Display for IndexReport {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{} new, {} changed, {} unchanged, {} removed, {} failed",
            self.new, self.changed, self.unchanged, self.removed, self.failed
        )
    }
}

impl IndexReport {
    /// What the walk passed over, e.g. "3 symbolic links and 1 special file
    /// skipped"; `None` when nothing was.
    pub fn skipped_entries(&self) -> Option<String> {
        let parts: Vec<String> = [
            (self.skipped_symlinks, "symbolic link", "symbolic links"),
            (self.skipped_special_files, "special file", "special files"),
        ]
        .into_iter()
        .filter(|(n, _, _)| *n > 0)
        .map(|(n, singular, plural)| counted(n, singular, plural))
        .collect();
        (!parts.is_empty()).then(|| format!("{} skipped", parts.join(" and ")))
    }
}

/// "1 image", "3 images".
pub(crate) fn counted(n: usize, singular: &str, plural: &str) -> String {
    format!("{n} {}", if n == 1 { singular } else { plural })
}

/// A file to (re-)embed.
pub(crate) struct Pending {
    pub(crate) file: FoundFile,
    pub(crate) replaces: Option<ImageId>,
}

/// File name extensions that announce an image. A file without one whose
/// content is not an image is skipped quietly (a README beside the photos);
/// with one, it is an error worth reporting.
const IMAGE_EXTENSIONS: &[&str] = &[
    "jpg", "jpeg", "jpe", "jfif", "png", "webp", "gif", "bmp", "dib", "tif", "tiff",
];

fn has_image_extension(rel_path: &str) -> bool {
    Path::new(rel_path)
        .extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| {
            IMAGE_EXTENSIONS
                .iter()
                .any(|known| e.eq_ignore_ascii_case(known))
        })
}

/// What became of one file of a chunk.
enum Outcome {
    Decoded(Decoded),
    Failed(FileError),
    NotAnImage,
}

/// A file after decoding, ready for the forward pass (or already embedded).
struct Decoded {
    pending_index: usize,
    record: ImageRecord,
    prepared: Option<PreparedImage>,
    known_embedding: Option<Vec<f32>>,
}

pub(crate) fn now_unix_s() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_secs() as i64)
}

/// Checks an index run's roots and ignore patterns without writing anything,
/// and returns the roots' canonical paths. `index_roots` starts with it; a
/// caller that creates the store for the run calls it first, so that a refused
/// run leaves no new store behind.
pub fn resolve_roots(
    roots: &[PathBuf],
    options: &IndexOptions,
) -> Result<Vec<PathBuf>, EngineError> {
    options.walk.check()?;
    roots.iter().map(|root| resolve_root(root)).collect()
}

/// Indexes every root into `store` with `encoder`. Every root is checked
/// before the first is indexed: a run refused for one root records nothing.
pub fn index_roots(
    store: &mut Store,
    encoder: &Encoder,
    roots: &[PathBuf],
    options: &IndexOptions,
    progress: &dyn Progress,
) -> Result<IndexReport, EngineError> {
    let expected = fingerprint_of(encoder);
    if store.fingerprint() != &expected {
        return Err(EngineError::ModelNotCollectionModel {
            stored: store.fingerprint().to_string(),
            loaded: expected.to_string(),
        });
    }
    let roots = resolve_roots(roots, options)?;
    index_resolved_roots(store, encoder, &roots, options, progress)
        .map_err(|error| explain_full_device(error, store))
}

/// A full device stops a run at a commit; what the store kept is what the
/// next run starts from, so the error says how much that is.
fn explain_full_device(error: EngineError, store: &Store) -> EngineError {
    match error {
        EngineError::Store(store_error) if store_error.is_storage_full() => {
            EngineError::StoreDeviceFull {
                store: store.dir().to_path_buf(),
                committed_images: store.len(),
            }
        }
        other => other,
    }
}

fn index_resolved_roots(
    store: &mut Store,
    encoder: &Encoder,
    roots: &[PathBuf],
    options: &IndexOptions,
    progress: &dyn Progress,
) -> Result<IndexReport, EngineError> {
    let mut report = IndexReport::default();
    let started = Instant::now();
    for root in roots {
        index_one_root(store, encoder, root, options, progress, &mut report)?;
    }
    let saving = Instant::now();
    store.save_index()?;
    if report.changed + report.removed > 0 {
        let forgotten = store.forget_orphan_pair_notes()?;
        tracing::debug!(forgotten, "pair notes on contents no image has any more");
    }
    report.store_seconds += saving.elapsed().as_secs_f64();
    tracing::info!(elapsed_s = started.elapsed().as_secs_f64(), "{report}");
    Ok(report)
}

/// Indexes one root, given as its canonical path.
fn index_one_root(
    store: &mut Store,
    encoder: &Encoder,
    root: &Path,
    options: &IndexOptions,
    progress: &dyn Progress,
    report: &mut IndexReport,
) -> Result<(), EngineError> {
    let root_id = store.add_root(root)?;
    let walked = walk_root(root, &options.walk)?;
    report.skipped_symlinks += walked.skipped_symlinks;
    report.skipped_special_files += walked.skipped_special_files;

    let mut existing: HashMap<String, (ImageId, ImageRecord)> = HashMap::new();
    for entry in store.records() {
        let (id, record) = entry?;
        if record.root == root_id {
            existing.insert(record.rel_path.clone(), (id, record));
        }
    }
    let previous_errors: HashSet<String> = store
        .errors()?
        .into_iter()
        .filter(|e| e.root == root_id)
        .map(|e| e.rel_path)
        .collect();

    let mut pending = Vec::new();
    let mut seen: HashSet<&str> = HashSet::new();
    for file in &walked.files {
        seen.insert(&file.rel_path);
        let assigned = options.split_rule.assign(&file.rel_path);
        match existing.get(&file.rel_path) {
            Some((_, record))
                if record.byte_size == file.byte_size
                    && record.modified_unix_ns == file.modified_unix_ns
                    && record.split == assigned.split
                    && record.label == assigned.label =>
            {
                report.unchanged += 1;
            }
            Some((id, _)) => pending.push(Pending {
                file: file.clone(),
                replaces: Some(*id),
            }),
            None => pending.push(Pending {
                file: file.clone(),
                replaces: None,
            }),
        }
    }

    // Walk problems are per-file errors too: record them, keep going.
    let walk_errors: Vec<FileError> = walked
        .problems
        .iter()
        .map(|p| FileError {
            root: root_id,
            rel_path: p.rel_path.clone(),
            reason: p.reason.clone(),
            at_unix_s: now_unix_s(),
        })
        .collect();
    report.failed += walk_errors.len();
    let problem_paths: HashSet<&str> = walked
        .problems
        .iter()
        .map(|p| p.rel_path.as_str())
        .collect();

    if !walk_errors.is_empty() {
        store.commit(ChangeSet {
            errors: walk_errors,
            ..ChangeSet::default()
        })?;
    }

    progress.begin("images", pending.len() as u64);
    for chunk in pending.chunks(options.commit_every.max(1)) {
        let changes = embed_chunk(Some(store), encoder, root_id, chunk, options, report)?;
        let committing = Instant::now();
        store.commit(changes)?;
        report.store_seconds += committing.elapsed().as_secs_f64();
        progress.advance(chunk.len() as u64);
    }
    progress.finish();

    // Removals last, so that a renamed file found above could still reuse
    // the embedding of its old path's bytes.
    let removals: Vec<ImageId> = existing
        .iter()
        .filter(|(path, _)| !seen.contains(path.as_str()) && !problem_paths.contains(path.as_str()))
        .map(|(_, (id, _))| *id)
        .collect();
    report.removed += removals.len();
    let vanished_errors: Vec<(u32, String)> = previous_errors
        .into_iter()
        .filter(|path| !seen.contains(path.as_str()) && !problem_paths.contains(path.as_str()))
        .map(|path| (root_id, path))
        .collect();
    if !removals.is_empty() || !vanished_errors.is_empty() {
        store.commit(ChangeSet {
            removals,
            cleared_errors: vanished_errors,
            ..ChangeSet::default()
        })?;
    }
    Ok(())
}

/// Decodes a chunk in parallel, embeds what needs it in batches, and returns
/// the changes to commit. With a store, files whose bytes it already holds
/// reuse their embedding; without one (a shard), every file is embedded.
pub(crate) fn embed_chunk(
    store: Option<&Store>,
    encoder: &Encoder,
    root_id: u32,
    chunk: &[Pending],
    options: &IndexOptions,
    report: &mut IndexReport,
) -> Result<ChangeSet, EngineError> {
    let spec = &encoder.spec().preprocess;
    let decode_options = DecodeOptions {
        target_shorter_side: Some(spec.resize_shorter),
        ..options.decode.clone()
    };
    let decoding = Instant::now();
    let outcomes: Vec<Outcome> = chunk
        .par_iter()
        .enumerate()
        .map(|(pending_index, pending)| {
            decode_one(
                store,
                pending_index,
                pending,
                root_id,
                options,
                &decode_options,
                spec,
            )
        })
        .collect();

    report.decode_seconds += decoding.elapsed().as_secs_f64();
    let mut changes = ChangeSet::default();
    let mut to_embed: Vec<Decoded> = Vec::new();
    let mut ready: Vec<(Decoded, Vec<f32>)> = Vec::new();
    // Identical bytes inside one chunk are embedded once as well.
    let mut first_with_hash: HashMap<[u8; 32], usize> = HashMap::new();
    let mut copies_of: Vec<(Decoded, usize)> = Vec::new();
    for outcome in outcomes {
        match outcome {
            Outcome::NotAnImage => report.skipped_non_images += 1,
            Outcome::Failed(error) => {
                report.failed += 1;
                changes.errors.push(error);
            }
            Outcome::Decoded(mut decoded) => match decoded.known_embedding.take() {
                Some(embedding) => {
                    report.reused_embeddings += 1;
                    ready.push((decoded, embedding));
                }
                None => match first_with_hash.get(&decoded.record.content_hash) {
                    Some(&first) => {
                        report.reused_embeddings += 1;
                        copies_of.push((decoded, first));
                    }
                    None => {
                        first_with_hash.insert(decoded.record.content_hash, to_embed.len());
                        to_embed.push(decoded);
                    }
                },
            },
        }
    }

    let forwarding = Instant::now();
    let mut embedded: Vec<Vec<f32>> = Vec::with_capacity(to_embed.len());
    for batch in to_embed.chunks(options.batch_size.max(1)) {
        let images: Vec<&PreparedImage> =
            batch.iter().filter_map(|d| d.prepared.as_ref()).collect();
        embedded.extend(encoder.embed(&images)?);
    }
    report.forward_seconds += forwarding.elapsed().as_secs_f64();
    for (decoded, first) in copies_of {
        ready.push((decoded, embedded[first].clone()));
    }
    ready.extend(to_embed.into_iter().zip(embedded));

    for (decoded, embedding) in ready {
        let pending = &chunk[decoded.pending_index];
        match pending.replaces {
            Some(_) => report.changed += 1,
            None => report.new += 1,
        }
        changes
            .cleared_errors
            .push((root_id, decoded.record.rel_path.clone()));
        changes.upserts.push(Upsert {
            replaces: pending.replaces,
            record: decoded.record,
            embedding,
        });
    }
    Ok(changes)
}

/// An error's message followed by its causes': a store error keeps its cause
/// as a source rather than in its message.
fn with_causes(error: &dyn std::error::Error) -> String {
    let mut text = error.to_string();
    let mut cause = error.source();
    while let Some(inner) = cause {
        text.push_str(": ");
        text.push_str(&inner.to_string());
        cause = inner.source();
    }
    text
}

/// Reads, hashes, decodes and preprocesses one file.
fn decode_one(
    store: Option<&Store>,
    pending_index: usize,
    pending: &Pending,
    root_id: u32,
    options: &IndexOptions,
    decode_options: &DecodeOptions,
    spec: &vitrine_imaging::PreprocessSpec,
) -> Outcome {
    let fail = |reason: String| {
        Outcome::Failed(FileError {
            root: root_id,
            rel_path: pending.file.rel_path.clone(),
            reason,
            at_unix_s: now_unix_s(),
        })
    };
    let bytes = match std::fs::read(&pending.file.abs_path) {
        Ok(bytes) => bytes,
        Err(e) => return fail(format!("cannot read: {e}")),
    };
    let content_hash = *blake3::hash(&bytes).as_bytes();
    let decoded = match decode_bytes(&bytes, decode_options) {
        Ok(decoded) => decoded,
        // A file that is not an image and does not claim to be one is skipped.
        Err(ImagingError::NotAnImage | ImagingError::EmptyFile)
            if !has_image_extension(&pending.file.rel_path) =>
        {
            return Outcome::NotAnImage
        }
        Err(e) => return fail(e.to_string()),
    };
    let mut pixel_hasher = blake3::Hasher::new();
    pixel_hasher.update(&decoded.rgb.width().to_le_bytes());
    pixel_hasher.update(&decoded.rgb.height().to_le_bytes());
    pixel_hasher.update(decoded.rgb.as_raw());
    let assigned = options.split_rule.assign(&pending.file.rel_path);
    let record = ImageRecord {
        root: root_id,
        rel_path: pending.file.rel_path.clone(),
        byte_size: bytes.len() as u64,
        modified_unix_ns: pending.file.modified_unix_ns,
        content_hash,
        pixel_hash: *pixel_hasher.finalize().as_bytes(),
        width: decoded.original_width,
        height: decoded.original_height,
        split: assigned.split,
        label: assigned.label,
    };
    let known_embedding = match store.map(|store| store.embedding_by_content_hash(&content_hash)) {
        None => None,
        Some(Ok(known)) => known,
        Some(Err(e)) => return fail(with_causes(&e)),
    };
    let prepared = match known_embedding {
        Some(_) => None,
        None => match preprocess(&decoded.rgb, spec) {
            Ok(prepared) => Some(prepared),
            Err(e) => return fail(e.to_string()),
        },
    };
    Outcome::Decoded(Decoded {
        pending_index,
        record,
        prepared,
        known_embedding,
    })
}

#[cfg(test)]
mod tests {
    use vitrine_store::StoreError;

    use super::*;

    /// A real store holding `images` committed images under one root.
    fn store_with_images(dir: &Path, images: usize) -> Store {
        let fingerprint = ModelFingerprint {
            model_id: "test-model".into(),
            weights_sha256: "00".repeat(32),
            preprocess: "{}".into(),
            pooling: "cls".into(),
            dim: 4,
        };
        let mut store = Store::create_or_open(dir, &fingerprint).unwrap();
        let root = store.add_root(&dir.join("photos")).unwrap();
        let upserts = (0..images)
            .map(|i| Upsert {
                replaces: None,
                record: ImageRecord {
                    root,
                    rel_path: format!("img{i}.png"),
                    byte_size: 100,
                    modified_unix_ns: 0,
                    content_hash: [i as u8; 32],
                    pixel_hash: [i as u8; 32],
                    width: 8,
                    height: 8,
                    split: None,
                    label: None,
                },
                embedding: vec![1.0, i as f32, 0.5, 0.25],
            })
            .collect();
        store
            .commit(ChangeSet {
                upserts,
                ..ChangeSet::default()
            })
            .unwrap();
        store
    }

    #[test]
    fn a_full_device_says_what_the_store_kept_and_how_to_resume() {
        let dir = tempfile::tempdir().unwrap();
        let store_dir = dir.path().join("store");
        let store = store_with_images(&store_dir, 3);
        // ENOSPC from a write of the graph dump, as the kernel reports it.
        let full = EngineError::Store(StoreError::Io {
            path: store_dir.join("graph/index.hnsw.data"),
            source: std::io::Error::from_raw_os_error(28),
        });
        let message = explain_full_device(full, &store).to_string();
        let shown = store_dir.display().to_string();
        assert_eq!(
            message,
            format!(
                "the device holding the store {shown} is full, so indexing stopped; the store \
                 keeps its last commit (3 images); free space on the device holding {shown} and \
                 run the same command again: it resumes"
            )
        );

        let denied = EngineError::Store(StoreError::Io {
            path: store_dir.join("graph"),
            source: std::io::Error::from(std::io::ErrorKind::PermissionDenied),
        });
        assert!(matches!(
            explain_full_device(denied, &store),
            EngineError::Store(StoreError::Io { .. })
        ));
    }

    #[test]
    fn skipped_entries_are_counted_in_words() {
        let report = IndexReport {
            skipped_symlinks: 3,
            skipped_special_files: 1,
            ..IndexReport::default()
        };
        assert_eq!(
            report.skipped_entries().as_deref(),
            Some("3 symbolic links and 1 special file skipped")
        );
        assert_eq!(IndexReport::default().skipped_entries(), None);
    }
}
