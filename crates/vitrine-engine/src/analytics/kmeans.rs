//! k-means clustering of embedding vectors.
//!
//! Two modes share one loop (assign every vector to a centre, recompute the centres, repeat):
//!
//! - **spherical** (`renormalise_centroids: true`, the default): vectors must be L2-normalised;
//!   each vector goes to the centre with the largest cosine similarity and each centre is the
//!   normalised sum of its members (Dhillon & Modha, 2001). The objective is the sum of the
//!   members' cosine similarities to their centres (larger is better).
//! - **Lloyd** (`renormalise_centroids: false`): plain k-means on the given vectors with squared
//!   Euclidean distance and centres = member means. The iteration, stopping rule, empty-cluster
//!   relocation and tie-breaking follow scikit-learn's `KMeans(algorithm="lloyd")`, so from the
//!   same initial centres it reaches the same assignments. The objective is the inertia, the
//!   sum of squared distances to the centres (smaller is better).
//!
//! Seeding is k-means++ (Arthur & Vassilvitskii, 2007): the first centre is a uniformly drawn
//! vector, each next one is drawn with probability proportional to its squared Euclidean
//! distance to the nearest centre chosen so far ("D² sampling"), in the greedy form scikit-learn
//! also uses (several candidates per step, keep the best). Draws come from ChaCha8 seeded with
//! `seed`, and all parallel work is split so that results do not depend on the thread count.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use super::similarity::{dot, map_blocks_with_scores, map_rows_with_scores, squared_distance};
use super::{count_rows, AnalyticsError};

/// How far from 1 an input norm may be before spherical mode rejects the vector.
const UNIT_NORM_TOLERANCE: f32 = 1e-3;

/// Settings for [`kmeans`]. [`KMeansOptions::new`] gives the defaults.
#[derive(Debug, Clone, PartialEq)]
pub struct KMeansOptions {
    pub n_clusters: usize,
    /// Upper bound on assignment/update rounds (at least 1). Default 300, as in scikit-learn.
    pub max_iterations: usize,
    /// Stop once the summed squared movement of all centres in one round is at most
    /// `tolerance` times the mean per-dimension variance of the data (scikit-learn's relative
    /// rule); rounds also stop as soon as no assignment changes. 0 disables the movement rule.
    /// Default 1e-4, as in scikit-learn.
    pub tolerance: f64,
    /// Seed for k-means++; unused when `initial_centres` is given. Default 0.
    pub seed: u64,
    /// `true`: spherical k-means (cosine); `false`: Lloyd (squared Euclidean). Default `true`.
    pub renormalise_centroids: bool,
    /// `n_clusters x dim` row-major starting centres instead of k-means++. In spherical mode
    /// they are normalised first.
    pub initial_centres: Option<Vec<f32>>,
}

impl KMeansOptions {
    pub fn new(n_clusters: usize) -> Self {
        Self {
            n_clusters,
            max_iterations: 300,
            tolerance: 1e-4,
            seed: 0,
            renormalise_centroids: true,
            initial_centres: None,
        }
    }
}

/// Outcome of [`kmeans`].
#[derive(Debug, Clone, PartialEq)]
pub struct KMeansResult {
    /// Cluster index of each input row, consistent with `centroids`.
    pub assignments: Vec<usize>,
    /// `n_clusters x dim` row-major; unit length in spherical mode.
    pub centroids: Vec<f32>,
    /// Spherical: sum of cosine similarities to the assigned centroid (higher is better).
    /// Lloyd: sum of squared Euclidean distances to the assigned centroid (lower is better).
    pub objective: f64,
    /// Assignment/update rounds run (scikit-learn's `n_iter_`).
    pub iterations: usize,
    /// Whether a stopping rule fired before `max_iterations` ran out.
    pub converged: bool,
}

/// Largest number of clusters [`automatic_n_clusters`] proposes.
pub const AUTOMATIC_N_CLUSTERS_CAP: usize = 300;

/// Proposes a number of clusters for `n_items` vectors: `round(sqrt(n_items / 2))`, at least 1,
/// at most [`AUTOMATIC_N_CLUSTERS_CAP`] and never more than `n_items` (0 for no items).
///
/// `sqrt(n/2)` is a long-standing rule of thumb (quoted from memory from Mardia, Kent & Bibby,
/// *Multivariate Analysis*, 1979), chosen because it costs nothing at 100k points, unlike elbow
/// or silhouette scans that need several clusterings. It gives clusters of about
/// `sqrt(2 n)` members (about 450 at 100k items), a size a person can still browse; the cap
/// keeps the per-round cost (`n x dim x k`) and the cluster listing bounded for large sets.
pub fn automatic_n_clusters(n_items: usize) -> usize {
    let rule_of_thumb = (n_items as f64 / 2.0).sqrt().round() as usize;
    rule_of_thumb
        .clamp(1, AUTOMATIC_N_CLUSTERS_CAP)
        .min(n_items)
}

