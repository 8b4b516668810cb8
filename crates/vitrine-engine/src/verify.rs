//! A second, finer test for near-duplicate candidates.
//!
//! One global cosine over-matches pictures with little texture (gradients,
//! flat designs, skies: their embeddings all look alike) and under-matches
//! crops and rotations. The check here looks at both images again:
//!
//! 1. **Correspondences**: the patch tokens of the two images are matched
//!    by mutual nearest neighbours (cosine).
//! 2. **Geometry**: a similarity transform (scale, rotation, translation)
//!    is fitted to the matches with RANSAC over two-match samples, followed
//!    by a least-squares refit on the inliers. Crops, resizes, borders and
//!    small rotations are all such transforms.
//! 3. **Alignment**: the transform is refined by a small search over shifts,
//!    scales and rotations that best lines up the two images' details
//!    (below); the patch grid alone places them only to within a few pixels.
//! 4. **Pixels**: the second image's thumbnails are resampled into the
//!    first one's frame through that transform, and the two are compared on
//!    their overlap three times, by normalised cross-correlation:
//!    - *structure*: grey levels after removing the best planar fit from
//!      each. Removing the plane is what rejects look-alike gradients and
//!      skies: a linear ramp carries no evidence of being the same picture,
//!      only the structure left on top of it does.
//!    - *detail*: each colour channel minus its local 5x5 mean (a band of
//!      roughly 4 to 20 pixels of the model's input). Two photographs of
//!      different objects staged alike (same backdrop, same framing) share
//!      their coarse structure, but not the texture and colour details,
//!      which survive re-encoding, resizing and brightness changes of one
//!      picture.
//!    - *colour*: red, green and blue together around one common mean, which
//!      tolerates brightness and contrast changes (one gain and offset for
//!      all channels) but not a change of hue: the same object in another
//!      colour, or on another backdrop.
//!
//! The score is the structure correlation; the pair is confirmed when all
//! three correlations reach their minimum (0 without a usable transform).
//! The minima were measured on the demo collection's planted copies against
//! its look-alike product shots, and on edited copies of real photos (the
//! `near_duplicate_quality` example and the `near_duplicates_real_photos`
//! test).
//! Each image's evidence is computed once, so the cost is one forward pass
//! per image involved in a candidate pair plus a small comparison per pair.

use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use vitrine_imaging::{decode_path, preprocess, DecodeOptions, PreparedImage};
use vitrine_model::encoder::{Encoder, PatchTokens};
use vitrine_store::Store;

use crate::error::EngineError;
use crate::progress::{NoProgress, Progress};

/// What one image contributes to a pair check.
pub struct ImageEvidence {
    tokens: PatchTokens,
    /// Grey levels of the model's input crop, `THUMB_SIDE²`, row-major.
    thumbnail: Vec<f32>,
    /// Red, green and blue of the same thumbnail minus their local mean.
    detail: [Vec<f32>; 3],
    /// Red, green and blue of the thumbnail.
    colour: [Vec<f32>; 3],
    /// Side of the model's input crop, in pixels.
    crop_side: f32,
}

/// Thumbnail side: the 224-pixel input crop averaged over 4x4 blocks.
const THUMB_SIDE: usize = 56;

/// Detail correlation a confirmed pair needs; measured, see the
/// `near_duplicate_quality` example and DEVELOPERS.md.
pub const DEFAULT_MIN_DETAIL_CORRELATION: f32 = 0.55;
/// Colour correlation a confirmed pair needs; measured likewise.
pub const DEFAULT_MIN_COLOUR_CORRELATION: f32 = 0.94;

/// Knobs of the check.
#[derive(Clone, Debug)]
pub struct VerifyOptions {
    /// Mutual nearest neighbours weaker than this are not correspondences.
    pub min_token_similarity: f32,
    /// A correspondence fits the transform within this many patch widths.
    pub inlier_tolerance_patches: f32,
    /// Scale and rotation a transform may have.
    pub max_scale_ratio: f32,
    pub max_rotation_degrees: f32,
    /// Grey-level correlation (after plane removal) at which a pair is confirmed.
    pub min_correlation: f32,
    /// Correlation of the colour details at which a pair is confirmed.
    pub min_detail_correlation: f32,
    /// Colour correlation at which a pair is confirmed.
    pub min_colour_correlation: f32,
}

impl Default for VerifyOptions {
    fn default() -> Self {
        Self {
            min_token_similarity: 0.5,
            inlier_tolerance_patches: 1.0,
            max_scale_ratio: 3.0,
            max_rotation_degrees: 25.0,
            min_correlation: 0.5,
            min_detail_correlation: DEFAULT_MIN_DETAIL_CORRELATION,
            min_colour_correlation: DEFAULT_MIN_COLOUR_CORRELATION,
        }
    }
}

