//! Seeded clustered unit vectors and exact (brute-force) nearest neighbours, shared by
//! the tests and the benchmark example.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal, StandardNormal};
use rayon::prelude::*;

/// Gaussian blobs on the unit sphere: a point is a random centre plus isotropic
/// Gaussian noise, L2-normalised.
pub struct ClusteredSource {
    dim: usize,
    centres: Vec<Vec<f32>>,
    noise: Normal<f32>,
}

impl ClusteredSource {
    /// `noise_std` is per coordinate; centres are random unit vectors.
    pub fn new(seed: u64, dim: usize, centres: usize, noise_std: f32) -> ClusteredSource {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let centres = (0..centres)
            .map(|_| {
                let v: Vec<f32> = (0..dim).map(|_| rng.sample(StandardNormal)).collect();
                normalise(v)
            })
            .collect();
        let noise = Normal::new(0.0, noise_std).expect("noise_std must be finite and >= 0");
        ClusteredSource {
            dim,
            centres,
            noise,
        }
    }

    /// `n` points, row-major `n x dim`.
    pub fn sample(&self, seed: u64, n: usize) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut out = Vec::with_capacity(n * self.dim);
        for _ in 0..n {
            let centre = &self.centres[rng.random_range(0..self.centres.len())];
            let point: Vec<f32> = centre
                .iter()
                .map(|c| c + self.noise.sample(&mut rng))
                .collect();
            out.extend(normalise(point));
        }
        out
    }
}

pub fn normalise(mut v: Vec<f32>) -> Vec<f32> {
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    v.iter_mut().for_each(|x| *x /= norm);
    v
}

/// Indices of the `k` rows of `data` with the largest dot product with each query
/// (exact brute force), most similar first.
pub fn exact_top_k(data: &[f32], queries: &[f32], dim: usize, k: usize) -> Vec<Vec<usize>> {
    queries
        .par_chunks_exact(dim)
        .map(|query| {
            let mut scored: Vec<(f32, usize)> = data
                .chunks_exact(dim)
                .enumerate()
                .map(|(i, row)| (row.iter().zip(query).map(|(a, b)| a * b).sum(), i))
                .collect();
            let k = k.min(scored.len());
            scored.select_nth_unstable_by(k.saturating_sub(1), |a, b| b.0.total_cmp(&a.0));
            scored.truncate(k);
            scored.sort_by(|a, b| b.0.total_cmp(&a.0));
            scored.into_iter().map(|(_, i)| i).collect()
        })
        .collect()
}

/// recall@k: the fraction of the exact k nearest neighbours that the approximate
/// search returned, averaged over queries (the definition used by Malkov & Yashunin,
/// 2018, and the ANN benchmark literature).
pub fn recall_at_k(found: &[Vec<usize>], truth: &[Vec<usize>], k: usize) -> f64 {
    let hits: usize = found
        .iter()
        .zip(truth)
        .map(|(found, truth)| {
            let truth = &truth[..k.min(truth.len())];
            found.iter().take(k).filter(|id| truth.contains(id)).count()
        })
        .sum();
    hits as f64 / (k * truth.len()) as f64
}
