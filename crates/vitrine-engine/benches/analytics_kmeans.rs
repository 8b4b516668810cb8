//! Timing table for the analytics algorithms at a realistic size: 100k L2-normalised vectors of
//! dimension 384 (a ViT-S embedding width) drawn around 300 random directions.
//!
//! Run: `cargo bench -p vitrine-engine --bench analytics_kmeans`

use std::time::Instant;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use vitrine_engine::analytics::{
    automatic_n_clusters, kmeans, summarise_clusters, vote_label, KMeansOptions, VotingNeighbour,
};

const N_ITEMS: usize = 100_000;
const DIM: usize = 384;
const N_DIRECTIONS: usize = 300;

/// Standard normal draw (Box-Muller), to spread points evenly around each direction.
fn normal(rng: &mut ChaCha8Rng) -> f32 {
    let u1: f32 = rng.random::<f32>().max(f32::MIN_POSITIVE);
    let u2: f32 = rng.random();
    (-2.0 * u1.ln()).sqrt() * (std::f32::consts::TAU * u2).cos()
}

fn normalise(vector: &mut [f32]) {
    let norm = vector.iter().map(|v| v * v).sum::<f32>().sqrt();
    vector.iter_mut().for_each(|v| *v /= norm);
}

fn synthetic_embeddings() -> Vec<f32> {
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let mut directions: Vec<f32> = (0..N_DIRECTIONS * DIM).map(|_| normal(&mut rng)).collect();
    directions.chunks_exact_mut(DIM).for_each(normalise);
    let mut vectors = Vec::with_capacity(N_ITEMS * DIM);
    for _ in 0..N_ITEMS {
        let direction = rng.random_range(0..N_DIRECTIONS);
        let start = vectors.len();
        for value in &directions[direction * DIM..(direction + 1) * DIM] {
            vectors.push(value + 1.5 * normal(&mut rng) / (DIM as f32).sqrt());
        }
        normalise(&mut vectors[start..]);
    }
    vectors
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let vectors = synthetic_embeddings();
    let n_clusters = automatic_n_clusters(N_ITEMS);
    println!(
        "analytics on {N_ITEMS} x {DIM} unit vectors, {} rayon threads, n_clusters = {n_clusters} (automatic)",
        rayon::current_num_threads()
    );
    println!("| step | rounds | seconds |");
    println!("| --- | ---: | ---: |");

    let seeded_one_round = KMeansOptions {
        max_iterations: 1,
        ..KMeansOptions::new(n_clusters)
    };
    let started = Instant::now();
    let seeded = kmeans(&vectors, DIM, &seeded_one_round)?;
    let seeded_seconds = started.elapsed().as_secs_f64();
    println!("| k-means++ seeding + 1 round | 1 | {seeded_seconds:.2} |");

    let one_round = KMeansOptions {
        max_iterations: 1,
        initial_centres: Some(seeded.centroids.clone()),
        ..KMeansOptions::new(n_clusters)
    };
    let started = Instant::now();
    kmeans(&vectors, DIM, &one_round)?;
    println!(
        "| 1 round from given centres | 1 | {:.2} |",
        started.elapsed().as_secs_f64()
    );

    for renormalise_centroids in [true, false] {
        let options = KMeansOptions {
            max_iterations: 50,
            renormalise_centroids,
            ..KMeansOptions::new(n_clusters)
        };
        let started = Instant::now();
        let result = kmeans(&vectors, DIM, &options)?;
        let mode = if renormalise_centroids {
            "spherical"
        } else {
            "Lloyd"
        };
        println!(
            "| full {mode} k-means (max 50 rounds, tolerance 1e-4) | {} | {:.2} |",
            result.iterations,
            started.elapsed().as_secs_f64()
        );
    }

    let started = Instant::now();
    summarise_clusters(&vectors, DIM, &seeded.assignments, n_clusters)?;
    println!(
        "| medoid + cohesion of every cluster | - | {:.2} |",
        started.elapsed().as_secs_f64()
    );

    // 100k votes over 10 neighbours each, labels from the seeded clustering.
    let started = Instant::now();
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let mut abstained = 0usize;
    for _ in 0..N_ITEMS {
        let neighbours: Vec<VotingNeighbour<usize>> = (0..10)
            .map(|_| VotingNeighbour {
                label: seeded.assignments[rng.random_range(0..N_ITEMS)] % 8,
                similarity: rng.random_range(-0.2..1.0),
            })
            .collect();
        abstained += usize::from(vote_label(&neighbours, 0.5)?.abstained);
    }
    println!(
        "| {N_ITEMS} label votes, 10 neighbours each ({abstained} abstained) | - | {:.2} |",
        started.elapsed().as_secs_f64()
    );
    Ok(())
}