/// The outcome of checking one pair.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct PairCheck {
    pub confirmed: bool,
    /// Normalised correlation of the aligned, plane-removed grey thumbnails.
    pub score: f32,
    /// Normalised correlation of the aligned thumbnails' colour details.
    pub detail: f32,
    /// Correlation of the aligned thumbnails' colours (see `colour_correlation`).
    pub colour: f32,
    /// Mutual-nearest-neighbour token matches and those fitting the transform.
    pub matches: usize,
    pub inliers: usize,
}

/// A point of the first image's crop and where it is in the second's.
type Correspondence = ([f32; 2], [f32; 2]);

/// `x' = scale·R(angle)·x + shift`, in pixels of the model's input crop.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SimilarityTransform {
    /// `scale·cos(angle)` and `scale·sin(angle)`.
    pub a: f32,
    pub b: f32,
    pub tx: f32,
    pub ty: f32,
}

impl SimilarityTransform {
    fn apply(&self, [x, y]: [f32; 2]) -> [f32; 2] {
        [
            self.a * x - self.b * y + self.tx,
            self.b * x + self.a * y + self.ty,
        ]
    }

    /// The same transform followed by a shift of `(dx, dy)`.
    fn shifted(&self, dx: f32, dy: f32) -> Self {
        Self {
            tx: self.tx + dx,
            ty: self.ty + dy,
            ..*self
        }
    }

    /// The same transform with its scale multiplied by `factor`, keeping the
    /// image of `centre` in place.
    fn scaled_about(&self, centre: [f32; 2], factor: f32) -> Self {
        let [cx, cy] = self.apply(centre);
        Self {
            a: self.a * factor,
            b: self.b * factor,
            tx: factor * self.tx + (1.0 - factor) * cx,
            ty: factor * self.ty + (1.0 - factor) * cy,
        }
    }

    /// The same transform followed by a rotation by `degrees` about the image
    /// of `centre`.
    fn rotated_about(&self, centre: [f32; 2], degrees: f32) -> Self {
        let [cx, cy] = self.apply(centre);
        let (sin, cos) = degrees.to_radians().sin_cos();
        let (x, y) = (self.tx - cx, self.ty - cy);
        Self {
            a: cos * self.a - sin * self.b,
            b: sin * self.a + cos * self.b,
            tx: cos * x - sin * y + cx,
            ty: sin * x + cos * y + cy,
        }
    }

    fn scale(&self) -> f32 {
        self.a.hypot(self.b)
    }

    fn rotation_degrees(&self) -> f32 {
        self.b.atan2(self.a).to_degrees()
    }

    /// From two point correspondences.
    fn through(p: [[f32; 2]; 2], q: [[f32; 2]; 2]) -> Option<Self> {
        let dp = [p[1][0] - p[0][0], p[1][1] - p[0][1]];
        let dq = [q[1][0] - q[0][0], q[1][1] - q[0][1]];
        let norm = dp[0] * dp[0] + dp[1] * dp[1];
        if norm < 1e-6 {
            return None;
        }
        let a = (dq[0] * dp[0] + dq[1] * dp[1]) / norm;
        let b = (dq[1] * dp[0] - dq[0] * dp[1]) / norm;
        Some(Self {
            a,
            b,
            tx: q[0][0] - (a * p[0][0] - b * p[0][1]),
            ty: q[0][1] - (b * p[0][0] + a * p[0][1]),
        })
    }

    /// Least-squares fit to many correspondences (closed form for
    /// similarity transforms).
    fn fit(pairs: &[Correspondence]) -> Option<Self> {
        let n = pairs.len() as f32;
        if pairs.len() < 2 {
            return None;
        }
        let mean = |pick: fn(&Correspondence) -> [f32; 2]| {
            let sum = pairs
                .iter()
                .map(pick)
                .fold([0.0, 0.0], |s, v| [s[0] + v[0], s[1] + v[1]]);
            [sum[0] / n, sum[1] / n]
        };
        let (mp, mq) = (mean(|pair| pair.0), mean(|pair| pair.1));
        let (mut dot, mut cross, mut norm) = (0.0, 0.0, 0.0);
        for (p, q) in pairs {
            let (px, py) = (p[0] - mp[0], p[1] - mp[1]);
            let (qx, qy) = (q[0] - mq[0], q[1] - mq[1]);
            dot += px * qx + py * qy;
            cross += px * qy - py * qx;
            norm += px * px + py * py;
        }
        if norm < 1e-6 {
            return None;
        }
        let (a, b) = (dot / norm, cross / norm);
        Some(Self {
            a,
            b,
            tx: mq[0] - (a * mp[0] - b * mp[1]),
            ty: mq[1] - (b * mp[0] + a * mp[1]),
        })
    }
}

