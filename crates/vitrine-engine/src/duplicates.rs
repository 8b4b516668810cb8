//! Duplicate groups and leakage between splits, in three tiers: identical
//! bytes, identical decoded pixels, and near-duplicates (cosine similarity of
//! embeddings at or above a threshold).
//!
//! Near-duplicate candidates come from each image's k nearest neighbours in
//! the HNSW index (O(n·k) work, never all pairs); groups are the connected
//! components of those edges (union-find). Only a report: nothing is deleted.
//!
//! With verification (see [`crate::verify`]), near candidates come from a
//! lower cosine, [`DuplicateOptions::candidate_threshold`], and each candidate
//! pair is kept only if the finer check confirms it: that removes look-alike
//! low-texture pairs above the threshold and recovers crops and rotations
//! below it. Pairs whose files cannot be read are judged on the threshold
//! alone, and the result says so.

use std::collections::{BTreeMap, HashMap, HashSet};

use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use vitrine_store::{ImageId, Store};

use crate::analytics::grouping::{group_by_similarity, SimilarityEdge};
use crate::catalog::{Catalog, ImageRef};
use crate::decisions::{DecisionState, Fate};
use crate::error::EngineError;
use crate::verify::{PairCheck, PairVerifier, VerifiedFile};

/// How strongly two images are the same picture.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DuplicateTier {
    /// Byte-for-byte identical files.
    Bytes,
    /// Different files that decode to identical pixels.
    Pixels,
    /// Embeddings at or above the near-duplicate threshold.
    Near,
}

/// Parameters shared by duplicate and leakage queries.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct DuplicateOptions {
    pub near_duplicate_threshold: f32,
    /// Neighbours examined per image when looking for near-duplicates.
    pub neighbours_per_image: usize,
    /// Confirm near candidates with the finer check when a verifier is given.
    pub verify: bool,
    /// With verification, pairs from this cosine up are candidates (and only
    /// confirmed ones are accepted); without, `near_duplicate_threshold` rules.
    pub candidate_threshold: f32,
}

impl Default for DuplicateOptions {
    fn default() -> Self {
        Self {
            near_duplicate_threshold: DEFAULT_NEAR_DUPLICATE_THRESHOLD,
            neighbours_per_image: 10,
            verify: true,
            candidate_threshold: DEFAULT_CANDIDATE_THRESHOLD,
        }
    }
}

/// The default near-duplicate threshold for the default model's class-token
/// embeddings (DINOv2 ViT-S/14). Measured with [`crate::calibrate`] (the
/// `near_duplicate_quality` example) on 18 public-domain photos shipped in
/// scikit-image, scikit-learn and matplotlib, with 15 mild and 6 strong
/// Copydays-style edits each: 0.875 is the grid threshold with the best mild
/// recall (0.993) at precision >= 0.99 (the nearest distinct photo reached
/// 0.870); at 0.90 mild recall was 0.981.
pub const DEFAULT_NEAR_DUPLICATE_THRESHOLD: f32 = 0.875;

/// With verification, the cosine from which pairs are candidates. On the
/// same measurement, candidate floors of 0.5, 0.6 and 0.7 gave identical
/// results; 0.6 keeps the number of checks down.
pub const DEFAULT_CANDIDATE_THRESHOLD: f32 = 0.60;

/// Images whose verification evidence (about 0.4 MB each) a verifier holds at
/// most; on a small collection it is all of them, kept for the next query.
const EVIDENCE_PER_ROUND: usize = 512;

/// How a near pair was judged.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "status", rename_all = "snake_case")]
pub enum Verification {
    /// The finer check confirmed it; `score` is its aligned pixel correlation.
    Confirmed { score: f32 },
    /// Accepted on the cosine threshold alone: verification was off, no
    /// model was given to run it, or a file could not be read.
    ThresholdOnly,
}

impl Verification {
    fn strength(&self) -> f32 {
        match self {
            Verification::Confirmed { score } => 1.0 + score,
            Verification::ThresholdOnly => 0.0,
        }
    }
}

