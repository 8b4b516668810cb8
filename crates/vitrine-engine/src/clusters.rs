//! Cluster summaries of a collection: spherical k-means (k-means++ seeding,
//! deterministic with a seed) and, per cluster, its size, medoid image, top
//! labels, split mix and cohesion.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::analytics::kmeans::{
    automatic_n_clusters, kmeans, summarise_cluster, summarise_clusters, KMeansOptions,
    AUTOMATIC_N_CLUSTERS_CAP,
};
use crate::catalog::{dot, Catalog, ImageRef};
use crate::error::EngineError;

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ClusterOptions {
    /// `None`: chosen by [`automatic_n_clusters`] (about sqrt(n/2), capped).
    pub n_clusters: Option<usize>,
    pub seed: u64,
}

impl Default for ClusterOptions {
    fn default() -> Self {
        Self {
            n_clusters: None,
            seed: 7,
        }
    }
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LabelShare {
    pub label: String,
    pub count: usize,
    pub share: f64,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SplitCount {
    pub split: String,
    pub count: usize,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ClusterSummary {
    pub index: usize,
    pub size: usize,
    /// The member with the highest mean similarity to the others.
    pub medoid: ImageRef,
    /// Mean cosine similarity of the members to the cluster's centroid.
    pub cohesion: f32,
    /// How much tighter than the whole collection the cluster is:
    /// `(cohesion - c) / (1 - c)`, with `c` the collection's own cohesion
    /// (the mean cosine of every image to the collection's mean direction).
    /// 0: as loose as the collection; 1: every member the same picture.
    /// Embeddings of one model sit in a narrow cone, so raw cohesions of
    /// distinct groups all look high; this spreads them out.
    pub tightness: f32,
    /// Members with a label: `top_labels` shares are of these.
    pub labelled_members: usize,
    /// Labels by decreasing share of the labelled members.
    pub top_labels: Vec<LabelShare>,
    pub split_mix: Vec<SplitCount>,
    /// Every member, most central first.
    pub members: Vec<ImageRef>,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ClusterReport {
    pub n_clusters: usize,
    /// How the number of clusters was chosen.
    pub chosen_by: String,
    /// The collection's own cohesion, which `tightness` is measured against.
    pub collection_cohesion: f32,
    /// Set when the number of clusters asked for could not be given.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    pub seed: u64,
    /// Largest first.
    pub clusters: Vec<ClusterSummary>,
}

/// `(cohesion - collection) / (1 - collection)`; 1 when the collection is
/// itself one picture.
fn relative_tightness(cohesion: f32, collection: f32) -> f32 {
    if collection >= 1.0 {
        1.0
    } else {
        (cohesion - collection) / (1.0 - collection)
    }
}

fn counts_by<'a>(values: impl Iterator<Item = Option<&'a String>>) -> BTreeMap<String, usize> {
    let mut counts = BTreeMap::new();
    for value in values {
        *counts
            .entry(value.cloned().unwrap_or_else(|| "(none)".into()))
            .or_insert(0) += 1;
    }
    counts
}

pub fn cluster_collection(
    catalog: &Catalog,
    options: &ClusterOptions,
) -> Result<ClusterReport, EngineError> {
    let n_items = catalog.len();
    if n_items == 0 {
        return Ok(ClusterReport {
            n_clusters: 0,
            chosen_by: "the collection is empty".into(),
            collection_cohesion: 0.0,
            note: None,
            seed: options.seed,
            clusters: Vec::new(),
        });
    }
    if options.n_clusters == Some(0) {
        return Err(EngineError::InvalidArgument(
            "the number of clusters must be at least 1".into(),
        ));
    }
    let n_clusters = options
        .n_clusters
        .unwrap_or_else(|| automatic_n_clusters(n_items))
        .min(n_items);
    let note = options
        .n_clusters
        .filter(|&asked| asked > n_items)
        .map(|asked| {
            format!("{asked} clusters were asked for, but the collection has {n_items} images: {n_clusters} clusters")
        });
    let chosen_by = match options.n_clusters {
        Some(_) => "asked for".to_owned(),
        None => format!(
            "rule of thumb round(sqrt(n / 2)) for n = {n_items} images, at most {AUTOMATIC_N_CLUSTERS_CAP}"
        ),
    };
    let kmeans_options = KMeansOptions {
        seed: options.seed,
        ..KMeansOptions::new(n_clusters)
    };
    let result = kmeans(&catalog.embeddings, catalog.dim, &kmeans_options)?;
    let summaries = summarise_clusters(
        &catalog.embeddings,
        catalog.dim,
        &result.assignments,
        n_clusters,
    )?;
    let everyone: Vec<usize> = (0..n_items).collect();
    let collection_cohesion = summarise_cluster(&catalog.embeddings, catalog.dim, &everyone)?
        .map_or(0.0, |summary| summary.cohesion);
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); n_clusters];
    for (row, &cluster) in result.assignments.iter().enumerate() {
        members[cluster].push(row);
    }
    let mut clusters: Vec<ClusterSummary> = Vec::new();
    for (index, (rows, summary)) in members.into_iter().zip(summaries).enumerate() {
        let Some(summary) = summary else { continue };
        let centroid = &result.centroids[index * catalog.dim..(index + 1) * catalog.dim];
        let mut ordered = rows.clone();
        ordered.sort_by(|&a, &b| {
            dot(catalog.embedding_at(b), centroid)
                .total_cmp(&dot(catalog.embedding_at(a), centroid))
        });
        let labelled: Vec<&String> = rows
            .iter()
            .filter_map(|&row| catalog.records[row].label.as_ref())
            .collect();
        let mut top_labels: Vec<LabelShare> = counts_by(labelled.iter().copied().map(Some))
            .into_iter()
            .map(|(label, count)| LabelShare {
                label,
                count,
                share: count as f64 / labelled.len() as f64,
            })
            .collect();
        top_labels.sort_by(|a, b| b.count.cmp(&a.count).then(a.label.cmp(&b.label)));
        let split_mix = counts_by(rows.iter().map(|&row| catalog.records[row].split.as_ref()))
            .into_iter()
            .map(|(split, count)| SplitCount { split, count })
            .collect();
        clusters.push(ClusterSummary {
            index,
            size: rows.len(),
            medoid: catalog.image_ref(summary.medoid),
            cohesion: summary.cohesion,
            tightness: relative_tightness(summary.cohesion, collection_cohesion),
            labelled_members: labelled.len(),
            top_labels,
            split_mix,
            members: ordered.iter().map(|&row| catalog.image_ref(row)).collect(),
        });
    }
    clusters.sort_by(|a, b| b.size.cmp(&a.size).then(a.index.cmp(&b.index)));
    Ok(ClusterReport {
        n_clusters,
        chosen_by,
        collection_cohesion,
        note,
        seed: options.seed,
        clusters,
    })
}
