//! Duplicate groups and leakage between splits, in three tiers: identical
//! bytes, identical decoded pixels, and near-duplicates (cosine similarity of
//! embeddings at or above a threshold).
//!
//! Near-duplicate candidates come from each image's k nearest neighbours in
//! the HNSW index (O(n·k) work, never all pairs); groups are the connected
//! components of those edges (union-find). Only a report: nothing is deleted.

use std::collections::HashMap;

use rayon::prelude::*;
use serde::Serialize;
use vitrine_store::{ImageId, Store};

use crate::analytics::grouping::{group_by_similarity, SimilarityEdge};
use crate::catalog::{Catalog, ImageRef};
use crate::error::EngineError;

/// How strongly two images are the same picture.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
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
#[derive(Clone, Debug)]
pub struct DuplicateOptions {
    pub near_duplicate_threshold: f32,
    /// Neighbours examined per image when looking for near-duplicates.
    pub neighbours_per_image: usize,
}

impl Default for DuplicateOptions {
    fn default() -> Self {
        Self {
            near_duplicate_threshold: DEFAULT_NEAR_DUPLICATE_THRESHOLD,
            neighbours_per_image: 10,
        }
    }
}

/// The default near-duplicate threshold for the default model's class-token
/// embeddings; see DEVELOPERS.md ("Threshold") for the measurement behind it.
pub const DEFAULT_NEAR_DUPLICATE_THRESHOLD: f32 = 0.90;

/// One member of a duplicate group.
#[derive(Clone, Debug, Serialize)]
pub struct GroupMember {
    #[serde(flatten)]
    pub image: ImageRef,
    /// How this member relates to the group's keeper (the keeper itself: bytes).
    pub tier: DuplicateTier,
    /// Cosine similarity to the keeper.
    pub similarity: f32,
    pub keeper: bool,
    pub width: u32,
    pub height: u32,
    pub byte_size: u64,
}

