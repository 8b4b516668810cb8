//! Bicubic resizing of a position-embedding grid, reproducing PyTorch's
//! `interpolate(mode="bicubic", align_corners=False)` with an explicit output
//! size: without antialiasing (ViT, DINOv2, CLIP; also ONNX `Resize` with
//! cubic, a = -0.75, `half_pixel`, `exclude_outside = 0`), and with it
//! (DINOv2 with registers in transformers).

use crate::config::PosInterpolation;

/// PyTorch's cubic convolution coefficient (Keys, 1981, with a = -0.75).
const CUBIC_A: f64 = -0.75;

/// The four weights for taps at offsets -1, 0, 1, 2 around the source index,
/// for a fractional position `t` in `[0, 1)`.
fn cubic_weights(t: f64) -> [f64; 4] {
    let near = |x: f64| ((CUBIC_A + 2.0) * x - (CUBIC_A + 3.0)) * x * x + 1.0;
    let far = |x: f64| ((CUBIC_A * x - 5.0 * CUBIC_A) * x + 8.0 * CUBIC_A) * x - 4.0 * CUBIC_A;
    [far(t + 1.0), near(t), near(1.0 - t), far(2.0 - t)]
}

/// Source indices and weights contributing to one output index.
type Taps = (Vec<usize>, Vec<f64>);

/// Plain bicubic: four clamped taps around each source position.
fn cubic_taps(in_size: usize, out_size: usize) -> Vec<Taps> {
    let scale = in_size as f64 / out_size as f64;
    (0..out_size)
        .map(|dst| {
            // Half-pixel centres; PyTorch does not clamp the source position for cubic.
            let src = scale * (dst as f64 + 0.5) - 0.5;
            let base = src.floor();
            let clamp = |offset: i64| (base as i64 + offset).clamp(0, in_size as i64 - 1) as usize;
            (
                vec![clamp(-1), clamp(0), clamp(1), clamp(2)],
                cubic_weights(src - base).to_vec(),
            )
        })
        .collect()
}

/// PyTorch's antialiased bicubic (`_upsample_bicubic2d_aa`): the kernel uses
/// a = -0.5 and is stretched by the scale when shrinking; weights are
/// renormalised over the taps that fall inside the input.
fn antialiased_cubic_taps(in_size: usize, out_size: usize) -> Vec<Taps> {
    const A: f64 = -0.5;
    let kernel = |x: f64| {
        let x = x.abs();
        if x < 1.0 {
            ((A + 2.0) * x - (A + 3.0)) * x * x + 1.0
        } else if x < 2.0 {
            (((x - 5.0) * x + 8.0) * x - 4.0) * A
        } else {
            0.0
        }
    };
    let scale = in_size as f64 / out_size as f64;
    let stretch = scale.max(1.0);
    let support = 2.0 * stretch;
    (0..out_size)
        .map(|dst| {
            let centre = scale * (dst as f64 + 0.5);
            let first = ((centre - support + 0.5).trunc() as i64).max(0) as usize;
            let end = ((centre + support + 0.5).trunc() as usize).min(in_size);
            let indices: Vec<usize> = (first..end).collect();
            let mut weights: Vec<f64> = indices
                .iter()
                .map(|&j| kernel((j as f64 - centre + 0.5) / stretch))
                .collect();
            let total: f64 = weights.iter().sum();
            if total != 0.0 {
                weights.iter_mut().for_each(|w| *w /= total);
            }
            (indices, weights)
        })
        .collect()
}

fn taps(mode: PosInterpolation, in_size: usize, out_size: usize) -> Vec<Taps> {
    match mode {
        PosInterpolation::Bicubic => cubic_taps(in_size, out_size),
        PosInterpolation::BicubicAntialias => antialiased_cubic_taps(in_size, out_size),
    }
}

/// Resizes a row-major `[in_rows, in_cols, dim]` grid to `[out_rows, out_cols, dim]`.
pub fn bicubic_resize_grid(
    mode: PosInterpolation,
    grid: &[f32],
    in_rows: usize,
    in_cols: usize,
    dim: usize,
    out_rows: usize,
    out_cols: usize,
) -> Vec<f32> {
    assert_eq!(grid.len(), in_rows * in_cols * dim, "grid shape mismatch");
    let row_taps = taps(mode, in_rows, out_rows);
    let col_taps = taps(mode, in_cols, out_cols);
    // Separable: first along columns for every input row, then along rows.
    let mut horizontal = vec![0f64; in_rows * out_cols * dim];
    for r in 0..in_rows {
        for (c_out, (cols, weights)) in col_taps.iter().enumerate() {
            let out = &mut horizontal[(r * out_cols + c_out) * dim..][..dim];
            for (&c, &w) in cols.iter().zip(weights) {
                let src = &grid[(r * in_cols + c) * dim..][..dim];
                out.iter_mut()
                    .zip(src)
                    .for_each(|(o, &s)| *o += w * s as f64);
            }
        }
    }
    let mut resized = vec![0f32; out_rows * out_cols * dim];
    for (r_out, (rows, weights)) in row_taps.iter().enumerate() {
        for c_out in 0..out_cols {
            let out = &mut resized[(r_out * out_cols + c_out) * dim..][..dim];
            for (k, o) in out.iter_mut().enumerate() {
                let value: f64 = rows
                    .iter()
                    .zip(weights)
                    .map(|(&r, &w)| w * horizontal[(r * out_cols + c_out) * dim + k])
                    .sum();
                *o = value as f32;
            }
        }
    }
    resized
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_size_is_identity() {
        let grid: Vec<f32> = (0..3 * 4 * 2).map(|i| i as f32 * 0.37 - 2.0).collect();
        let resized = bicubic_resize_grid(PosInterpolation::Bicubic, &grid, 3, 4, 2, 3, 4);
        assert_eq!(resized, grid);
    }

    #[test]
    fn weights_sum_to_one() {
        for t in [0.0, 0.1, 0.5, 0.9] {
            let sum: f64 = cubic_weights(t).iter().sum();
            assert!((sum - 1.0).abs() < 1e-12, "t = {t}: {sum}");
        }
    }
}