impl ImageEvidence {
    /// Embeddings and evidence of prepared images (the model's input), from
    /// one forward pass.
    pub fn of_prepared(
        encoder: &Encoder,
        prepared: &[PreparedImage],
    ) -> Result<Vec<(Vec<f32>, ImageEvidence)>, EngineError> {
        let spec = &encoder.spec().preprocess;
        let outputs = encoder.embed_with_patches(prepared)?;
        Ok(outputs
            .into_iter()
            .zip(prepared)
            .map(|((embedding, tokens), image)| {
                let colour = colour_thumbnail(image, &spec.mean, &spec.std);
                let evidence = ImageEvidence {
                    thumbnail: grey_thumbnail(&colour),
                    detail: colour.clone().map(|plane| local_detail(&plane)),
                    colour,
                    crop_side: image.width as f32,
                    tokens,
                };
                (embedding, evidence)
            })
            .collect())
    }

    /// Centre of patch `index` in crop pixels.
    fn patch_centre(&self, index: usize) -> [f32; 2] {
        let side = self.crop_side / self.tokens.cols as f32;
        let (row, col) = (index / self.tokens.cols, index % self.tokens.cols);
        [(col as f32 + 0.5) * side, (row as f32 + 0.5) * side]
    }

    fn patch_count(&self) -> usize {
        self.tokens.rows * self.tokens.cols
    }
}

/// De-normalises the planar input and averages 4x4 blocks of each channel.
fn colour_thumbnail(image: &PreparedImage, mean: &[f32; 3], std: &[f32; 3]) -> [Vec<f32>; 3] {
    let (width, height) = (image.width as usize, image.height as usize);
    let plane = width * height;
    let block = (width / THUMB_SIDE).max(1);
    let area = (block * block) as f32;
    std::array::from_fn(|c| {
        let mut thumb = vec![0.0f32; THUMB_SIDE * THUMB_SIDE];
        for y in 0..(THUMB_SIDE * block).min(height) {
            for x in 0..(THUMB_SIDE * block).min(width) {
                let value = image.chw[c * plane + y * width + x] * std[c] + mean[c];
                thumb[(y / block) * THUMB_SIDE + x / block] += value / area;
            }
        }
        thumb
    })
}

fn grey_thumbnail(colour: &[Vec<f32>; 3]) -> Vec<f32> {
    const LUMA: [f32; 3] = [0.299, 0.587, 0.114];
    (0..THUMB_SIDE * THUMB_SIDE)
        .map(|i| (0..3).map(|c| LUMA[c] * colour[c][i]).sum())
        .collect()
}

/// Half the side of the window whose mean is removed to keep the details.
const DETAIL_RADIUS: usize = 2;

/// `plane` minus its mean over a `(2·DETAIL_RADIUS + 1)²` window (clipped at
/// the edges).
fn local_detail(plane: &[f32]) -> Vec<f32> {
    let mut detail = Vec::with_capacity(plane.len());
    for y in 0..THUMB_SIDE {
        let rows = y.saturating_sub(DETAIL_RADIUS)..(y + DETAIL_RADIUS + 1).min(THUMB_SIDE);
        for x in 0..THUMB_SIDE {
            let cols = x.saturating_sub(DETAIL_RADIUS)..(x + DETAIL_RADIUS + 1).min(THUMB_SIDE);
            let count = (rows.len() * cols.len()) as f32;
            let sum: f32 = rows
                .clone()
                .flat_map(|ny| plane[ny * THUMB_SIDE..][cols.clone()].iter())
                .sum();
            detail.push(plane[y * THUMB_SIDE + x] - sum / count);
        }
    }
    detail
}

/// Cosine similarities of every token of `a` with every token of `b`,
/// `na × nb` row-major (tokens are unit vectors).
fn token_similarities(a: &ImageEvidence, b: &ImageEvidence) -> Vec<f32> {
    let (na, nb, dim) = (a.patch_count(), b.patch_count(), a.tokens.dim);
    let mut scores = vec![0f32; na * nb];
    if b.tokens.dim != dim
        || a.tokens.normalised.len() != na * dim
        || b.tokens.normalised.len() != nb * dim
    {
        return scores;
    }
    // SAFETY: `a` is na x dim row-major, `b` is nb x dim row-major (read as
    // its transpose, dim x nb, via the strides) and `scores` is na x nb
    // row-major; the lengths were checked above, so every index the kernel
    // touches is inside the three buffers.
    unsafe {
        gemm::gemm(
            na,
            nb,
            dim,
            scores.as_mut_ptr(),
            1,
            nb as isize,
            false,
            a.tokens.normalised.as_ptr(),
            1,
            dim as isize,
            b.tokens.normalised.as_ptr(),
            dim as isize,
            1,
            0.0,
            1.0,
            false,
            false,
            false,
            gemm::Parallelism::None,
        );
    }
    scores
}