/// A group of images that are copies of one picture.
#[derive(Clone, Debug, Serialize)]
pub struct DuplicateGroup {
    /// The weakest tier linking any member to the keeper.
    pub tier: DuplicateTier,
    /// The suggested keeper first, then the others by decreasing similarity.
    pub members: Vec<GroupMember>,
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

/// Near-duplicate edges from each row's nearest neighbours.
fn near_edges(
    store: &Store,
    catalog: &Catalog,
    options: &DuplicateOptions,
) -> Result<Vec<SimilarityEdge<usize>>, EngineError> {
    let per_row: Vec<Result<Vec<SimilarityEdge<usize>>, EngineError>> = (0..catalog.len())
        .into_par_iter()
        .map(|row| {
            let hits = store.search(
                catalog.embedding_at(row),
                options.neighbours_per_image + 1,
                None,
            )?;
            Ok(hits
                .into_iter()
                .filter(|&(_, similarity)| similarity >= options.near_duplicate_threshold)
                .filter_map(|(id, similarity)| {
                    let other = catalog.row(id)?;
                    (other > row).then_some(SimilarityEdge {
                        first: row,
                        second: other,
                        similarity,
                    })
                })
                .collect())
        })
        .collect();
    let mut edges = Vec::new();
    for row_edges in per_row {
        edges.extend(row_edges?);
    }
    Ok(edges)
}

/// Every group of duplicates in the collection, largest first.
pub fn find_duplicate_groups(
    store: &Store,
    catalog: &Catalog,
    options: &DuplicateOptions,
) -> Result<Vec<DuplicateGroup>, EngineError> {
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
    edges.extend(near_edges(store, catalog, options)?);
    let components = group_by_similarity(edges, options.near_duplicate_threshold.min(1.0))
        .map_err(|e| EngineError::InvalidArgument(e.to_string()))?;
    Ok(components
        .into_iter()
        .map(|rows| build_group(catalog, rows))
        .collect())
}

fn build_group(catalog: &Catalog, mut rows: Vec<usize>) -> DuplicateGroup {
    rows.sort_by(|&a, &b| keeper_order(catalog, a, b));
    let keeper = rows[0];
    let mut members: Vec<GroupMember> = rows
        .iter()
        .map(|&row| {
            let record = &catalog.records[row];
            GroupMember {
                image: catalog.image_ref(row),
                tier: tier_between(catalog, keeper, row),
                similarity: catalog.similarity(keeper, row),
                keeper: row == keeper,
                width: record.width,
                height: record.height,
                byte_size: record.byte_size,
            }
        })
        .collect();
    members[1..].sort_by(|a, b| b.similarity.total_cmp(&a.similarity));
    let tier = members
        .iter()
        .map(|m| m.tier)
        .max()
        .unwrap_or(DuplicateTier::Bytes);
    DuplicateGroup { tier, members }
}

/// An image of an evaluated split that also appears in the reference split.
#[derive(Clone, Debug, Serialize)]
pub struct Leak {
    #[serde(flatten)]
    pub image: ImageRef,
    /// Its closest copy in the reference split.
    pub counterpart: ImageRef,
    pub tier: DuplicateTier,
    pub similarity: f32,
}

/// Leak counts of one evaluated split.
#[derive(Clone, Debug, Serialize)]
pub struct SplitLeakSummary {
    pub split: String,
    pub images: usize,
    pub leaked: usize,
    pub leaked_percent: f64,
}

#[derive(Clone, Debug, Serialize)]
pub struct LeakReport {
    pub reference_split: String,
    pub summary: Vec<SplitLeakSummary>,
    pub leaks: Vec<Leak>,
}

/// Which splits to check against which.
#[derive(Clone, Debug)]
pub struct LeakOptions {
    /// Splits whose images are checked; empty means every split but the reference.
    pub evaluated_splits: Vec<String>,
    pub reference_split: String,
    pub duplicates: DuplicateOptions,
}

impl Default for LeakOptions {
    fn default() -> Self {
        Self {
            evaluated_splits: Vec::new(),
            reference_split: "train".into(),
            duplicates: DuplicateOptions::default(),
        }
    }
}

/// Every image of the evaluated splits with a duplicate-tier match in the
/// reference split, with a per-split summary.
pub fn find_leaks(
    store: &Store,
    catalog: &Catalog,
    options: &LeakOptions,
) -> Result<LeakReport, EngineError> {
    let reference = options.reference_split.as_str();
    let split_of = |row: usize| catalog.records[row].split.as_deref();
    let mut evaluated: Vec<String> = if options.evaluated_splits.is_empty() {
        let mut splits: Vec<String> = catalog
            .records
            .iter()
            .filter_map(|r| r.split.clone())
            .filter(|s| s != reference)
            .collect();
        splits.sort();
        splits.dedup();
        splits
    } else {
        options.evaluated_splits.clone()
    };
    evaluated.retain(|s| s != reference);

    let mut by_content: HashMap<[u8; 32], usize> = HashMap::new();
    let mut by_pixels: HashMap<[u8; 32], usize> = HashMap::new();
    for (row, record) in catalog.records.iter().enumerate() {
        if record.split.as_deref() == Some(reference) {
            by_content.entry(record.content_hash).or_insert(row);
            by_pixels.entry(record.pixel_hash).or_insert(row);
        }
    }
    let in_reference = |id: ImageId| {
        catalog
            .row(id)
            .is_some_and(|row| split_of(row) == Some(reference))
    };

    let rows: Vec<usize> = (0..catalog.len())
        .filter(|&row| split_of(row).is_some_and(|s| evaluated.iter().any(|e| e == s)))
        .collect();
    let found: Vec<Result<Option<Leak>, EngineError>> = rows
        .par_iter()
        .map(|&row| {
            let record = &catalog.records[row];
            let exact = by_content
                .get(&record.content_hash)
                .map(|&other| (other, DuplicateTier::Bytes))
                .or_else(|| {
                    by_pixels
                        .get(&record.pixel_hash)
                        .map(|&other| (other, DuplicateTier::Pixels))
                });
            let matched = match exact {
                Some((other, tier)) => Some((other, tier, catalog.similarity(row, other))),
                None => store
                    .search(catalog.embedding_at(row), 1, Some(&in_reference))?
                    .into_iter()
                    .find(|&(_, s)| s >= options.duplicates.near_duplicate_threshold)
                    .and_then(|(id, s)| Some((catalog.row(id)?, DuplicateTier::Near, s))),
            };
            Ok(matched.map(|(other, tier, similarity)| Leak {
                image: catalog.image_ref(row),
                counterpart: catalog.image_ref(other),
                tier,
                similarity,
            }))
        })
        .collect();
    let mut leaks = Vec::new();
    for leak in found {
        leaks.extend(leak?);
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
    Ok(LeakReport {
        reference_split: options.reference_split.clone(),
        summary,
        leaks,
    })
}