/// Clusters the `dim`-dimensional rows of `vectors` (see the module documentation for the two
/// modes).
pub fn kmeans(
    vectors: &[f32],
    dim: usize,
    options: &KMeansOptions,
) -> Result<KMeansResult, AnalyticsError> {
    let n_items = count_rows("vectors", vectors, dim)?;
    let n_clusters = options.n_clusters;
    if n_clusters == 0 || n_clusters > n_items {
        return Err(AnalyticsError::InvalidClusterCount {
            n_clusters,
            n_items,
        });
    }
    if options.max_iterations == 0 {
        return Err(AnalyticsError::InvalidParameter {
            name: "max_iterations",
            value: "0".into(),
            reason: "must be at least 1",
        });
    }
    if options.tolerance.is_nan() || options.tolerance < 0.0 {
        return Err(AnalyticsError::InvalidParameter {
            name: "tolerance",
            value: options.tolerance.to_string(),
            reason: "must be a non-negative number",
        });
    }
    let spherical = options.renormalise_centroids;
    if spherical {
        check_unit_norms(vectors, dim)?;
    }

    let mut centres = match &options.initial_centres {
        Some(initial) => checked_initial_centres(initial, dim, n_clusters, spherical)?,
        None => kmeans_plus_plus(vectors, dim, n_clusters, options.seed),
    };
    let shift_threshold = if options.tolerance > 0.0 {
        options.tolerance * mean_per_dimension_variance(vectors, dim)
    } else {
        0.0
    };

    let mut previous_assignments: Option<Vec<usize>> = None;
    let mut assignment_matches_centres = false;
    let mut converged = false;
    let mut iterations = 0;
    let mut nearest = Vec::new();
    while iterations < options.max_iterations {
        iterations += 1;
        nearest = assign(vectors, &centres, dim, spherical);
        let updated = updated_centres(vectors, dim, &nearest, &centres, spherical);
        let centre_shift: f64 = centres
            .chunks_exact(dim)
            .zip(updated.chunks_exact(dim))
            .map(|(old, new)| f64::from(squared_distance(old, new)))
            .sum();
        centres = updated;
        let assignments_unchanged = previous_assignments
            .as_ref()
            .is_some_and(|previous| previous.iter().eq(nearest.iter().map(|n| &n.cluster)));
        if assignments_unchanged {
            // The centres were just recomputed from the same assignments, so they match.
            assignment_matches_centres = true;
            converged = true;
            break;
        }
        if centre_shift <= shift_threshold {
            converged = true;
            break;
        }
        previous_assignments = Some(nearest.iter().map(|n| n.cluster).collect());
    }
    if !assignment_matches_centres {
        // The last update moved the centres; assign once more so the labels match them.
        nearest = assign(vectors, &centres, dim, spherical);
    }

    let objective = vectors
        .par_chunks(dim)
        .zip(nearest.par_iter())
        .map(|(vector, nearest)| {
            let centre = &centres[nearest.cluster * dim..(nearest.cluster + 1) * dim];
            if spherical {
                f64::from(dot(vector, centre))
            } else {
                f64::from(squared_distance(vector, centre))
            }
        })
        .collect::<Vec<f64>>()
        .iter()
        .sum();
    Ok(KMeansResult {
        assignments: nearest.iter().map(|n| n.cluster).collect(),
        centroids: centres,
        objective,
        iterations,
        converged,
    })
}

fn check_unit_norms(vectors: &[f32], dim: usize) -> Result<(), AnalyticsError> {
    match vectors
        .par_chunks(dim)
        .map(|row| dot(row, row).sqrt())
        .position_first(|norm| (norm - 1.0).abs() > UNIT_NORM_TOLERANCE)
    {
        Some(row) => Err(AnalyticsError::NotNormalised {
            row,
            norm: dot(
                &vectors[row * dim..(row + 1) * dim],
                &vectors[row * dim..(row + 1) * dim],
            )
            .sqrt(),
        }),
        None => Ok(()),
    }
}

fn checked_initial_centres(
    initial: &[f32],
    dim: usize,
    n_clusters: usize,
    spherical: bool,
) -> Result<Vec<f32>, AnalyticsError> {
    let found = count_rows("initial_centres", initial, dim)?;
    if found != n_clusters {
        return Err(AnalyticsError::InitialCentresCount {
            found,
            expected: n_clusters,
        });
    }
    let mut centres = initial.to_vec();
    if spherical {
        for (centre_index, centre) in centres.chunks_exact_mut(dim).enumerate() {
            if !normalise(centre) {
                return Err(AnalyticsError::ZeroInitialCentre {
                    centre: centre_index,
                });
            }
        }
    }
    Ok(centres)
}