/// What verification did in one query.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
pub struct VerificationSummary {
    /// Whether near pairs went through the finer check.
    pub applied: bool,
    /// Why it was not applied, or only in part.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    pub candidate_pairs: usize,
    pub confirmed: usize,
    /// Confirmed pairs whose cosine was below the near-duplicate threshold.
    pub recovered_below_threshold: usize,
    /// Pairs at or above the threshold that the check rejected.
    pub rejected_above_threshold: usize,
    /// Pairs with an unreadable file, judged on the threshold alone.
    pub unavailable: usize,
}

/// Duplicate groups and how their near pairs were judged.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct DuplicateReport {
    pub groups: Vec<DuplicateGroup>,
    pub verification: VerificationSummary,
    /// Pairs left out because a person decided they are not copies.
    pub left_out_as_distinct: usize,
}

/// One member of a duplicate group.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct GroupMember {
    #[serde(flatten)]
    pub image: ImageRef,
    /// The strongest tier linking this member to the keeper or to a member
    /// listed before it (`copy_of`); `None` for the keeper, which is no copy.
    pub tier: Option<DuplicateTier>,
    /// The member that `tier` relates this one to: four byte-identical files
    /// under a keeper of another format are bytes copies of the first of them.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub copy_of: Option<ImageId>,
    /// Cosine similarity to the keeper.
    pub similarity: f32,
    pub keeper: bool,
    /// For near-tier members: how the near link that brought it in was judged.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub verification: Option<Verification>,
    pub width: u32,
    pub height: u32,
    pub byte_size: u64,
    /// What a person decided for this image.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub decision: Option<Fate>,
    /// The number of the latest decision in effect on this image (0: none):
    /// what a reviewer passes as `seen` when deciding on it.
    pub last_decision: u64,
}

/// A group of images that are copies of one picture.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct DuplicateGroup {
    /// The weakest of the members' tiers: the whole group is at least this close.
    pub tier: DuplicateTier,
    /// The suggested keeper first, then the others by decreasing similarity.
    pub members: Vec<GroupMember>,
    /// A person has settled the group: every member is decided, or all but
    /// one are dropped.
    pub decided: bool,
}

/// Keeper rule: most pixels, then largest file, then shortest path, then the
/// lexicographically smallest path (so the choice is deterministic).
fn keeper_order(catalog: &Catalog, a: usize, b: usize) -> std::cmp::Ordering {
    let (ra, rb) = (&catalog.records[a], &catalog.records[b]);
    let pixels = |r: &vitrine_store::ImageRecord| u64::from(r.width) * u64::from(r.height);
    pixels(rb)
        .cmp(&pixels(ra))
        .then(rb.byte_size.cmp(&ra.byte_size))
        .then(ra.rel_path.len().cmp(&rb.rel_path.len()))
        .then(ra.rel_path.cmp(&rb.rel_path))
}

/// The tier relating two rows, given their similarity.
fn tier_between(catalog: &Catalog, a: usize, b: usize) -> DuplicateTier {
    let (ra, rb) = (&catalog.records[a], &catalog.records[b]);
    if ra.content_hash == rb.content_hash {
        DuplicateTier::Bytes
    } else if ra.pixel_hash == rb.pixel_hash {
        DuplicateTier::Pixels
    } else {
        DuplicateTier::Near
    }
}

/// Edges between rows sharing a hash: each member linked to the first.
fn exact_edges<K: std::hash::Hash + Eq>(
    rows: impl Iterator<Item = (K, usize)>,
) -> Vec<SimilarityEdge<usize>> {
    let mut first_of: HashMap<K, usize> = HashMap::new();
    let mut edges = Vec::new();
    for (key, row) in rows {
        match first_of.get(&key) {
            Some(&first) => edges.push(SimilarityEdge {
                first,
                second: row,
                similarity: 1.0,
            }),
            None => {
                first_of.insert(key, row);
            }
        }
    }
    edges
}

/// A near pair before judgement.
#[derive(Clone, Copy)]
struct Candidate {
    first: usize,
    second: usize,
    similarity: f32,
}

/// The cosine from which neighbours are candidates. With verification it is
/// the candidate threshold alone, even above the near-duplicate threshold: a
/// reviewer raising it asks for fewer, closer pairs.
fn candidate_floor(options: &DuplicateOptions, verifier: Option<&PairVerifier>) -> f32 {
    if options.verify && verifier.is_some() {
        options.candidate_threshold
    } else {
        options.near_duplicate_threshold
    }
}

