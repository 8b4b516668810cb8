//! What a person decided about what vitrine reported, and the clean training
//! list that follows from it.
//!
//! Decisions are an append-only log in the store (never in the user's
//! folders, never a moved or deleted file). Undoing appends an `undo`. Each
//! decision names its files by id, root, path and content hash: a decision
//! follows its file through a re-index or a rename (found again by its
//! content), and a decision whose file changed or is gone is stale, listed
//! but not applied to new content.

use std::collections::{HashMap, HashSet};

use serde::{Deserialize, Serialize};
use vitrine_store::{ImageId, ImageRecord, Store};

use crate::catalog::Catalog;
use crate::error::EngineError;

/// A file as a decision names it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FileRef {
    pub id: ImageId,
    pub root: String,
    /// Relative to its root, `/`-separated, as reports print it.
    pub path: String,
    /// BLAKE3 of the file's bytes when the decision was made, hex.
    pub content_hash: String,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "action", rename_all = "snake_case")]
pub enum Action {
    /// Leave the image out of the training list (a copy, a leaked file).
    Drop { image: FileRef },
    /// Keep the image (a group's keeper; a leak judged harmless).
    Keep { image: FileRef },
    /// The two images are not copies of each other: later duplicate and leak
    /// reports leave the pair out.
    Distinct { first: FileRef, second: FileRef },
    /// The image's label is `label`: a suggestion accepted, another label
    /// given, or a suspect's own label confirmed.
    Label { image: FileRef, label: String },
    /// A label suggestion turned down: the image keeps the label it has.
    RejectSuggestion { image: FileRef },
    /// In the training list the image belongs to `split`.
    Split { image: FileRef, split: String },
    /// Takes back decision number `decision`.
    Undo { decision: u64 },
}

impl Action {
    fn files(&self) -> Vec<&FileRef> {
        match self {
            Action::Drop { image }
            | Action::Keep { image }
            | Action::Label { image, .. }
            | Action::RejectSuggestion { image }
            | Action::Split { image, .. } => vec![image],
            Action::Distinct { first, second } => vec![first, second],
            Action::Undo { .. } => Vec::new(),
        }
    }
}

/// A decision as a person asks for it, naming images by their root-relative
/// paths as reports print them; [`Request::resolve`] turns it into an
/// [`Action`] on the collection's current files. Both front ends take it:
/// the command line's arguments and the API's request body.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "action", rename_all = "snake_case")]
pub enum Request {
    Drop { path: String },
    Keep { path: String },
    Distinct { first: String, second: String },
    Label { path: String, label: String },
    RejectSuggestion { path: String },
    Split { path: String, split: String },
    Undo { decision: u64 },
}

impl Request {
    pub fn resolve(self, catalog: &Catalog) -> Result<Action, EngineError> {
        let file = |path: &str| file_ref(catalog, path);
        Ok(match self {
            Self::Drop { path } => Action::Drop {
                image: file(&path)?,
            },
            Self::Keep { path } => Action::Keep {
                image: file(&path)?,
            },
            Self::Distinct { first, second } => Action::Distinct {
                first: file(&first)?,
                second: file(&second)?,
            },
            Self::Label { path, label } => Action::Label {
                image: file(&path)?,
                label,
            },
            Self::RejectSuggestion { path } => Action::RejectSuggestion {
                image: file(&path)?,
            },
            Self::Split { path, split } => Action::Split {
                image: file(&path)?,
                split,
            },
            Self::Undo { decision } => Action::Undo { decision },
        })
    }
}

/// One decision as the log keeps it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Decision {
    pub at_unix_s: i64,
    /// Who decided: a user name or a token's name.
    pub by: String,
    #[serde(flatten)]
    pub action: Action,
}

/// A decision of the log with where it stands now.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LoggedDecision {
    pub number: u64,
    #[serde(flatten)]
    pub decision: Decision,
    /// The decision that took this one back.
    pub undone_by: Option<u64>,
    /// A file it names has changed or is gone since: it is not applied.
    pub stale: bool,
}

/// What a person decided for one image (the latest such decision in effect).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Fate {
    Keep,
    Drop,
}

/// Counts of the log, for status lines and reports.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct DecisionCounts {
    /// Decisions in effect (not undone, not stale, not undos).
    pub in_effect: usize,
    pub undone: usize,
    pub stale: usize,
    pub dropped: usize,
    pub kept: usize,
    pub distinct_pairs: usize,
    pub labels_given: usize,
    pub splits_given: usize,
}