/// Scales `vector` to unit length; returns false (leaving it unchanged) when its norm is zero.
fn normalise(vector: &mut [f32]) -> bool {
    let norm = dot(vector, vector).sqrt();
    if norm > 0.0 {
        vector.iter_mut().for_each(|value| *value /= norm);
        true
    } else {
        false
    }
}

/// Greedy k-means++ seeding; returns `n_clusters x dim` centres copied from the data.
///
/// Each step draws `2 + floor(ln k)` candidates by D² sampling and keeps the one that lowers
/// the total squared distance to the nearest centre the most (scikit-learn's default number of
/// local trials). On the test fixture, single-candidate k-means++ ended in a poorer local
/// optimum for about a quarter of the seeds; the greedy step costs a few more matrix
/// multiplies per centre.
fn kmeans_plus_plus(vectors: &[f32], dim: usize, n_clusters: usize, seed: u64) -> Vec<f32> {
    let n_items = vectors.len() / dim;
    let n_candidates = 2 + (n_clusters as f64).ln() as usize;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let row = |index: usize| &vectors[index * dim..(index + 1) * dim];
    let squared_norms: Vec<f32> = vectors.par_chunks(dim).map(|v| dot(v, v)).collect();

    let first = rng.random_range(0..n_items);
    let mut centres = row(first).to_vec();
    let mut closest: Vec<f32> = vectors
        .par_chunks(dim)
        .map(|vector| squared_distance(vector, row(first)))
        .collect();
    for _ in 1..n_clusters {
        let cumulative: Vec<f64> = closest
            .iter()
            .scan(0f64, |total, &distance| {
                *total += f64::from(distance);
                Some(*total)
            })
            .collect();
        let total = cumulative.last().copied().unwrap_or(0.0);
        let last_weighted = closest.iter().rposition(|&d| d > 0.0).unwrap_or(0);
        let candidates: Vec<usize> = (0..n_candidates)
            .map(|_| {
                if total > 0.0 {
                    let target = rng.random::<f64>() * total;
                    // Rounding can leave `target` at the very end: keep a weighted vector.
                    cumulative
                        .partition_point(|&sum| sum <= target)
                        .min(last_weighted)
                } else {
                    // Every vector coincides with a chosen centre: any choice is as good.
                    rng.random_range(0..n_items)
                }
            })
            .collect();

        // Distances from every vector to every candidate, one n_rows x n_candidates block at
        // a time, via ||x||^2 + ||c||^2 - 2 x.c; each block also sums, per candidate, the
        // total distance to the nearest centre if that candidate were added.
        let candidate_vectors: Vec<f32> =
            candidates.iter().flat_map(|&c| row(c)).copied().collect();
        let blocks =
            map_blocks_with_scores(vectors, &candidate_vectors, dim, |first_row, scores| {
                let mut distances = scores.to_vec();
                let mut potentials = vec![0f64; n_candidates];
                for (offset, row_distances) in distances.chunks_exact_mut(n_candidates).enumerate()
                {
                    let item = first_row + offset;
                    for ((distance, potential), &candidate) in row_distances
                        .iter_mut()
                        .zip(&mut potentials)
                        .zip(&candidates)
                    {
                        let squared =
                            squared_norms[item] + squared_norms[candidate] - 2.0 * *distance;
                        *distance = squared.max(0.0);
                        *potential += f64::from(distance.min(closest[item]));
                    }
                }
                (distances, potentials)
            });
        let mut potentials = vec![0f64; n_candidates];
        for (_, block_potentials) in &blocks {
            potentials
                .iter_mut()
                .zip(block_potentials)
                .for_each(|(sum, part)| *sum += part);
        }
        let best = (0..n_candidates)
            .reduce(|best, index| {
                if potentials[index] < potentials[best] {
                    index
                } else {
                    best
                }
            })
            .unwrap_or(0);

        centres.extend_from_slice(row(candidates[best]));
        let distances_to_best = blocks
            .iter()
            .flat_map(|(distances, _)| distances.chunks_exact(n_candidates).map(|d| d[best]));
        for (closest, distance) in closest.iter_mut().zip(distances_to_best) {
            *closest = closest.min(distance);
        }
    }
    centres
}