/// Judges candidates: `Some` for those accepted, with how.
fn judge(
    store: &Store,
    catalog: &Catalog,
    options: &DuplicateOptions,
    verifier: Option<&PairVerifier>,
    candidates: &[Candidate],
) -> Result<(Vec<Option<Verification>>, VerificationSummary), EngineError> {
    let threshold = options.near_duplicate_threshold;
    let by_threshold =
        |c: &Candidate| (c.similarity >= threshold).then_some(Verification::ThresholdOnly);
    let mut summary = VerificationSummary {
        candidate_pairs: candidates.len(),
        ..VerificationSummary::default()
    };
    let verifier = match (options.verify, verifier) {
        (true, Some(verifier)) => verifier,
        (verify, _) => {
            if verify {
                summary.note = Some(
                    "no model was given to verify with: near pairs judged on the cosine \
                     threshold alone"
                        .into(),
                );
            }
            return Ok((candidates.iter().map(by_threshold).collect(), summary));
        }
    };
    summary.applied = true;
    let file_of = |row: usize| {
        Some(VerifiedFile {
            path: catalog.absolute_path(catalog.ids[row])?,
            content_hash: catalog.records[row].content_hash,
        })
    };
    // Pairs not judged before are checked in rounds whose files' evidence fits
    // the verifier's budget, so memory stays bounded on any collection; the
    // candidates come ordered by their first image, so a round shares files.
    // Verdicts the store keeps from earlier runs count as judged.
    let unjudged = |pairs: Vec<(VerifiedFile, VerifiedFile)>| -> Vec<(VerifiedFile, VerifiedFile)> {
        pairs
            .into_iter()
            .filter(|(a, b)| verifier.remembered(a, b).is_none())
            .collect()
    };
    let pending = unjudged(
        candidates
            .iter()
            .filter_map(|c| Some((file_of(c.first)?, file_of(c.second)?)))
            .collect(),
    );
    verifier.recall_from(store, &pending)?;
    let pending = unjudged(pending);
    let files_to_read: HashSet<[u8; 32]> = pending
        .iter()
        .flat_map(|(a, b)| [a.content_hash, b.content_hash])
        .collect();
    let progress = verifier.progress();
    progress.begin(
        "images read and pairs compared (near-pair check)",
        (files_to_read.len() + pending.len()) as u64,
    );
    let mut rest = pending.as_slice();
    while !rest.is_empty() {
        let mut files = BTreeMap::new();
        let mut taken = 0;
        for (a, b) in rest {
            if files.len() + 2 > EVIDENCE_PER_ROUND && taken > 0 {
                break;
            }
            files.insert(a.content_hash, a.clone());
            files.insert(b.content_hash, b.clone());
            taken += 1;
        }
        let (round, later) = rest.split_at(taken);
        let files: Vec<VerifiedFile> = files.into_values().collect();
        verifier.make_room(&files, EVIDENCE_PER_ROUND);
        verifier.prepare(&files)?;
        // Failures (an unreadable file) are not remembered: judged on the threshold below.
        round.par_iter().for_each(|(a, b)| {
            let _ = verifier.check(a, b);
            progress.advance(1);
        });
        rest = later;
    }
    progress.finish();
    verifier.keep_in(store, &pending)?;
    // Every pair is judged now, except those with a file that could not be read.
    let checks: Vec<Option<PairCheck>> = candidates
        .iter()
        .map(|c| verifier.remembered(&file_of(c.first)?, &file_of(c.second)?))
        .collect();
    let mut verdicts = Vec::with_capacity(candidates.len());
    for (candidate, check) in candidates.iter().zip(checks) {
        let above = candidate.similarity >= threshold;
        verdicts.push(match check {
            Some(check) if check.confirmed => {
                summary.confirmed += 1;
                summary.recovered_below_threshold += usize::from(!above);
                Some(Verification::Confirmed { score: check.score })
            }
            Some(_) => {
                summary.rejected_above_threshold += usize::from(above);
                None
            }
            None => {
                summary.unavailable += 1;
                by_threshold(candidate)
            }
        });
    }
    if summary.unavailable > 0 {
        summary.note = Some(format!(
            "{} pairs had a file that could not be read: judged on the cosine threshold alone",
            summary.unavailable
        ));
    }
    Ok((verdicts, summary))
}