/// Pairs `(index in a, index in b)` that are each other's nearest token.
fn mutual_nearest(
    a: &ImageEvidence,
    b: &ImageEvidence,
    min_similarity: f32,
) -> Vec<(usize, usize)> {
    let (na, nb) = (a.patch_count(), b.patch_count());
    let scores = token_similarities(a, b);
    let mut best_for_a = vec![(usize::MAX, f32::NEG_INFINITY); na];
    let mut best_for_b = vec![(usize::MAX, f32::NEG_INFINITY); nb];
    for (i, row) in scores.chunks_exact(nb.max(1)).enumerate() {
        for (j, &s) in row.iter().enumerate() {
            if s > best_for_a[i].1 {
                best_for_a[i] = (j, s);
            }
            if s > best_for_b[j].1 {
                best_for_b[j] = (i, s);
            }
        }
    }
    best_for_a
        .iter()
        .enumerate()
        .filter(|&(i, &(j, s))| s >= min_similarity && best_for_b.get(j).is_some_and(|b| b.0 == i))
        .map(|(i, &(j, _))| (i, j))
        .collect()
}

/// RANSAC draws over match pairs (or every pair when there are fewer).
const RANSAC_DRAWS: usize = 400;

/// Fits a plausible similarity transform from `a`'s crop to `b`'s crop.
fn fit_transform(
    a: &ImageEvidence,
    b: &ImageEvidence,
    matches: &[(usize, usize)],
    options: &VerifyOptions,
) -> Option<(SimilarityTransform, usize)> {
    let points: Vec<Correspondence> = matches
        .iter()
        .map(|&(i, j)| (a.patch_centre(i), b.patch_centre(j)))
        .collect();
    let patch_side = a.crop_side / a.tokens.cols as f32;
    let tolerance = options.inlier_tolerance_patches * patch_side;
    let plausible = |t: &SimilarityTransform| {
        let scale = t.scale();
        scale <= options.max_scale_ratio
            && scale >= 1.0 / options.max_scale_ratio
            && t.rotation_degrees().abs() <= options.max_rotation_degrees
    };
    let inliers_of = |t: &SimilarityTransform| -> Vec<Correspondence> {
        points
            .iter()
            .filter(|(p, q)| {
                let m = t.apply(*p);
                (m[0] - q[0]).hypot(m[1] - q[1]) <= tolerance
            })
            .copied()
            .collect()
    };
    let n = points.len();
    if n < 3 {
        return None;
    }
    // Deterministic: the same pair always gets the same verdict.
    let mut rng = ChaCha8Rng::seed_from_u64(n as u64);
    let all_pairs = n * (n - 1) / 2;
    let draws: Vec<(usize, usize)> = if all_pairs <= RANSAC_DRAWS {
        (0..n)
            .flat_map(|i| (i + 1..n).map(move |j| (i, j)))
            .collect()
    } else {
        (0..RANSAC_DRAWS)
            .map(|_| (rng.random_range(0..n), rng.random_range(0..n)))
            .filter(|(i, j)| i != j)
            .collect()
    };
    let mut best: Option<(SimilarityTransform, usize)> = None;
    for (i, j) in draws {
        let (p, q) = ([points[i].0, points[j].0], [points[i].1, points[j].1]);
        // Two matches closer than two patches give an unstable rotation.
        if (p[0][0] - p[1][0]).hypot(p[0][1] - p[1][1]) < 2.0 * patch_side {
            continue;
        }
        let Some(candidate) = SimilarityTransform::through(p, q).filter(plausible) else {
            continue;
        };
        let count = inliers_of(&candidate).len();
        if best.is_none_or(|(_, c)| count > c) {
            best = Some((candidate, count));
        }
    }
    let (rough, _) = best?;
    let refined = SimilarityTransform::fit(&inliers_of(&rough)).filter(plausible)?;
    let count = inliers_of(&refined).len();
    Some((refined, count))
}

/// Fewest overlapping thumbnail pixels a comparison is made on.
const MIN_OVERLAP_PIXELS: usize = THUMB_SIDE * THUMB_SIDE / 8;

/// Where each cell centre of `a`'s thumbnail falls in `b`'s thumbnail, in
/// `b`'s cells; `None` outside `b`.
fn aligned_cells<'t>(
    a: &'t ImageEvidence,
    b: &'t ImageEvidence,
    transform: &'t SimilarityTransform,
) -> impl Iterator<Item = (usize, f32, f32)> + 't {
    let a_cell = a.crop_side / THUMB_SIDE as f32;
    let b_cell = b.crop_side / THUMB_SIDE as f32;
    let last = (THUMB_SIDE - 1) as f32;
    (0..THUMB_SIDE * THUMB_SIDE).filter_map(move |index| {
        let (x, y) = (index % THUMB_SIDE, index / THUMB_SIDE);
        let centre = [(x as f32 + 0.5) * a_cell, (y as f32 + 0.5) * a_cell];
        let [bx, by] = transform.apply(centre);
        let (u, v) = (bx / b_cell - 0.5, by / b_cell - 0.5);
        ((0.0..=last).contains(&u) && (0.0..=last).contains(&v)).then_some((index, u, v))
    })
}