/// scikit-learn's relative tolerance scale: the mean over dimensions of the data variance.
fn mean_per_dimension_variance(vectors: &[f32], dim: usize) -> f64 {
    let n_items = (vectors.len() / dim) as f64;
    let mut sums = vec![0f64; dim];
    let mut squared_sums = vec![0f64; dim];
    for vector in vectors.chunks_exact(dim) {
        for ((sum, squared_sum), &value) in sums.iter_mut().zip(&mut squared_sums).zip(vector) {
            let value = f64::from(value);
            *sum += value;
            *squared_sum += value * value;
        }
    }
    sums.iter()
        .zip(&squared_sums)
        .map(|(sum, squared_sum)| (squared_sum / n_items - (sum / n_items).powi(2)).max(0.0))
        .sum::<f64>()
        / dim as f64
}

/// A vector's chosen centre and how far it is from it (squared Euclidean distance in Lloyd
/// mode, `1 - cosine` in spherical mode).
#[derive(Debug, Clone, Copy)]
struct Nearest {
    cluster: usize,
    distance: f32,
}

/// Assigns every vector to its best centre; ties go to the lowest centre index.
fn assign(vectors: &[f32], centres: &[f32], dim: usize, spherical: bool) -> Vec<Nearest> {
    let centre_squared_norms: Vec<f32> = centres.chunks_exact(dim).map(|c| dot(c, c)).collect();
    map_rows_with_scores(vectors, centres, dim, |row, scores| {
        if spherical {
            let (cluster, best) = first_extreme(scores.iter().copied(), |a, b| a > b);
            Nearest {
                cluster,
                distance: 1.0 - best,
            }
        } else {
            // ||x - c||^2 = ||x||^2 + (||c||^2 - 2 x.c); the bracket alone decides the winner,
            // the same expansion scikit-learn's Lloyd step minimises.
            let partial_distances = scores
                .iter()
                .zip(&centre_squared_norms)
                .map(|(score, norm)| norm - 2.0 * score);
            let (cluster, best) = first_extreme(partial_distances, |a, b| a < b);
            let vector = &vectors[row * dim..(row + 1) * dim];
            Nearest {
                cluster,
                distance: (dot(vector, vector) + best).max(0.0),
            }
        }
    })
}

/// Index and value of the first element that no later element beats under `better`.
fn first_extreme(
    values: impl Iterator<Item = f32>,
    better: impl Fn(f32, f32) -> bool,
) -> (usize, f32) {
    values
        .enumerate()
        .fold((0, f32::NAN), |(best_index, best), (index, value)| {
            if best.is_nan() || better(value, best) {
                (index, value)
            } else {
                (best_index, best)
            }
        })
}

/// New centres from the assignments. A cluster left without members (or, in spherical mode,
/// whose members sum to zero) takes over the vector farthest from its own centre, as
/// scikit-learn relocates empty clusters: farthest first, ties to the lower row, and the
/// vector's contribution is removed from the cluster it came from.
fn updated_centres(
    vectors: &[f32],
    dim: usize,
    nearest: &[Nearest],
    old_centres: &[f32],
    spherical: bool,
) -> Vec<f32> {
    let n_clusters = old_centres.len() / dim;
    let mut sums = vec![0f64; n_clusters * dim];
    let mut counts = vec![0usize; n_clusters];
    for (vector, nearest) in vectors.chunks_exact(dim).zip(nearest) {
        counts[nearest.cluster] += 1;
        let sum = &mut sums[nearest.cluster * dim..(nearest.cluster + 1) * dim];
        sum.iter_mut()
            .zip(vector)
            .for_each(|(total, &value)| *total += f64::from(value));
    }
    let sum_is_zero = |sum: &[f64]| sum.iter().all(|&value| value == 0.0);
    let empty: Vec<usize> = (0..n_clusters)
        .filter(|&cluster| {
            counts[cluster] == 0
                || (spherical && sum_is_zero(&sums[cluster * dim..(cluster + 1) * dim]))
        })
        .collect();
    if !empty.is_empty() {
        let mut farthest_first: Vec<usize> = (0..nearest.len()).collect();
        farthest_first.sort_by(|&a, &b| nearest[b].distance.total_cmp(&nearest[a].distance));
        for (&cluster, &row) in empty.iter().zip(&farthest_first) {
            let vector = &vectors[row * dim..(row + 1) * dim];
            let donor = nearest[row].cluster;
            counts[donor] -= 1;
            sums[donor * dim..(donor + 1) * dim]
                .iter_mut()
                .zip(vector)
                .for_each(|(total, &value)| *total -= f64::from(value));
            counts[cluster] = 1;
            sums[cluster * dim..(cluster + 1) * dim]
                .iter_mut()
                .zip(vector)
                .for_each(|(total, &value)| *total = f64::from(value));
        }
    }

    let mut centres = old_centres.to_vec();
    for (cluster, centre) in centres.chunks_exact_mut(dim).enumerate() {
        let sum = &sums[cluster * dim..(cluster + 1) * dim];
        // A donor emptied by relocation keeps its previous centre.
        if counts[cluster] == 0 {
            continue;
        }
        if spherical {
            let norm = sum.iter().map(|value| value * value).sum::<f64>().sqrt();
            if norm > 0.0 {
                centre
                    .iter_mut()
                    .zip(sum)
                    .for_each(|(value, total)| *value = (total / norm) as f32);
            }
        } else {
            let count = counts[cluster] as f64;
            centre
                .iter_mut()
                .zip(sum)
                .for_each(|(value, total)| *value = (total / count) as f32);
        }
    }
    centres
}