/// Near-duplicate candidates from each row's nearest neighbours.
fn near_candidates(
    store: &Store,
    catalog: &Catalog,
    options: &DuplicateOptions,
    floor: f32,
) -> Result<Vec<Candidate>, EngineError> {
    let per_row: Vec<Result<Vec<Candidate>, EngineError>> = (0..catalog.len())
        .into_par_iter()
        .map(|row| {
            let hits = catalog.nearest_rows(
                store,
                catalog.embedding_at(row),
                options.neighbours_per_image + 1,
                None,
            )?;
            Ok(hits
                .into_iter()
                .filter(|&(_, similarity)| similarity >= floor)
                .filter_map(|(other, similarity)| {
                    // Exact copies are linked by their hashes already.
                    let exact = tier_between(catalog, row, other) != DuplicateTier::Near;
                    (other > row && !exact).then_some(Candidate {
                        first: row,
                        second: other,
                        similarity,
                    })
                })
                .collect())
        })
        .collect();
    let mut candidates = Vec::new();
    for row_candidates in per_row {
        candidates.extend(row_candidates?);
    }
    Ok(candidates)
}

/// Every group of duplicates in the collection, largest first, with near
/// pairs judged on the cosine threshold alone.
pub fn find_duplicate_groups(
    store: &Store,
    catalog: &Catalog,
    options: &DuplicateOptions,
) -> Result<Vec<DuplicateGroup>, EngineError> {
    Ok(find_duplicates(store, catalog, options, None)?.groups)
}

/// Every group of duplicates in the collection, largest first; near pairs
/// are verified when `options.verify` is set and a verifier is given.
pub fn find_duplicates(
    store: &Store,
    catalog: &Catalog,
    options: &DuplicateOptions,
    verifier: Option<&PairVerifier>,
) -> Result<DuplicateReport, EngineError> {
    let mut edges = exact_edges(
        catalog
            .records
            .iter()
            .enumerate()
            .map(|(row, r)| (r.content_hash, row)),
    );
    edges.extend(exact_edges(
        catalog
            .records
            .iter()
            .enumerate()
            .map(|(row, r)| (r.pixel_hash, row)),
    ));
    let decisions = DecisionState::load(store, catalog)?;
    let distinct = |first: usize, second: usize| {
        decisions.are_distinct(&catalog.records[first], &catalog.records[second])
    };
    // A pair can be found both as identical and as near: counted once.
    let mut left_out: HashSet<(usize, usize)> = HashSet::new();
    let mut keep_unless_distinct = |first: usize, second: usize| {
        let leave_out = distinct(first, second);
        if leave_out {
            left_out.insert((first.min(second), first.max(second)));
        }
        !leave_out
    };
    edges.retain(|edge| keep_unless_distinct(edge.first, edge.second));
    let floor = candidate_floor(options, verifier);
    let mut candidates = near_candidates(store, catalog, options, floor)?;
    candidates.retain(|c| keep_unless_distinct(c.first, c.second));
    let left_out_as_distinct = left_out.len();
    let (verdicts, verification) = judge(store, catalog, options, verifier, &candidates)?;
    let mut verification_of: HashMap<usize, Verification> = HashMap::new();
    for (candidate, verdict) in candidates.iter().zip(verdicts) {
        let Some(verdict) = verdict else { continue };
        for row in [candidate.first, candidate.second] {
            let best = verification_of.entry(row).or_insert(verdict);
            if verdict.strength() > best.strength() {
                *best = verdict;
            }
        }
        edges.push(SimilarityEdge {
            first: candidate.first,
            second: candidate.second,
            similarity: candidate.similarity,
        });
    }
    // Every edge left has been accepted: group them all.
    let components = group_by_similarity(edges, f32::NEG_INFINITY)?;
    Ok(DuplicateReport {
        groups: components
            .into_iter()
            .map(|rows| build_group(catalog, rows, &verification_of, &decisions))
            .collect(),
        verification,
        left_out_as_distinct,
    })
}

