//! Element-wise kernels of the forward pass that candle evaluates one scalar
//! `exp` at a time: the softmax of attention scores and the exact GELU.
//!
//! Both are written as plain loops over slices with a branch-free `exp`, so the
//! compiler vectorises them; each is compiled once more for AVX2 and AVX-512 and
//! the widest the CPU has is picked at run time (one binary serves every
//! x86-64 machine).

use candle_core::{Result, Tensor, D};
use rayon::prelude::*;

/// Elements handed to one rayon task: big enough to amortise scheduling.
const TASK_ELEMENTS: usize = 16 * 1024;

/// `e^x` for `x` in f32's range, relative error below 2.5e-7 (about 2 ulp).
///
/// Cody–Waite reduction `x = n·ln2 + r`, `|r| ≤ ln2/2`, then the degree-6
/// Taylor polynomial of `e^r` (remainder below 1.2e-7 on that interval), scaled
/// by `2^n` through the exponent bits. Inputs below -87.3 flush towards zero.
#[inline(always)]
fn exp_approx(x: f32) -> f32 {
    const LOG2_E: f32 = std::f32::consts::LOG2_E;
    // ln 2 split so that `n * LN2_HIGH` is exact for |n| < 2^10.
    const LN2_HIGH: f32 = 0.693_145_75;
    const LN2_LOW: f32 = 1.428_606_8e-6;
    // Adding and subtracting 1.5·2^23 rounds to the nearest integer.
    const ROUNDING: f32 = 12_582_912.0;
    let x = x.clamp(-87.3, 88.7);
    let n = (x * LOG2_E + ROUNDING) - ROUNDING;
    let r = (x - n * LN2_HIGH) - n * LN2_LOW;
    let poly = 1.0
        + r * (1.0
            + r * (0.5
                + r * (1.0 / 6.0 + r * (1.0 / 24.0 + r * (1.0 / 120.0 + r * (1.0 / 720.0))))));
    poly * f32::from_bits(((n as i32 + 127) << 23) as u32)
}

/// GELU with erf, `x·(1 + erf(x/√2))/2`; erf by Abramowitz & Stegun's formula
/// 7.1.26 (absolute error at most 1.5e-7), far inside the 1e-4 the reference
/// checks allow.
#[inline(always)]
fn gelu_erf_in_place(values: &mut [f32], _row_len: usize) {
    const P: f32 = 0.327_591_1;
    const A: [f32; 5] = [
        0.254_829_6,
        -0.284_496_74,
        1.421_413_7,
        -1.453_152_1,
        1.061_405_4,
    ];
    for v in values {
        let x = *v;
        let z = (x * std::f32::consts::FRAC_1_SQRT_2).abs();
        let t = 1.0 / (1.0 + P * z);
        let poly = t * (A[0] + t * (A[1] + t * (A[2] + t * (A[3] + t * A[4]))));
        let erf_abs = 1.0 - poly * exp_approx(-z * z);
        let erf = if x < 0.0 { -erf_abs } else { erf_abs };
        *v = 0.5 * x * (1.0 + erf);
    }
}

/// Softmax of each `row_len`-long row, in place. The partial maxima and sums
/// run in independent lanes so the compiler can vectorise the reductions.
#[inline(always)]
fn softmax_rows_in_place(values: &mut [f32], row_len: usize) {
    const LANES: usize = 16;
    for row in values.chunks_exact_mut(row_len) {
        let mut maxima = [f32::NEG_INFINITY; LANES];
        let chunks = row.chunks_exact(LANES);
        let mut max = chunks
            .remainder()
            .iter()
            .fold(f32::NEG_INFINITY, |m, &v| m.max(v));
        for chunk in chunks {
            for lane in 0..LANES {
                maxima[lane] = maxima[lane].max(chunk[lane]);
            }
        }
        max = maxima.iter().fold(max, |m, &v| m.max(v));
        for v in row.iter_mut() {
            *v = exp_approx(*v - max);
        }
        let mut sums = [0.0f32; LANES];
        let chunks = row.chunks_exact(LANES);
        let tail: f32 = chunks.remainder().iter().sum();
        for chunk in chunks {
            for lane in 0..LANES {
                sums[lane] += chunk[lane];
            }
        }
        let inverse = 1.0 / (sums.iter().sum::<f32>() + tail);
        for v in row.iter_mut() {
            *v *= inverse;
        }
    }
}