/// The log and its effect on the collection's current images.
pub struct DecisionState {
    pub log: Vec<LoggedDecision>,
    fates: HashMap<ImageId, (Fate, u64)>,
    labels: HashMap<ImageId, (Option<String>, u64)>,
    splits: HashMap<ImageId, (String, u64)>,
    distinct: HashMap<([u8; 32], [u8; 32]), u64>,
}

fn hash_hex(hash: &[u8; 32]) -> String {
    blake3::Hash::from_bytes(*hash).to_hex().to_string()
}

fn hash_of(file: &FileRef) -> Option<[u8; 32]> {
    blake3::Hash::from_hex(&file.content_hash)
        .ok()
        .map(|hash| *hash.as_bytes())
}

fn pair_key(a: [u8; 32], b: [u8; 32]) -> ([u8; 32], [u8; 32]) {
    if a <= b {
        (a, b)
    } else {
        (b, a)
    }
}

/// The file at `path` (root-relative, as reports print it) as a decision names it.
pub fn file_ref(catalog: &Catalog, path: &str) -> Result<FileRef, EngineError> {
    let id = catalog.id_of_path(path)?;
    let row = catalog.row(id).ok_or(EngineError::UnknownImage(id))?;
    let image = catalog.image_ref(row);
    Ok(FileRef {
        id,
        root: image.root,
        path: image.path,
        content_hash: hash_hex(&catalog.records[row].content_hash),
    })
}

/// The current image a decision's file is, if its content is still there:
/// the same id, else the same path, else the only image with that content.
fn current_image(catalog: &Catalog, file: &FileRef) -> Option<ImageId> {
    let hash = hash_of(file)?;
    let holds = |record: &ImageRecord| record.content_hash == hash;
    if catalog.record(file.id).is_some_and(holds) {
        return Some(file.id);
    }
    let same_content: Vec<usize> = (0..catalog.len())
        .filter(|&row| holds(&catalog.records[row]))
        .collect();
    same_content
        .iter()
        .find(|&&row| catalog.records[row].rel_path == file.path)
        .or(match same_content.as_slice() {
            [only] => Some(only),
            _ => None,
        })
        .map(|&row| catalog.ids[row])
}

impl DecisionState {
    pub fn load(store: &Store, catalog: &Catalog) -> Result<Self, EngineError> {
        let mut log = Vec::new();
        for (number, bytes) in store.decisions()? {
            let decision: Decision = serde_json::from_slice(&bytes).map_err(|source| {
                EngineError::UnreadableDecision {
                    number,
                    message: source.to_string(),
                }
            })?;
            log.push(LoggedDecision {
                number,
                decision,
                undone_by: None,
                stale: false,
            });
        }
        Ok(Self::from_log(log, catalog))
    }

    fn from_log(mut log: Vec<LoggedDecision>, catalog: &Catalog) -> Self {
        let position: HashMap<u64, usize> =
            log.iter().enumerate().map(|(i, d)| (d.number, i)).collect();
        let undos: Vec<(u64, u64)> = log
            .iter()
            .filter_map(|d| match d.decision.action {
                Action::Undo { decision } => Some((decision, d.number)),
                _ => None,
            })
            .collect();
        for (target, by) in undos {
            if let Some(&i) = position.get(&target) {
                log[i].undone_by = Some(by);
            }
        }
        let mut state = Self {
            log: Vec::new(),
            fates: HashMap::new(),
            labels: HashMap::new(),
            splits: HashMap::new(),
            distinct: HashMap::new(),
        };
        for entry in &mut log {
            if entry.undone_by.is_some() {
                continue;
            }
            let number = entry.number;
            let images: Option<Vec<ImageId>> = entry
                .decision
                .action
                .files()
                .into_iter()
                .map(|file| current_image(catalog, file))
                .collect();
            let Some(images) = images else {
                entry.stale = true;
                continue;
            };
            match &entry.decision.action {
                Action::Drop { .. } => {
                    state.fates.insert(images[0], (Fate::Drop, number));
                }
                Action::Keep { .. } => {
                    state.fates.insert(images[0], (Fate::Keep, number));
                }
                Action::Label { label, .. } => {
                    state
                        .labels
                        .insert(images[0], (Some(label.clone()), number));
                }
                Action::RejectSuggestion { .. } => {
                    state.labels.insert(images[0], (None, number));
                }
                Action::Split { split, .. } => {
                    state.splits.insert(images[0], (split.clone(), number));
                }
                Action::Distinct { first, second } => {
                    if let (Some(a), Some(b)) = (hash_of(first), hash_of(second)) {
                        state.distinct.insert(pair_key(a, b), number);
                    }
                }
                Action::Undo { .. } => {}
            }
        }
        state.log = log;
        state
    }