fn build_group(
    catalog: &Catalog,
    mut rows: Vec<usize>,
    verification_of: &HashMap<usize, Verification>,
    decisions: &DecisionState,
) -> DuplicateGroup {
    rows.sort_by(|&a, &b| keeper_order(catalog, a, b));
    let keeper = rows[0];
    // The keeper first, then by decreasing similarity to it: identical
    // copies have equal embeddings, so they sit next to each other.
    rows[1..].sort_by(|&a, &b| {
        catalog
            .similarity(keeper, b)
            .total_cmp(&catalog.similarity(keeper, a))
    });
    let members: Vec<GroupMember> = rows
        .iter()
        .enumerate()
        .map(|(position, &row)| {
            let record = &catalog.records[row];
            // Ties go to the earliest member, so the keeper wins them.
            let link = rows[..position]
                .iter()
                .map(|&earlier| (tier_between(catalog, earlier, row), earlier))
                .min_by_key(|&(tier, _)| tier);
            GroupMember {
                image: catalog.image_ref(row),
                tier: link.map(|(tier, _)| tier),
                copy_of: link.map(|(_, earlier)| catalog.ids[earlier]),
                similarity: catalog.similarity(keeper, row),
                keeper: row == keeper,
                verification: verification_of.get(&row).copied(),
                width: record.width,
                height: record.height,
                byte_size: record.byte_size,
                decision: decisions.fate(catalog.ids[row]),
                last_decision: decisions.latest_on(&[catalog.ids[row]], catalog),
            }
        })
        .collect();
    let tier = members
        .iter()
        .filter_map(|m| m.tier)
        .max()
        .unwrap_or(DuplicateTier::Bytes);
    let undecided = members.iter().filter(|m| m.decision.is_none()).count();
    let not_dropped = members
        .iter()
        .filter(|m| m.decision != Some(Fate::Drop))
        .count();
    DuplicateGroup {
        tier,
        decided: undecided == 0 || not_dropped <= 1,
        members,
    }
}

/// An image of an evaluated split that also appears in the reference split.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Leak {
    #[serde(flatten)]
    pub image: ImageRef,
    /// Its closest copy in the reference split.
    pub counterpart: ImageRef,
    pub tier: DuplicateTier,
    pub similarity: f32,
    /// For near-tier leaks: how the pair was judged.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub verification: Option<Verification>,
    /// A person has settled the leak: one side dropped, or the image given
    /// another split.
    pub decided: bool,
    /// The latest decision in effect on the image and on its counterpart (0:
    /// none): what a reviewer passes as `seen`.
    pub image_last_decision: u64,
    pub counterpart_last_decision: u64,
}

/// Leak counts of one evaluated split.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SplitLeakSummary {
    pub split: String,
    pub images: usize,
    pub leaked: usize,
    pub leaked_percent: f64,
}

/// How many images of `split` have their reported copy in `from`.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SplitPairLeaks {
    pub split: String,
    pub from: String,
    pub leaked: usize,
}

/// How many leaked images carry `label` (`(none)`: unlabelled).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LabelLeaks {
    pub label: String,
    pub leaked: usize,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LeakReport {
    /// The split others were checked against; `None`: each split against
    /// every split before it (train, then val, then test, then others by name).
    pub reference_split: Option<String>,
    pub summary: Vec<SplitLeakSummary>,
    /// Leaked images per pair of splits: the split they are in and the split
    /// their reported copy is in.
    pub between: Vec<SplitPairLeaks>,
    /// Leaked images per label.
    pub per_label: Vec<LabelLeaks>,
    pub leaks: Vec<Leak>,
    pub verification: VerificationSummary,
    /// Pairs left out because a person decided they are not copies.
    pub left_out_as_distinct: usize,
}

/// Which splits to check against which.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct LeakOptions {
    /// Splits whose images are checked; empty means every split but the
    /// reference (without one: every split but the first).
    pub evaluated_splits: Vec<String>,
    /// The split others are checked against; `None`: each split against every
    /// split before it, so a test image copied into val is a leak too.
    pub reference_split: Option<String>,
    pub duplicates: DuplicateOptions,
}

/// Every image of the evaluated splits with a duplicate-tier match in the
/// reference split, with near pairs judged on the cosine threshold alone.
pub fn find_leaks(
    store: &Store,
    catalog: &Catalog,
    options: &LeakOptions,
) -> Result<LeakReport, EngineError> {
    find_leaks_verified(store, catalog, options, None)
}

/// What the search for one evaluated image's leak found.
enum LeakSearch {
    /// A reference image with the same bytes or pixels: a leak without judgement.
    Exact(Box<Leak>),
    /// Reference images close enough to be judged, best first.
    Near(Vec<Candidate>),
}