/// Correlation of the plane-removed grey thumbnails on their overlap;
/// `None` when the overlap is too small.
fn structure_correlation(
    a: &ImageEvidence,
    b: &ImageEvidence,
    transform: &SimilarityTransform,
) -> Option<f32> {
    let mut positions = Vec::new();
    let (mut values_a, mut values_b) = (Vec::new(), Vec::new());
    for (index, u, v) in aligned_cells(a, b, transform) {
        let (x, y) = (index % THUMB_SIDE, index / THUMB_SIDE);
        positions.push([x as f32 / THUMB_SIDE as f32, y as f32 / THUMB_SIDE as f32]);
        values_a.push(a.thumbnail[index]);
        values_b.push(bilinear(&b.thumbnail, u, v));
    }
    if positions.len() < MIN_OVERLAP_PIXELS {
        return None;
    }
    let residual_a = plane_residual(&positions, values_a.into_iter());
    let residual_b = plane_residual(&positions, values_b.into_iter());
    Some(correlation(
        residual_a.iter().zip(&residual_b).map(|(x, y)| (*x, *y)),
        positions.len(),
    ))
}

/// Correlation of the colour details on the overlap (0 when it is too small).
fn detail_correlation(
    a: &ImageEvidence,
    b: &ImageEvidence,
    transform: &SimilarityTransform,
) -> f32 {
    let cells: Vec<(usize, f32, f32)> = aligned_cells(a, b, transform).collect();
    if cells.len() < MIN_OVERLAP_PIXELS {
        return 0.0;
    }
    let pairs = cells.iter().flat_map(|&(index, u, v)| {
        (0..3).map(move |c| (a.detail[c][index], bilinear(&b.detail[c], u, v)))
    });
    correlation(pairs, cells.len())
}

/// Correlation of the red, green and blue values taken together, around one
/// common mean: high when one picture's colours are the other's under a
/// brightness and contrast change (the same gain and offset on every
/// channel), low when the hues differ.
fn colour_correlation(
    a: &ImageEvidence,
    b: &ImageEvidence,
    transform: &SimilarityTransform,
) -> f32 {
    let cells: Vec<(usize, f32, f32)> = aligned_cells(a, b, transform).collect();
    if cells.len() < MIN_OVERLAP_PIXELS {
        return 0.0;
    }
    let values: Vec<(f32, f32)> = cells
        .iter()
        .flat_map(|&(index, u, v)| {
            (0..3).map(move |c| (a.colour[c][index], bilinear(&b.colour[c], u, v)))
        })
        .collect();
    let count = values.len() as f32;
    let mean_a = values.iter().map(|p| p.0).sum::<f32>() / count;
    let mean_b = values.iter().map(|p| p.1).sum::<f32>() / count;
    correlation(
        values.into_iter().map(|(x, y)| (x - mean_a, y - mean_b)),
        cells.len(),
    )
}

/// Shifts (crop pixels) and scale factors tried around the fitted transform,
/// coarse then fine: patch centres place a match only to within a few pixels,
/// and details 4 pixels wide decorrelate when misplaced by half that.
const COARSE_SHIFTS: [f32; 9] = [-12.0, -9.0, -6.0, -3.0, 0.0, 3.0, 6.0, 9.0, 12.0];
const FINE_SHIFTS: [f32; 5] = [-1.0, -0.5, 0.0, 0.5, 1.0];
const SCALES: [f32; 9] = [0.92, 0.94, 0.96, 0.98, 1.0, 1.02, 1.04, 1.06, 1.08];
const ROTATIONS_DEGREES: [f32; 7] = [-3.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0];

/// The transform near `fitted` that best lines up the details, and that
/// correlation.
fn refine_alignment(
    a: &ImageEvidence,
    b: &ImageEvidence,
    fitted: SimilarityTransform,
) -> (SimilarityTransform, f32) {
    let centre = [a.crop_side / 2.0; 2];
    let mut best = (fitted, detail_correlation(a, b, &fitted));
    let consider = |candidate: SimilarityTransform, best: &mut (SimilarityTransform, f32)| {
        let score = detail_correlation(a, b, &candidate);
        if score > best.1 {
            *best = (candidate, score);
        }
    };
    for shifts in [&COARSE_SHIFTS[..], &FINE_SHIFTS[..], &FINE_SHIFTS[..]] {
        let base = best.0;
        for &dy in shifts {
            for &dx in shifts {
                consider(base.shifted(dx, dy), &mut best);
            }
        }
        let base = best.0;
        for &factor in &SCALES {
            consider(base.scaled_about(centre, factor), &mut best);
        }
        let base = best.0;
        for &degrees in &ROTATIONS_DEGREES {
            consider(base.rotated_about(centre, degrees), &mut best);
        }
    }
    best
}