    /// Takes in a decision just appended to the log. Replays the log in
    /// memory: an undo can bring back what an earlier decision said.
    fn push(&mut self, decision: LoggedDecision, catalog: &Catalog) {
        let mut log = std::mem::take(&mut self.log);
        for entry in &mut log {
            entry.undone_by = None;
            entry.stale = false;
        }
        log.push(decision);
        *self = Self::from_log(log, catalog);
    }

    pub fn fate(&self, id: ImageId) -> Option<Fate> {
        self.fates.get(&id).map(|(fate, _)| *fate)
    }

    /// The pairs of file contents people decided are not copies.
    pub fn distinct_pairs(&self) -> impl Iterator<Item = ([u8; 32], [u8; 32])> + '_ {
        self.distinct.keys().copied()
    }

    /// Whether a person said these two images are not copies.
    pub fn are_distinct(&self, a: &ImageRecord, b: &ImageRecord) -> bool {
        self.distinct
            .contains_key(&pair_key(a.content_hash, b.content_hash))
    }

    /// The label a person gave the image: `Some(None)` when they turned a
    /// suggestion down.
    pub fn label(&self, id: ImageId) -> Option<Option<&str>> {
        self.labels.get(&id).map(|(label, _)| label.as_deref())
    }

    pub fn split(&self, id: ImageId) -> Option<&str> {
        self.splits.get(&id).map(|(split, _)| split.as_str())
    }

    /// The number of the latest decision in effect on any of `images`, so that
    /// a reviewer who saw another state can be told (0: none).
    pub fn latest_on(&self, images: &[ImageId], catalog: &Catalog) -> u64 {
        let hashes: HashSet<[u8; 32]> = images
            .iter()
            .filter_map(|&id| catalog.record(id).map(|r| r.content_hash))
            .collect();
        let on_images = images.iter().flat_map(|id| {
            [
                self.fates.get(id).map(|e| e.1),
                self.labels.get(id).map(|e| e.1),
                self.splits.get(id).map(|e| e.1),
            ]
        });
        let mut latest = on_images.flatten().max().unwrap_or(0);
        for ((a, b), number) in &self.distinct {
            if hashes.contains(a) || hashes.contains(b) {
                latest = latest.max(*number);
            }
        }
        latest
    }

    pub fn counts(&self) -> DecisionCounts {
        let in_effect = |d: &&LoggedDecision| {
            d.undone_by.is_none() && !d.stale && !matches!(d.decision.action, Action::Undo { .. })
        };
        DecisionCounts {
            in_effect: self.log.iter().filter(in_effect).count(),
            undone: self.log.iter().filter(|d| d.undone_by.is_some()).count(),
            stale: self.log.iter().filter(|d| d.stale).count(),
            dropped: self.fates.values().filter(|f| f.0 == Fate::Drop).count(),
            kept: self.fates.values().filter(|f| f.0 == Fate::Keep).count(),
            distinct_pairs: self.distinct.len(),
            labels_given: self.labels.values().filter(|l| l.0.is_some()).count(),
            splits_given: self.splits.len(),
        }
    }
}

fn now_unix_s() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs() as i64)
}

