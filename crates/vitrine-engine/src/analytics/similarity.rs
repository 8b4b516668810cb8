//! Dense dot products between many vectors and a few centres, via a blocked matrix multiply.

use rayon::prelude::*;

use super::matmul::{multiply, Operand};

/// Rows per matrix-multiply block: bounds each worker's score buffer to
/// `ROWS_PER_BLOCK * n_centres` floats while keeping blocks large enough for the kernel.
const ROWS_PER_BLOCK: usize = 1024;

/// Independent partial sums, so the compiler can keep them in one SIMD register (a single
/// running f32 sum cannot be reordered and would stay scalar).
const LANES: usize = 8;

fn sum_of_pairs(left: &[f32], right: &[f32], term: impl Fn(f32, f32) -> f32) -> f32 {
    let mut partial = [0f32; LANES];
    let left_chunks = left.chunks_exact(LANES);
    let right_chunks = right.chunks_exact(LANES);
    let tail: f32 = left_chunks
        .remainder()
        .iter()
        .zip(right_chunks.remainder())
        .map(|(&a, &b)| term(a, b))
        .sum();
    for (left_chunk, right_chunk) in left_chunks.zip(right_chunks) {
        for lane in 0..LANES {
            partial[lane] += term(left_chunk[lane], right_chunk[lane]);
        }
    }
    partial.iter().sum::<f32>() + tail
}

pub(crate) fn dot(left: &[f32], right: &[f32]) -> f32 {
    sum_of_pairs(left, right, |a, b| a * b)
}

pub(crate) fn squared_distance(left: &[f32], right: &[f32]) -> f32 {
    sum_of_pairs(left, right, |a, b| (a - b) * (a - b))
}

/// Splits `vectors` into blocks of rows and calls `per_block(first_row, scores)` on each, where
/// `scores` is `n_rows x n_centres` row-major with `scores[r * n_centres + j] =
/// row_(first_row + r) · centre_j`; returns the results in block order. Blocks run in
/// parallel; each block is one single-threaded matrix multiply, so results do not depend on
/// the thread count.
///
/// Callers guarantee at least one centre and that `vectors.len()` and `centres.len()` are
/// multiples of `dim > 0`.
pub(crate) fn map_blocks_with_scores<T, F>(
    vectors: &[f32],
    centres: &[f32],
    dim: usize,
    per_block: F,
) -> Vec<T>
where
    T: Send,
    F: Fn(usize, &[f32]) -> T + Sync,
{
    assert!(
        dim > 0
            && !centres.is_empty()
            && vectors.len() / dim * dim == vectors.len()
            && centres.len() / dim * dim == centres.len()
    );
    let n_centres = centres.len() / dim;
    vectors
        .par_chunks(ROWS_PER_BLOCK * dim)
        .enumerate()
        .map(|(block_index, block)| {
            let n_rows = block.len() / dim;
            let mut scores = vec![0f32; n_rows * n_centres];
            multiply(
                &mut scores,
                &Operand {
                    data: block,
                    rows: n_rows,
                    cols: dim,
                    transposed: false,
                },
                &Operand {
                    data: centres,
                    rows: n_centres,
                    cols: dim,
                    transposed: true,
                },
                false,
            );
            per_block(block_index * ROWS_PER_BLOCK, &scores)
        })
        .collect()
}

/// Like [`map_blocks_with_scores`], one result per row: `per_row(row, scores)` with
/// `scores[j] = row · centre_j`.
pub(crate) fn map_rows_with_scores<T, F>(
    vectors: &[f32],
    centres: &[f32],
    dim: usize,
    per_row: F,
) -> Vec<T>
where
    T: Send,
    F: Fn(usize, &[f32]) -> T + Sync,
{
    let n_centres = centres.len() / dim;
    map_blocks_with_scores(vectors, centres, dim, |first_row, scores| {
        scores
            .chunks_exact(n_centres)
            .enumerate()
            .map(|(row, row_scores)| per_row(first_row + row, row_scores))
            .collect::<Vec<T>>()
    })
    .into_iter()
    .flatten()
    .collect()
}