/// Normalised cross-correlation of zero-centred values; 0 when either side
/// carries no more energy than compression noise.
fn correlation(pairs: impl Iterator<Item = (f32, f32)>, overlap: usize) -> f32 {
    let (mut ab, mut aa, mut bb) = (0.0f64, 0.0f64, 0.0f64);
    for (x, y) in pairs {
        ab += f64::from(x * y);
        aa += f64::from(x * x);
        bb += f64::from(y * y);
    }
    // Residual energy below this (levels on 0..1, per pixel) is
    // compression noise, not structure: nothing to correlate.
    let floor = 1e-5 * overlap as f64;
    if aa < floor || bb < floor {
        return 0.0;
    }
    (ab / (aa * bb).sqrt()) as f32
}

/// `thumb` at `(u, v)`, which must lie inside the grid.
fn bilinear(thumb: &[f32], u: f32, v: f32) -> f32 {
    let (x0, y0) = (u.floor() as usize, v.floor() as usize);
    let (x1, y1) = ((x0 + 1).min(THUMB_SIDE - 1), (y0 + 1).min(THUMB_SIDE - 1));
    let (fx, fy) = (u - x0 as f32, v - y0 as f32);
    let at = |x: usize, y: usize| thumb[y * THUMB_SIDE + x];
    let top = at(x0, y0) * (1.0 - fx) + at(x1, y0) * fx;
    let bottom = at(x0, y1) * (1.0 - fx) + at(x1, y1) * fx;
    top * (1.0 - fy) + bottom * fy
}

/// `values` minus their least-squares plane `c0 + c1·x + c2·y`.
fn plane_residual(positions: &[[f32; 2]], values: impl Iterator<Item = f32>) -> Vec<f32> {
    let values: Vec<f64> = values.map(f64::from).collect();
    // Normal equations of the 3-parameter fit, solved by Cramer's rule.
    let mut m = [[0.0f64; 3]; 3];
    let mut r = [0.0f64; 3];
    for (p, &v) in positions.iter().zip(&values) {
        let basis = [1.0, f64::from(p[0]), f64::from(p[1])];
        for i in 0..3 {
            r[i] += basis[i] * v;
            for j in 0..3 {
                m[i][j] += basis[i] * basis[j];
            }
        }
    }
    let det = |m: &[[f64; 3]; 3]| {
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
            - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    };
    let d = det(&m);
    let coefficients: [f64; 3] = if d.abs() < 1e-12 {
        let mean = values.iter().sum::<f64>() / values.len().max(1) as f64;
        [mean, 0.0, 0.0]
    } else {
        std::array::from_fn(|k| {
            let mut replaced = m;
            for (row, value) in replaced.iter_mut().zip(r) {
                row[k] = value;
            }
            det(&replaced) / d
        })
    };
    positions
        .iter()
        .zip(&values)
        .map(|(p, v)| {
            let plane = coefficients[0]
                + coefficients[1] * f64::from(p[0])
                + coefficients[2] * f64::from(p[1]);
            (v - plane) as f32
        })
        .collect()
}

/// Checks whether two images show the same picture.
/// Checks a pair in both directions (each aligns one image onto the other,
/// which is not exactly symmetric: a crop aligns better onto its original
/// than the reverse, or the other way round near the borders) and keeps the
/// better verdict, so a pair is confirmed when either alignment confirms it.
pub fn compare(a: &ImageEvidence, b: &ImageEvidence, options: &VerifyOptions) -> PairCheck {
    let forward = compare_one_way(a, b, options);
    if forward.confirmed {
        return forward;
    }
    let backward = compare_one_way(b, a, options);
    if backward.confirmed || backward.score > forward.score {
        backward
    } else {
        forward
    }
}

fn compare_one_way(a: &ImageEvidence, b: &ImageEvidence, options: &VerifyOptions) -> PairCheck {
    let matches = mutual_nearest(a, b, options.min_token_similarity);
    let (score, detail, colour, inliers) = match fit_transform(a, b, &matches, options) {
        Some((fitted, inliers)) => {
            let (aligned, detail) = refine_alignment(a, b, fitted);
            let structure = structure_correlation(a, b, &aligned).unwrap_or(0.0);
            (
                structure,
                detail,
                colour_correlation(a, b, &aligned),
                inliers,
            )
        }
        None => (0.0, 0.0, 0.0, 0),
    };
    PairCheck {
        confirmed: score >= options.min_correlation
            && detail >= options.min_detail_correlation
            && colour >= options.min_colour_correlation,
        score,
        detail,
        colour,
        matches: matches.len(),
        inliers,
    }
}

/// Images per forward pass when preparing evidence.
const PREPARE_BATCH: usize = 16;

/// A file to verify, named by its path and the hash of its bytes: evidence
/// and verdicts are remembered by content, so a file that changes on disk is
/// never judged on what it used to hold.
#[derive(Clone, Debug)]
pub struct VerifiedFile {
    pub path: PathBuf,
    pub content_hash: [u8; 32],
}

/// Verdicts by the pair's content hashes, in canonical order.
type Verdicts = HashMap<([u8; 32], [u8; 32]), PairCheck>;

