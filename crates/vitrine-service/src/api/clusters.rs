//! Clusters of the collection (spherical k-means) and their members.

use std::sync::Arc;

use actix_web::{get, web, HttpResponse};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};
use vitrine_engine::clusters::{cluster_collection, ClusterOptions, ClusterReport, ClusterSummary};

use super::analyses::ImageBrief;
use super::{blocking, PageWindow, State};
use crate::collection::{Collection, Snapshot};
use crate::error::{ApiError, ErrorBody};
use crate::settings::ServeSettings;

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct ClusterParams {
    /// Number of clusters (default: chosen from the collection's size).
    pub k: Option<usize>,
    /// Seed of the k-means++ initialisation (default 7).
    pub seed: Option<u64>,
}

impl ClusterParams {
    pub fn options(&self, settings: &ServeSettings) -> Result<ClusterOptions, ApiError> {
        if let Some(k) = self.k {
            if k == 0 || k > settings.max_k {
                return Err(ApiError::bad_request(
                    "k_out_of_range",
                    format!("k must be between 1 and {}", settings.max_k),
                ));
            }
        }
        Ok(ClusterOptions {
            n_clusters: self.k,
            seed: self.seed.unwrap_or(ClusterOptions::default().seed),
        })
    }
}

/// The clustering of `snapshot` for `options`, computed once per committed state.
pub fn clustering(
    collection: &Collection,
    snapshot: &Snapshot,
    options: &ClusterOptions,
) -> Result<Arc<ClusterReport>, ApiError> {
    collection
        .clusters
        .get_or_try(snapshot.generation, options.clone(), || {
            cluster_collection(&snapshot.catalog, options)
        })
        .map_err(ApiError::from)
}

#[derive(Debug, Serialize, ToSchema)]
pub struct LabelShareBody {
    pub label: String,
    pub count: usize,
    pub share: f64,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct SplitCountBody {
    pub split: String,
    pub count: usize,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct ClusterBody {
    /// The cluster's number, as used by `/clusters/{n}`.
    pub index: usize,
    pub size: usize,
    /// The member with the highest mean similarity to the others.
    pub medoid: ImageBrief,
    /// Mean cosine similarity of the members to the centroid.
    pub cohesion: f32,
    /// How much tighter than the whole collection: `(cohesion - c) / (1 - c)`
    /// with `c` the collection's cohesion; 0 as loose as the collection, 1
    /// every member the same picture.
    pub tightness: f32,
    /// Members with a label: `top_labels` shares are of these.
    pub labelled_members: usize,
    /// Labels by decreasing share of the labelled members.
    pub top_labels: Vec<LabelShareBody>,
    pub split_mix: Vec<SplitCountBody>,
}

impl From<&ClusterSummary> for ClusterBody {
    fn from(c: &ClusterSummary) -> Self {
        Self {
            index: c.index,
            size: c.size,
            medoid: (&c.medoid).into(),
            cohesion: c.cohesion,
            tightness: c.tightness,
            labelled_members: c.labelled_members,
            top_labels: c
                .top_labels
                .iter()
                .map(|l| LabelShareBody {
                    label: l.label.clone(),
                    count: l.count,
                    share: l.share,
                })
                .collect(),
            split_mix: c
                .split_mix
                .iter()
                .map(|s| SplitCountBody {
                    split: s.split.clone(),
                    count: s.count,
                })
                .collect(),
        }
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct ClustersBody {
    pub n_clusters: usize,
    /// How the number of clusters was chosen.
    pub chosen_by: String,
    /// The collection's own cohesion, which `tightness` is measured against.
    pub collection_cohesion: f32,
    /// Set when the number of clusters asked for could not be given.
    pub note: Option<String>,
    pub seed: u64,
    /// Largest first.
    pub clusters: Vec<ClusterBody>,
}

/// Cluster summaries: size, medoid, top labels, split mix, cohesion.
#[utoipa::path(
    operation_id = "cluster_summaries",
    tag = "clusters",
    params(("collection" = String, Path, description = "Collection name"), ClusterParams),
    responses(
        (status = 200, body = ClustersBody),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[get("/collections/{collection}/clusters")]
pub async fn summaries(
    state: State,
    path: web::Path<String>,
    query: web::Query<ClusterParams>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let options = query.options(&state.settings)?;
    let report =
        blocking(move || clustering(&collection, &collection.snapshot(), &options)).await?;
    Ok(HttpResponse::Ok().json(ClustersBody {
        n_clusters: report.n_clusters,
        chosen_by: report.chosen_by.clone(),
        collection_cohesion: report.collection_cohesion,
        note: report.note.clone(),
        seed: report.seed,
        clusters: report.clusters.iter().map(ClusterBody::from).collect(),
    }))
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct MemberParams {
    /// Number of clusters of the clustering (as for the summaries).
    pub k: Option<usize>,
    pub seed: Option<u64>,
    pub page: Option<usize>,
    pub per_page: Option<usize>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct ClusterMembersPage {
    pub index: usize,
    /// Most central first.
    pub items: Vec<ImageBrief>,
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// The members of one cluster, most central first.
#[utoipa::path(
    operation_id = "cluster_members",
    tag = "clusters",
    params(
        ("collection" = String, Path, description = "Collection name"),
        ("n" = usize, Path, description = "Cluster number (`index` in the summaries)"),
        MemberParams,
    ),
    responses(
        (status = 200, body = ClusterMembersPage),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[get("/collections/{collection}/clusters/{n}")]
pub async fn members(
    state: State,
    path: web::Path<(String, usize)>,
    query: web::Query<MemberParams>,
) -> Result<HttpResponse, ApiError> {
    let (name, index) = path.into_inner();
    let collection = state.collection(&name)?;
    let options = ClusterParams {
        k: query.k,
        seed: query.seed,
    }
    .options(&state.settings)?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let snapshot = collection.snapshot();
    let report = blocking(move || clustering(&collection, &snapshot, &options)).await?;
    let cluster = report
        .clusters
        .iter()
        .find(|c| c.index == index)
        .ok_or_else(|| {
            ApiError::not_found(
                "unknown_cluster",
                format!("the clustering has no cluster {index}"),
            )
        })?;
    let items = cluster.members[window.range(cluster.members.len())]
        .iter()
        .map(ImageBrief::from)
        .collect();
    Ok(HttpResponse::Ok().json(ClusterMembersPage {
        index,
        items,
        total: cluster.members.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}