/// Checks `action` against the collection and the log (`state`, loaded
/// from `store` for `catalog`) and appends it, keeping `state` up to date, so
/// that a front end recording many decisions replays the log once.
///
/// `seen` is the number of the latest decision on the action's images that
/// the person saw (0: none); when another decision was recorded on them
/// since, nothing is appended and the answer is a conflict naming it.
pub fn record(
    store: &Store,
    catalog: &Catalog,
    state: &mut DecisionState,
    by: &str,
    action: Action,
    seen: Option<u64>,
) -> Result<LoggedDecision, EngineError> {
    let invalid = |message: String| EngineError::InvalidDecision(message);
    match &action {
        Action::Undo { decision } => {
            let target = state
                .log
                .iter()
                .find(|d| d.number == *decision)
                .ok_or_else(|| invalid(format!("there is no decision {decision}")))?;
            if matches!(target.decision.action, Action::Undo { .. }) {
                return Err(invalid(format!(
                    "decision {decision} is an undo; record the decision again instead"
                )));
            }
            if let Some(undo) = target.undone_by {
                return Err(invalid(format!(
                    "decision {decision} was already undone by decision {undo}"
                )));
            }
        }
        Action::Distinct { first, second } if first.content_hash == second.content_hash => {
            return Err(invalid(format!(
                "{} and {} have the same bytes: they are copies",
                first.path, second.path
            )));
        }
        Action::Split { split, .. } => {
            catalog.check_split(split)?;
        }
        Action::Label { label, .. } if label.trim().is_empty() => {
            return Err(invalid("a label cannot be empty".into()));
        }
        _ => {}
    }
    if by.trim().is_empty() {
        return Err(invalid("a decision needs the name of who made it".into()));
    }
    if let Some(seen) = seen {
        let images: Vec<ImageId> = match &action {
            Action::Undo { decision } => state
                .log
                .iter()
                .find(|d| d.number == *decision)
                .map(|d| d.decision.action.files().iter().map(|f| f.id).collect())
                .unwrap_or_default(),
            other => other.files().iter().map(|f| f.id).collect(),
        };
        let latest = state.latest_on(&images, catalog);
        if latest != seen {
            return Err(EngineError::DecisionConflict { seen, latest });
        }
    }
    let decision = Decision {
        at_unix_s: now_unix_s(),
        by: by.trim().to_owned(),
        action,
    };
    let bytes = serde_json::to_vec(&decision).map_err(EngineError::DecisionEncoding)?;
    let number = store.append_decision(&bytes)?;
    let recorded = LoggedDecision {
        number,
        decision,
        undone_by: None,
        stale: false,
    };
    state.push(recorded.clone(), catalog);
    Ok(recorded)
}

/// The latest decision of `log` still in effect that can be undone (for
/// "undo the last").
pub fn last_undoable(log: &[LoggedDecision]) -> Option<u64> {
    log.iter()
        .rev()
        .find(|d| d.undone_by.is_none() && !matches!(d.decision.action, Action::Undo { .. }))
        .map(|d| d.number)
}

/// One row of a clean training list, in the `path,split,label` layout that
/// `index --manifest` reads (empty split or label: none).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ManifestRow {
    pub path: String,
    pub split: String,
    pub label: String,
}

/// The collection's images as a training list: dropped images left out,
/// given splits and labels applied, sorted by path.
pub fn clean_manifest(catalog: &Catalog, state: &DecisionState) -> Vec<ManifestRow> {
    let mut rows: Vec<ManifestRow> = (0..catalog.len())
        .filter(|&row| state.fate(catalog.ids[row]) != Some(Fate::Drop))
        .map(|row| {
            let id = catalog.ids[row];
            let record = &catalog.records[row];
            let label = match state.label(id) {
                Some(Some(label)) => Some(label),
                _ => record.label.as_deref(),
            };
            ManifestRow {
                path: record.rel_path.clone(),
                split: state
                    .split(id)
                    .or(record.split.as_deref())
                    .unwrap_or_default()
                    .to_owned(),
                label: label.unwrap_or_default().to_owned(),
            }
        })
        .collect();
    rows.sort_by(|a, b| a.path.cmp(&b.path));
    rows
}

/// Writes a training list as CSV with the header `path,split,label`.
pub fn write_manifest(rows: &[ManifestRow], out: impl std::io::Write) -> Result<(), EngineError> {
    let mut writer = csv::WriterBuilder::new()
        .has_headers(false)
        .from_writer(out);
    writer
        .write_record(["path", "split", "label"])
        .map_err(EngineError::ManifestWrite)?;
    for row in rows {
        writer
            .write_record([&row.path, &row.split, &row.label])
            .map_err(EngineError::ManifestWrite)?;
    }
    writer
        .flush()
        .map_err(|err| EngineError::ManifestWrite(err.into()))
}

#[cfg(test)]
mod tests {
    use std::path::Path;

    use vitrine_store::{ChangeSet, ModelFingerprint, Upsert};

    use super::*;