/// Verifies pairs of indexed files.
///
/// Verdicts are remembered for the verifier's lifetime (a few bytes per pair),
/// so a long-lived verifier answers repeated queries (another threshold, a new
/// generation of a collection) without decoding again. Evidence (patch tokens,
/// about 0.4 MB per image) is kept within the bound its callers give to
/// [`Self::make_room`].
pub struct PairVerifier {
    encoder: Arc<Encoder>,
    options: VerifyOptions,
    evidence: Mutex<HashMap<[u8; 32], Arc<ImageEvidence>>>,
    verdicts: Mutex<Verdicts>,
    stopped: AtomicBool,
    /// Told of every image read and pair compared.
    progress: Box<dyn Progress + Send>,
}

impl PairVerifier {
    pub fn new(encoder: Arc<Encoder>, options: VerifyOptions) -> Self {
        Self {
            encoder,
            options,
            evidence: Mutex::new(HashMap::new()),
            verdicts: Mutex::new(HashMap::new()),
            stopped: AtomicBool::new(false),
            progress: Box::new(NoProgress),
        }
    }

    /// The same verifier, reporting its work to `progress`.
    pub fn with_progress(self, progress: impl Progress + Send + 'static) -> Self {
        Self {
            progress: Box::new(progress),
            ..self
        }
    }

    pub fn progress(&self) -> &dyn Progress {
        self.progress.as_ref()
    }

    /// Makes the computation of evidence, now and later, fail with
    /// [`EngineError::VerificationStopped`] at its next batch: a service shutting down
    /// stops a long verification instead of waiting for it.
    pub fn stop(&self) {
        self.stopped.store(true, Ordering::Relaxed);
    }

    /// The model's input for a file, decoded at the size the model needs.
    fn prepared(&self, file: &VerifiedFile) -> Result<PreparedImage, EngineError> {
        let spec = &self.encoder.spec().preprocess;
        let decode = DecodeOptions {
            target_shorter_side: Some(spec.resize_shorter),
            ..DecodeOptions::default()
        };
        let decoded = decode_path(&file.path, &decode)?;
        Ok(preprocess(&decoded.rgb, spec)?)
    }

    /// Decodes, prepares and encodes a file once.
    fn evidence(&self, file: &VerifiedFile) -> Result<Arc<ImageEvidence>, EngineError> {
        if let Some(found) = self.cached_evidence(file) {
            return Ok(found);
        }
        let evidence = ImageEvidence::of_prepared(&self.encoder, &[self.prepared(file)?])?
            .pop()
            .map(|(_, evidence)| Arc::new(evidence))
            .ok_or_else(|| EngineError::InvalidArgument("encoder returned no output".into()))?;
        if let Ok(mut cache) = self.evidence.lock() {
            cache.insert(file.content_hash, Arc::clone(&evidence));
        }
        Ok(evidence)
    }

    /// Computes the evidence of many files at once: parallel decoding,
    /// batched forward passes. Files that fail are left out (a later
    /// [`Self::check`] on them reports the error).
    pub fn prepare(&self, files: &[VerifiedFile]) -> Result<(), EngineError> {
        let missing: Vec<&VerifiedFile> = files
            .iter()
            .filter(|file| self.cached_evidence(file).is_none())
            .collect();
        for chunk in missing.chunks(PREPARE_BATCH) {
            if self.stopped.load(Ordering::Relaxed) {
                return Err(EngineError::VerificationStopped);
            }
            let prepared: Vec<(&VerifiedFile, PreparedImage)> = chunk
                .par_iter()
                .filter_map(|file| Some((*file, self.prepared(file).ok()?)))
                .collect();
            let images: Vec<PreparedImage> = prepared.iter().map(|(_, p)| p.clone()).collect();
            let evidence = ImageEvidence::of_prepared(&self.encoder, &images)?;
            if let Ok(mut cache) = self.evidence.lock() {
                for ((file, _), (_, found)) in prepared.into_iter().zip(evidence) {
                    cache.insert(file.content_hash, Arc::new(found));
                }
            }
            self.progress.advance(chunk.len() as u64);
        }
        Ok(())
    }

    fn cached_evidence(&self, file: &VerifiedFile) -> Option<Arc<ImageEvidence>> {
        self.evidence.lock().ok()?.get(&file.content_hash).cloned()
    }

    /// The verdict on a pair judged before, in either order, if any.
    pub fn remembered(&self, a: &VerifiedFile, b: &VerifiedFile) -> Option<PairCheck> {
        let (a, b) = in_canonical_order(a, b);
        self.verdicts
            .lock()
            .ok()?
            .get(&(a.content_hash, b.content_hash))
            .copied()
    }

    /// The kind of the store's pair notes that hold this verifier's verdicts:
    /// other options (or another version of the check) give another kind, so
    /// a verdict is only ever reused by the check that made it.
    fn note_kind(&self) -> [u8; 8] {
        let identity = format!("pair-check v1 {:?}", self.options);
        let hash = blake3::hash(identity.as_bytes());
        let mut kind = [0u8; 8];
        kind.copy_from_slice(&hash.as_bytes()[..8]);
        kind
    }