/// The order splits are checked in without a reference split: an image
/// leaks when a copy of it is in a split before its own (train, then val,
/// then test, then other splits by name).
fn split_rank(split: &str) -> (u8, &str) {
    match split {
        "train" => (0, ""),
        "val" => (1, ""),
        "test" => (2, ""),
        other => (3, other),
    }
}

/// As [`find_leaks`], verifying near pairs when `options.duplicates.verify`
/// is set and a verifier is given: each image's reference neighbours from
/// the candidate threshold up are checked in order of similarity and the
/// first accepted one is its counterpart.
pub fn find_leaks_verified(
    store: &Store,
    catalog: &Catalog,
    options: &LeakOptions,
    verifier: Option<&PairVerifier>,
) -> Result<LeakReport, EngineError> {
    let reference = options.reference_split.as_deref();
    // A collection without splits has nothing to leak; in one with splits, a
    // split nobody is in is a typo, not "no leaks".
    if !catalog.splits().is_empty() {
        for split in reference
            .into_iter()
            .chain(options.evaluated_splits.iter().map(String::as_str))
        {
            catalog.check_split(split)?;
        }
    }
    let split_of = |row: usize| catalog.records[row].split.as_deref();
    let mut all_splits = catalog.splits();
    all_splits.sort_by(|a, b| split_rank(a).cmp(&split_rank(b)));
    let mut evaluated: Vec<String> = if options.evaluated_splits.is_empty() {
        all_splits.clone()
    } else {
        options.evaluated_splits.clone()
    };
    // Checked against the reference split, or against the splits before
    // their own: the first split has nothing before it.
    match reference {
        Some(reference) => evaluated.retain(|s| s != reference),
        None => evaluated.retain(|s| all_splits.first() != Some(s)),
    }
    // Whether the image at `other` can be the counterpart of the one at `row`.
    let counterpart_split = |row: usize, other: usize| match (split_of(other), reference) {
        (Some(other_split), Some(reference)) => other_split == reference,
        (Some(other_split), None) => {
            split_of(row).is_some_and(|own| split_rank(other_split) < split_rank(own))
        }
        (None, _) => false,
    };

    // Images with a split by content and by pixels, earliest split first, so
    // an exact copy is found in the earliest split that holds one.
    let mut by_content: HashMap<[u8; 32], Vec<usize>> = HashMap::new();
    let mut by_pixels: HashMap<[u8; 32], Vec<usize>> = HashMap::new();
    let mut with_split: Vec<usize> = (0..catalog.len())
        .filter(|&r| split_of(r).is_some())
        .collect();
    with_split.sort_by_key(|&row| split_of(row).map(split_rank));
    for &row in &with_split {
        let record = &catalog.records[row];
        by_content.entry(record.content_hash).or_default().push(row);
        by_pixels.entry(record.pixel_hash).or_default().push(row);
    }

    let rows: Vec<usize> = (0..catalog.len())
        .filter(|&row| split_of(row).is_some_and(|s| evaluated.iter().any(|e| e == s)))
        .collect();
    let duplicates = &options.duplicates;
    let floor = candidate_floor(duplicates, verifier);
    let decisions = DecisionState::load(store, catalog)?;
    let distinct = |first: usize, second: usize| {
        decisions.are_distinct(&catalog.records[first], &catalog.records[second])
    };
    let leak = |row: usize, other: usize, tier, similarity, verification| {
        let (id, other_id) = (catalog.ids[row], catalog.ids[other]);
        let dropped = |id| decisions.fate(id) == Some(Fate::Drop);
        let moved = decisions
            .split(id)
            .is_some_and(|split| Some(split) != split_of(row));
        Leak {
            image: catalog.image_ref(row),
            counterpart: catalog.image_ref(other),
            tier,
            similarity,
            verification,
            decided: dropped(id) || dropped(other_id) || moved,
            image_last_decision: decisions.latest_on(&[id], catalog),
            counterpart_last_decision: decisions.latest_on(&[other_id], catalog),
        }
    };
    // Exact matches need no judgement; the others become near candidates.
    let found: Vec<Result<LeakSearch, EngineError>> = rows
        .par_iter()
        .map(|&row| {
            let record = &catalog.records[row];
            let first_counterpart = |rows: Option<&Vec<usize>>| {
                rows?
                    .iter()
                    .copied()
                    .find(|&other| other != row && counterpart_split(row, other))
            };
            let exact = first_counterpart(by_content.get(&record.content_hash))
                .map(|other| (other, DuplicateTier::Bytes))
                .or_else(|| {
                    first_counterpart(by_pixels.get(&record.pixel_hash))
                        .map(|other| (other, DuplicateTier::Pixels))
                });
            // A pair said to be distinct is left to the near search, which
            // finds it again (cosine 1) and leaves it out, counted once.
            if let Some((other, tier)) = exact.filter(|&(other, _)| !distinct(row, other)) {
                return Ok(LeakSearch::Exact(Box::new(leak(
                    row,
                    other,
                    tier,
                    catalog.similarity(row, other),
                    None,
                ))));
            }
            let depth = if floor < duplicates.near_duplicate_threshold {
                duplicates.neighbours_per_image.max(1)
            } else {
                1
            };
            let in_reference = |id: ImageId| {
                catalog
                    .row(id)
                    .is_some_and(|other| counterpart_split(row, other))
            };
            Ok(LeakSearch::Near(
                catalog
                    .nearest_rows(store, catalog.embedding_at(row), depth, Some(&in_reference))?
                    .into_iter()
                    .filter(|&(_, similarity)| similarity >= floor)
                    .map(|(second, similarity)| Candidate {
                        first: row,
                        second,
                        similarity,
                    })
                    .collect(),
            ))
        })
        .collect();
    let mut leaks = Vec::new();
    let mut candidates = Vec::new();
    for outcome in found {
        match outcome? {
            LeakSearch::Exact(exact) => leaks.push(*exact),
            LeakSearch::Near(near) => candidates.extend(near),
        }
    }
    let near_count = candidates.len();
    candidates.retain(|c| !distinct(c.first, c.second));
    let left_out_as_distinct = near_count - candidates.len();
    let (verdicts, verification) = judge(store, catalog, duplicates, verifier, &candidates)?;
    // Candidates are grouped by row in decreasing similarity: the first
    // accepted one of each row is its counterpart.
    let mut last_row = None;
    for (candidate, verdict) in candidates.iter().zip(verdicts) {
        if let (Some(verdict), true) = (verdict, last_row != Some(candidate.first)) {
            last_row = Some(candidate.first);
            leaks.push(leak(
                candidate.first,
                candidate.second,
                DuplicateTier::Near,
                candidate.similarity,
                Some(verdict),
            ));
        }
    }
    let summary = evaluated
        .iter()
        .map(|split| {
            let images = rows
                .iter()
                .filter(|&&row| split_of(row) == Some(split.as_str()))
                .count();
            let leaked = leaks
                .iter()
                .filter(|l| l.image.split.as_deref() == Some(split.as_str()))
                .count();
            SplitLeakSummary {
                split: split.clone(),
                images,
                leaked,
                leaked_percent: if images == 0 {
                    0.0
                } else {
                    100.0 * leaked as f64 / images as f64
                },
            }
        })
        .collect();
    let mut between: BTreeMap<(String, String), usize> = BTreeMap::new();
    let mut per_label: BTreeMap<String, usize> = BTreeMap::new();
    for leak in &leaks {
        if let (Some(split), Some(other)) = (&leak.image.split, &leak.counterpart.split) {
            *between.entry((split.clone(), other.clone())).or_default() += 1;
        }
        let label = leak.image.label.clone().unwrap_or_else(|| "(none)".into());
        *per_label.entry(label).or_default() += 1;
    }
    let mut between: Vec<SplitPairLeaks> = between
        .into_iter()
        .map(|((split, from), leaked)| SplitPairLeaks {
            split,
            from,
            leaked,
        })
        .collect();
    between.sort_by(|a, b| {
        (split_rank(&a.split), split_rank(&a.from))
            .cmp(&(split_rank(&b.split), split_rank(&b.from)))
    });
    Ok(LeakReport {
        reference_split: options.reference_split.clone(),
        summary,
        between,
        per_label: per_label
            .into_iter()
            .map(|(label, leaked)| LabelLeaks { label, leaked })
            .collect(),
        leaks,
        verification,
        left_out_as_distinct,
    })
}