/// Defines `$name(values, row_len)` running `$kernel` compiled for the widest
/// SIMD this CPU has.
macro_rules! widest_simd {
    ($name:ident, $kernel:ident) => {
        fn $name(values: &mut [f32], row_len: usize) {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx512f,avx2,fma")]
                fn avx512(values: &mut [f32], row_len: usize) {
                    $kernel(values, row_len)
                }
                #[target_feature(enable = "avx2,fma")]
                fn avx2(values: &mut [f32], row_len: usize) {
                    $kernel(values, row_len)
                }
                if std::arch::is_x86_feature_detected!("avx512f") {
                    // SAFETY: the features `avx512` is compiled for were just detected.
                    return unsafe { avx512(values, row_len) };
                }
                if std::arch::is_x86_feature_detected!("avx2")
                    && std::arch::is_x86_feature_detected!("fma")
                {
                    // SAFETY: as above.
                    return unsafe { avx2(values, row_len) };
                }
            }
            $kernel(values, row_len)
        }
    };
}

widest_simd!(gelu_erf_slice, gelu_erf_in_place);
widest_simd!(softmax_rows_slice, softmax_rows_in_place);

/// Applies `kernel` to a copy of `x`'s values in parallel pieces of whole rows.
fn map_rows(x: &Tensor, row_len: usize, kernel: fn(&mut [f32], usize)) -> Result<Tensor> {
    let mut values = x.flatten_all()?.to_vec1::<f32>()?;
    let rows_per_task = (TASK_ELEMENTS / row_len).max(1);
    values
        .par_chunks_mut(rows_per_task * row_len)
        .for_each(|piece| kernel(piece, row_len));
    Tensor::from_vec(values, x.shape(), x.device())
}

/// Exact (erf) GELU, element-wise.
pub fn gelu_erf(x: &Tensor) -> Result<Tensor> {
    map_rows(x, x.dim(D::Minus1)?, gelu_erf_slice)
}

/// Softmax over the last dimension.
pub fn softmax_last_dim(x: &Tensor) -> Result<Tensor> {
    map_rows(x, x.dim(D::Minus1)?, softmax_rows_slice)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exp_approx_is_within_a_few_ulp_of_the_standard_library() {
        let mut worst = 0.0f64;
        for i in -87_000..=88_000 {
            let x = i as f32 * 1e-3;
            let exact = f64::from(x).exp();
            let relative = ((f64::from(exp_approx(x)) - exact) / exact).abs();
            worst = worst.max(relative);
        }
        assert!(worst < 2.5e-7, "worst relative error {worst:e}");
    }

    #[test]
    fn kernels_match_double_precision_formulas() {
        let values: Vec<f32> = (0..3 * 257)
            .map(|i| ((i * 7919) % 2001) as f32 / 97.0 - 10.0)
            .collect();
        let x = Tensor::from_vec(values.clone(), (3, 257), &candle_core::Device::Cpu).unwrap();

        // candle's `gelu_erf` evaluates erf in double precision.
        let ours = gelu_erf(&x)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1::<f32>()
            .unwrap();
        let reference = x
            .gelu_erf()
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1::<f32>()
            .unwrap();
        for (a, b) in ours.iter().zip(&reference) {
            assert!((a - b).abs() < 1e-5, "gelu {a} vs {b}");
        }

        let ours = softmax_last_dim(&x).unwrap().to_vec2::<f32>().unwrap();
        for (row, input) in ours.iter().zip(values.chunks(257)) {
            let max = input
                .iter()
                .fold(f64::NEG_INFINITY, |m, &v| m.max(f64::from(v)));
            let total: f64 = input.iter().map(|&v| (f64::from(v) - max).exp()).sum();
            for (p, &v) in row.iter().zip(input) {
                let expected = (f64::from(v) - max).exp() / total;
                assert!(
                    (f64::from(*p) - expected).abs() < 1e-6,
                    "softmax {p} vs {expected}"
                );
            }
        }
    }
}