/// Medoid and tightness of one cluster.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClusterSummary {
    pub n_members: usize,
    /// Row index of the member with the largest mean dot product (cosine similarity, for
    /// unit vectors) to the other members.
    pub medoid: usize,
    /// Mean cosine similarity of the members to the cluster's mean direction.
    pub cohesion: f32,
}

/// Summarises the cluster made of rows `members` of `vectors` (`None` when `members` is empty).
///
/// The medoid is exact at any cluster size, with no sampling: with `S` the sum of the members,
/// member `i`'s mean dot product to the others is `(x_i . S - x_i . x_i) / (m - 1)`, so one pass
/// over the members finds the maximum (ties to the earliest listed member). For unit vectors
/// this is also the member closest to the spherical centroid `S / |S|`.
pub fn summarise_cluster(
    vectors: &[f32],
    dim: usize,
    members: &[usize],
) -> Result<Option<ClusterSummary>, AnalyticsError> {
    let n_items = count_rows("vectors", vectors, dim)?;
    if let Some(&index) = members.iter().find(|&&index| index >= n_items) {
        return Err(AnalyticsError::IndexOutOfRange {
            what: "members",
            index,
            n_items,
        });
    }
    Ok(summarise_members(vectors, dim, members))
}

/// Summarises every cluster of a clustering: entry `c` describes the rows with
/// `assignments[row] == c` (`None` for a cluster with no rows).
pub fn summarise_clusters(
    vectors: &[f32],
    dim: usize,
    assignments: &[usize],
    n_clusters: usize,
) -> Result<Vec<Option<ClusterSummary>>, AnalyticsError> {
    let n_items = count_rows("vectors", vectors, dim)?;
    if assignments.len() != n_items {
        return Err(AnalyticsError::AssignmentsLength {
            found: assignments.len(),
            expected: n_items,
        });
    }
    let mut members_by_cluster = vec![Vec::new(); n_clusters];
    for (row, &cluster) in assignments.iter().enumerate() {
        members_by_cluster
            .get_mut(cluster)
            .ok_or(AnalyticsError::ClusterOutOfRange {
                row,
                cluster,
                n_clusters,
            })?
            .push(row);
    }
    Ok(members_by_cluster
        .par_iter()
        .map(|members| summarise_members(vectors, dim, members))
        .collect())
}

fn summarise_members(vectors: &[f32], dim: usize, members: &[usize]) -> Option<ClusterSummary> {
    let row = |index: usize| &vectors[index * dim..(index + 1) * dim];
    let mut sum = vec![0f64; dim];
    for &member in members {
        sum.iter_mut()
            .zip(row(member))
            .for_each(|(total, &value)| *total += f64::from(value));
    }
    let sum_norm = sum.iter().map(|value| value * value).sum::<f64>().sqrt();
    let dot_with_sum = |vector: &[f32]| -> f64 {
        vector
            .iter()
            .zip(&sum)
            .map(|(&value, total)| f64::from(value) * total)
            .sum()
    };

    let mut medoid = None;
    let mut best_score = f64::NEG_INFINITY;
    let mut cosine_total = 0f64;
    for &member in members {
        let vector = row(member);
        let self_similarity = f64::from(dot(vector, vector));
        let similarity_to_sum = dot_with_sum(vector);
        let score = similarity_to_sum - self_similarity;
        if medoid.is_none() || score > best_score {
            medoid = Some(member);
            best_score = score;
        }
        let norms = self_similarity.sqrt() * sum_norm;
        if norms > 0.0 {
            cosine_total += similarity_to_sum / norms;
        }
    }
    medoid.map(|medoid| ClusterSummary {
        n_members: members.len(),
        medoid,
        cohesion: (cosine_total / members.len() as f64) as f32,
    })
}