    /// Remembers the verdicts `store` keeps from earlier runs on any of `pairs`.
    pub fn recall_from(
        &self,
        store: &Store,
        pairs: &[(VerifiedFile, VerifiedFile)],
    ) -> Result<(), EngineError> {
        let kind = self.note_kind();
        let mut recalled = Vec::new();
        for (a, b) in pairs {
            let (a, b) = in_canonical_order(a, b);
            let Some(note) = store.pair_note(&kind, &a.content_hash, &b.content_hash)? else {
                continue;
            };
            // An unreadable note is only a lost shortcut: the pair is checked again.
            if let Ok(check) = serde_json::from_slice::<PairCheck>(&note) {
                recalled.push(((a.content_hash, b.content_hash), check));
            }
        }
        if let Ok(mut verdicts) = self.verdicts.lock() {
            verdicts.extend(recalled);
        }
        Ok(())
    }

    /// Keeps this verifier's verdicts on `pairs` in `store` for later runs.
    pub fn keep_in(
        &self,
        store: &Store,
        pairs: &[(VerifiedFile, VerifiedFile)],
    ) -> Result<(), EngineError> {
        let mut notes = Vec::new();
        for (a, b) in pairs {
            let (a, b) = in_canonical_order(a, b);
            if let Some(check) = self.remembered(a, b) {
                let note = serde_json::to_vec(&check).map_err(EngineError::PairNoteEncoding)?;
                notes.push((a.content_hash, b.content_hash, note));
            }
        }
        store.put_pair_notes(&self.note_kind(), &notes)?;
        Ok(())
    }

    /// Makes room for the evidence of `files` within `capacity` images: when
    /// they would not fit beside what is kept, everything kept is dropped
    /// (remembered verdicts stay).
    pub fn make_room(&self, files: &[VerifiedFile], capacity: usize) {
        if let Ok(mut cache) = self.evidence.lock() {
            let new = files
                .iter()
                .filter(|f| !cache.contains_key(&f.content_hash))
                .count();
            if cache.len() + new > capacity {
                cache.clear();
            }
        }
    }

    /// Checks two files against each other. The check is not exactly
    /// symmetric (one image is aligned onto the other), so a pair is always
    /// checked in one order: the verdict does not depend on who asks.
    pub fn check(&self, a: &VerifiedFile, b: &VerifiedFile) -> Result<PairCheck, EngineError> {
        if let Some(known) = self.remembered(a, b) {
            return Ok(known);
        }
        let (a, b) = in_canonical_order(a, b);
        let check = compare(&*self.evidence(a)?, &*self.evidence(b)?, &self.options);
        tracing::debug!(
            first = %a.path.display(),
            second = %b.path.display(),
            structure = check.score,
            detail = check.detail,
            colour = check.colour,
            matches = check.matches,
            inliers = check.inliers,
            confirmed = check.confirmed,
            "pair verified"
        );
        if let Ok(mut verdicts) = self.verdicts.lock() {
            verdicts.insert((a.content_hash, b.content_hash), check);
        }
        Ok(check)
    }
}

fn in_canonical_order<'f>(
    a: &'f VerifiedFile,
    b: &'f VerifiedFile,
) -> (&'f VerifiedFile, &'f VerifiedFile) {
    if a.content_hash <= b.content_hash {
        (a, b)
    } else {
        (b, a)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn transform_through_two_points_recovers_scale_rotation_shift() {
        let truth = SimilarityTransform {
            a: 0.8 * 10f32.to_radians().cos(),
            b: 0.8 * 10f32.to_radians().sin(),
            tx: 12.0,
            ty: -5.0,
        };
        let p = [[10.0, 20.0], [150.0, 90.0]];
        let q = p.map(|x| truth.apply(x));
        let found = SimilarityTransform::through(p, q).unwrap();
        assert!((found.scale() - 0.8).abs() < 1e-4);
        assert!((found.rotation_degrees() - 10.0).abs() < 1e-3);
        let pairs: Vec<_> = [[0.0, 0.0], [50.0, 10.0], [30.0, 80.0], [200.0, 150.0]]
            .into_iter()
            .map(|p| (p, truth.apply(p)))
            .collect();
        let fitted = SimilarityTransform::fit(&pairs).unwrap();
        assert!((fitted.tx - 12.0).abs() < 1e-3 && (fitted.ty + 5.0).abs() < 1e-3);
    }

    #[test]
    fn plane_removal_leaves_nothing_of_a_ramp() {
        let positions: Vec<[f32; 2]> = (0..100)
            .map(|i| [(i % 10) as f32, (i / 10) as f32])
            .collect();
        let ramp = positions.iter().map(|p| 0.3 + 0.02 * p[0] - 0.01 * p[1]);
        let residual = plane_residual(&positions, ramp);
        assert!(residual.iter().all(|r| r.abs() < 1e-5));
    }
}