    /// A real store with images `a.png`, `b.png`, `c.png` whose contents are
    /// distinct, and `copy.png` with the bytes of `a.png`.
    fn store_with_four(dir: &Path) -> (Store, Catalog) {
        let fingerprint = ModelFingerprint {
            model_id: "unit".into(),
            weights_sha256: "0".repeat(64),
            preprocess: "none".into(),
            pooling: "cls".into(),
            dim: 2,
        };
        let mut store = Store::create_or_open(dir, &fingerprint).unwrap();
        store.add_root(Path::new("/photos")).unwrap();
        let upserts = [("a.png", 1u8), ("b.png", 2), ("c.png", 3), ("copy.png", 1)]
            .iter()
            .enumerate()
            .map(|(i, (path, content))| Upsert {
                replaces: None,
                record: ImageRecord {
                    root: 0,
                    rel_path: (*path).into(),
                    byte_size: 10,
                    modified_unix_ns: 0,
                    content_hash: [*content; 32],
                    pixel_hash: [*content; 32],
                    width: 4,
                    height: 4,
                    split: Some("train".into()),
                    label: None,
                },
                embedding: vec![(i as f32).cos(), (i as f32).sin()],
            })
            .collect();
        store
            .commit(ChangeSet {
                upserts,
                ..ChangeSet::default()
            })
            .unwrap();
        let catalog = Catalog::load(&store).unwrap();
        (store, catalog)
    }

    fn decide(store: &Store, catalog: &Catalog, request: Request) -> Result<u64, EngineError> {
        let mut state = DecisionState::load(store, catalog)?;
        let action = request.resolve(catalog)?;
        Ok(record(store, catalog, &mut state, "tester", action, None)?.number)
    }

    #[test]
    fn undoing_the_latest_decision_brings_back_the_one_before() {
        let dir = tempfile::tempdir().unwrap();
        let (store, catalog) = store_with_four(dir.path());
        let a = catalog.id_of_path("a.png").unwrap();
        decide(
            &store,
            &catalog,
            Request::Keep {
                path: "a.png".into(),
            },
        )
        .unwrap();
        let dropped = decide(
            &store,
            &catalog,
            Request::Drop {
                path: "a.png".into(),
            },
        )
        .unwrap();
        assert_eq!(
            DecisionState::load(&store, &catalog).unwrap().fate(a),
            Some(Fate::Drop)
        );
        decide(&store, &catalog, Request::Undo { decision: dropped }).unwrap();
        let state = DecisionState::load(&store, &catalog).unwrap();
        assert_eq!(state.fate(a), Some(Fate::Keep));
        assert_eq!(state.log[1].undone_by, Some(3));
        // Undoing twice, or undoing an undo, is refused.
        let again = decide(&store, &catalog, Request::Undo { decision: dropped });
        assert!(matches!(again, Err(EngineError::InvalidDecision(_))));
        let undo_of_undo = decide(&store, &catalog, Request::Undo { decision: 3 });
        assert!(matches!(undo_of_undo, Err(EngineError::InvalidDecision(_))));
    }

    #[test]
    fn a_decision_follows_its_content_and_is_stale_when_that_is_ambiguous_or_gone() {
        let dir = tempfile::tempdir().unwrap();
        let (_store, catalog) = store_with_four(dir.path());
        let file = |path: &str| file_ref(&catalog, path).unwrap();
        let logged = |number: u64, action: Action| LoggedDecision {
            number,
            decision: Decision {
                at_unix_s: 0,
                by: "tester".into(),
                action,
            },
            undone_by: None,
            stale: false,
        };
        // The same content under a new id (re-indexed) and a new path (renamed).
        let mut moved = file("b.png");
        moved.id += 1000;
        moved.path = "old-name.png".into();
        // `a.png`'s content is held by two images: without its id or path it
        // cannot be told which one was meant.
        let mut ambiguous = file("a.png");
        ambiguous.id += 1000;
        ambiguous.path = "elsewhere.png".into();
        let mut changed = file("c.png");
        changed.content_hash = hash_hex(&[9; 32]);
        let state = DecisionState::from_log(
            vec![
                logged(1, Action::Drop { image: moved }),
                logged(2, Action::Drop { image: ambiguous }),
                logged(3, Action::Drop { image: changed }),
            ],
            &catalog,
        );
        let b = catalog.id_of_path("b.png").unwrap();
        assert_eq!(state.fate(b), Some(Fate::Drop));
        assert_eq!(
            state.log.iter().map(|d| d.stale).collect::<Vec<_>>(),
            [false, true, true]
        );
        assert_eq!(state.counts().dropped, 1);
    }
}
