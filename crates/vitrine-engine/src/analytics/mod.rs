//! Store-independent algorithms over embedding vectors and neighbour lists.
//!
//! Everything here works on plain data: vectors are row-major `&[f32]` slices with an
//! explicit `dim` (row `i` is `vectors[i * dim..(i + 1) * dim]`), items are row indices or
//! caller-chosen ids, and neighbour lists carry cosine similarities. The engine wires these
//! functions to the store; nothing in this module reads or writes it.
//!
//! - [`grouping`]: groups of items joined by similarity edges at or above a threshold
//!   (union-find).
//! - [`kmeans`]: spherical k-means and Lloyd's k-means with k-means++ seeding, an automatic
//!   choice of the number of clusters, and per-cluster medoid and cohesion.
//! - [`label_vote`]: similarity-weighted k-nearest-neighbour label votes and the reverse view,
//!   how strongly an item's neighbours disagree with its own label.
//! - [`logistic`]: regularised multinomial logistic regression (scikit-learn's objective,
//!   our L-BFGS).
//! - [`cross_validation`]: seeded stratified folds and out-of-fold logits.
//! - [`calibration`]: reliability tables, accuracy above a confidence cut, isotonic
//!   recalibration.

pub mod calibration;
pub mod cross_validation;
pub mod grouping;
pub mod kmeans;
pub mod label_vote;
mod lbfgs;
pub mod logistic;
mod matmul;
mod similarity;

pub use calibration::{
    expected_calibration_error, reliability_table, top_class_outcomes, AccuracyCurve,
    ConfidenceOutcome, CoverageAccuracy, IsotonicCalibration, ReliabilityBin,
};
pub use cross_validation::{out_of_fold_logits, stratified_folds, FoldFit, OutOfFoldLogits};
pub use grouping::{group_by_similarity, SimilarityEdge};
pub use kmeans::{
    automatic_n_clusters, kmeans, summarise_cluster, summarise_clusters, ClusterSummary,
    KMeansOptions, KMeansResult, AUTOMATIC_N_CLUSTERS_CAP,
};
pub use label_vote::{
    label_disagreement, neighbour_weight, vote_label, LabelDisagreement, LabelVote, VotingNeighbour,
};
pub use logistic::{
    fit_logistic_regression, softmax_rows, LogisticFit, LogisticModel, LogisticRegressionOptions,
    Termination,
};

/// Errors raised by the analytics algorithms; each names the offending argument.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum AnalyticsError {
    #[error("vector dimension must be at least 1")]
    ZeroDimension,
    #[error("{what}: length {len} is not a multiple of the vector dimension {dim}")]
    RaggedVectors {
        what: &'static str,
        len: usize,
        dim: usize,
    },
    #[error("{what}: row {row} contains a non-finite value")]
    NonFiniteValue { what: &'static str, row: usize },
    #[error(
        "vectors: row {row} has L2 norm {norm}, spherical k-means needs L2-normalised vectors"
    )]
    NotNormalised { row: usize, norm: f32 },
    #[error("n_clusters = {n_clusters} is invalid for {n_items} vectors (need 1 <= n_clusters <= n_items)")]
    InvalidClusterCount { n_clusters: usize, n_items: usize },
    #[error("initial_centres: holds {found} centres, expected n_clusters = {expected}")]
    InitialCentresCount { found: usize, expected: usize },
    #[error("initial_centres: centre {centre} has zero length and cannot be renormalised")]
    ZeroInitialCentre { centre: usize },
    #[error("{name} = {value} is invalid: {reason}")]
    InvalidParameter {
        name: &'static str,
        value: String,
        reason: &'static str,
    },
    #[error("assignments: holds {found} entries for {expected} vectors")]
    AssignmentsLength { found: usize, expected: usize },
    #[error("assignments: row {row} names cluster {cluster}, but n_clusters is {n_clusters}")]
    ClusterOutOfRange {
        row: usize,
        cluster: usize,
        n_clusters: usize,
    },
    #[error("{what}: index {index} is out of range for {n_items} vectors")]
    IndexOutOfRange {
        what: &'static str,
        index: usize,
        n_items: usize,
    },
    #[error("{what}: holds {found} entries for {expected} rows")]
    LengthMismatch {
        what: &'static str,
        found: usize,
        expected: usize,
    },
    #[error("{what}: row {row} holds {value}, which must be below {limit}")]
    ValueOutOfRange {
        what: &'static str,
        row: usize,
        value: usize,
        limit: usize,
    },
    #[error("class {class} has no labelled item")]
    ClassWithoutItems { class: usize },
    #[error("class {class} has no labelled item outside fold {fold}, so that fold's model cannot learn it")]
    ClassMissingFromTraining { class: usize, fold: usize },
}

/// Checks that `vectors` is a whole number of finite rows of length `dim`; returns the row count.
fn count_rows(what: &'static str, vectors: &[f32], dim: usize) -> Result<usize, AnalyticsError> {
    if dim == 0 {
        return Err(AnalyticsError::ZeroDimension);
    }
    let n_rows = vectors.len() / dim;
    if n_rows * dim != vectors.len() {
        return Err(AnalyticsError::RaggedVectors {
            what,
            len: vectors.len(),
            dim,
        });
    }
    if let Some(row) = vectors
        .chunks_exact(dim)
        .position(|row| row.iter().any(|value| !value.is_finite()))
    {
        return Err(AnalyticsError::NonFiniteValue { what, row });
    }
    Ok(n_rows)
}
