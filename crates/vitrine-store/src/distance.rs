//! Dot products of f32 vectors, the one computation that dominates HNSW build and
//! search time.
//!
//! The kernel is picked once per process from the CPU's features (AVX-512F, else
//! AVX2 + FMA, else portable code the compiler vectorises), so one binary serves every
//! x86-64 machine.

use std::sync::OnceLock;

type Kernel = fn(&[f32], &[f32]) -> f32;

/// The instruction sets a kernel can use, best first.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Isa {
    Avx512,
    Avx2Fma,
    Portable,
}

static ISA: OnceLock<Isa> = OnceLock::new();

/// The best instruction set this CPU has, detected once.
pub fn isa() -> Isa {
    *ISA.get_or_init(|| {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx512f") {
                return Isa::Avx512;
            }
            if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
            {
                return Isa::Avx2Fma;
            }
        }
        Isa::Portable
    })
}

static KERNEL: OnceLock<Kernel> = OnceLock::new();

fn select_kernel() -> Kernel {
    match isa() {
        #[cfg(target_arch = "x86_64")]
        Isa::Avx512 => dot_avx512_checked,
        #[cfg(target_arch = "x86_64")]
        Isa::Avx2Fma => dot_avx2_fma_checked,
        _ => dot_portable,
    }
}

/// Dot product of two vectors over their common length.
#[inline]
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    KERNEL.get_or_init(select_kernel)(a, b)
}

/// Eight independent partial sums, which the compiler can map onto SIMD lanes
/// (a single running sum forces strictly sequential float additions).
pub fn dot_portable(a: &[f32], b: &[f32]) -> f32 {
    const LANES: usize = 8;
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    let a_chunks = a.chunks_exact(LANES);
    let b_chunks = b.chunks_exact(LANES);
    let tail: f32 = a_chunks
        .remainder()
        .iter()
        .zip(b_chunks.remainder())
        .map(|(x, y)| x * y)
        .sum();
    let mut sums = [0.0f32; LANES];
    for (x, y) in a_chunks.zip(b_chunks) {
        for lane in 0..LANES {
            sums[lane] += x[lane] * y[lane];
        }
    }
    sums.iter().sum::<f32>() + tail
}

/// Only ever selected when `isa()` is `Avx2Fma`.
#[cfg(target_arch = "x86_64")]
fn dot_avx2_fma_checked(a: &[f32], b: &[f32]) -> f32 {
    // SAFETY: `select_kernel` returns this function only when the CPU has AVX2 and FMA.
    unsafe { dot_avx2_fma(a, b) }
}

/// Only ever selected when `isa()` is `Avx512`.
#[cfg(target_arch = "x86_64")]
fn dot_avx512_checked(a: &[f32], b: &[f32]) -> f32 {
    // SAFETY: `select_kernel` returns this function only when the CPU has AVX-512F.
    unsafe { dot_avx512(a, b) }
}

/// Work that loops over many dot products. [`with_best_dot`] runs it inside a function
/// compiled for the CPU's best instruction set, with the kernel inlined into the loop:
/// no call through a pointer, no feature check per product. Implementations mark
/// `run` `#[inline(always)]` so that it is compiled into each of those functions.
pub trait WithDot {
    type Output;
    fn run(self, dot: impl Fn(&[f32], &[f32]) -> f32 + Copy) -> Self::Output;
}

pub fn with_best_dot<W: WithDot>(work: W) -> W::Output {
    match isa() {
        #[cfg(target_arch = "x86_64")]
        // SAFETY: `isa()` reports AVX-512F only when the CPU has it.
        Isa::Avx512 => unsafe { run_avx512(work) },
        #[cfg(target_arch = "x86_64")]
        // SAFETY: `isa()` reports AVX2 + FMA only when the CPU has them.
        Isa::Avx2Fma => unsafe { run_avx2_fma(work) },
        _ => work.run(dot_portable),
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn run_avx512<W: WithDot>(work: W) -> W::Output {
    // SAFETY: this function only runs on CPUs with AVX-512F.
    work.run(|a: &[f32], b: &[f32]| unsafe { dot_avx512(a, b) })
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn run_avx2_fma<W: WithDot>(work: W) -> W::Output {
    // SAFETY: this function only runs on CPUs with AVX2 and FMA.
    work.run(|a: &[f32], b: &[f32]| unsafe { dot_avx2_fma(a, b) })
}

/// # Safety
/// The CPU must have AVX2 and FMA.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
pub unsafe fn dot_avx2_fma(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    // Four accumulators hide the FMA latency.
    let mut acc = [_mm256_setzero_ps(); 4];
    let mut i = 0;
    while i + 32 <= n {
        for (k, sum) in acc.iter_mut().enumerate() {
            let x = _mm256_loadu_ps(pa.add(i + 8 * k));
            let y = _mm256_loadu_ps(pb.add(i + 8 * k));
            *sum = _mm256_fmadd_ps(x, y, *sum);
        }
        i += 32;
    }
    while i + 8 <= n {
        acc[0] = _mm256_fmadd_ps(
            _mm256_loadu_ps(pa.add(i)),
            _mm256_loadu_ps(pb.add(i)),
            acc[0],
        );
        i += 8;
    }
    let sum = _mm256_add_ps(_mm256_add_ps(acc[0], acc[1]), _mm256_add_ps(acc[2], acc[3]));
    let mut lanes = [0f32; 8];
    _mm256_storeu_ps(lanes.as_mut_ptr(), sum);
    let mut total: f32 = lanes.iter().sum();
    while i < n {
        total += *pa.add(i) * *pb.add(i);
        i += 1;
    }
    total
}

/// # Safety
/// The CPU must have AVX-512F.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
pub unsafe fn dot_avx512(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    // Four accumulators hide the FMA latency.
    let mut acc = [_mm512_setzero_ps(); 4];
    let mut i = 0;
    while i + 64 <= n {
        for (k, sum) in acc.iter_mut().enumerate() {
            let x = _mm512_loadu_ps(pa.add(i + 16 * k));
            let y = _mm512_loadu_ps(pb.add(i + 16 * k));
            *sum = _mm512_fmadd_ps(x, y, *sum);
        }
        i += 64;
    }
    while i + 16 <= n {
        acc[0] = _mm512_fmadd_ps(
            _mm512_loadu_ps(pa.add(i)),
            _mm512_loadu_ps(pb.add(i)),
            acc[0],
        );
        i += 16;
    }
    if i < n {
        // The last 1..15 floats through a masked load (masked-off lanes read as 0).
        let mask: __mmask16 = (1u16 << (n - i)) - 1;
        let x = _mm512_maskz_loadu_ps(mask, pa.add(i));
        let y = _mm512_maskz_loadu_ps(mask, pb.add(i));
        acc[1] = _mm512_fmadd_ps(x, y, acc[1]);
    }
    let sum = _mm512_add_ps(_mm512_add_ps(acc[0], acc[1]), _mm512_add_ps(acc[2], acc[3]));
    _mm512_reduce_add_ps(sum)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn exact(a: &[f32], b: &[f32]) -> f64 {
        a.iter()
            .zip(b)
            .map(|(x, y)| f64::from(*x) * f64::from(*y))
            .sum()
    }

    #[test]
    fn every_kernel_agrees_with_f64_arithmetic() {
        let mut kernels: Vec<(&str, Kernel)> = vec![("portable", dot_portable)];
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
            {
                kernels.push(("avx2+fma", dot_avx2_fma_checked));
            }
            if std::arch::is_x86_feature_detected!("avx512f") {
                kernels.push(("avx512", dot_avx512_checked));
            }
        }
        kernels.push(("selected", dot));
        for n in [0, 1, 7, 8, 15, 16, 17, 31, 32, 33, 63, 64, 65, 384, 385] {
            let a: Vec<f32> = (0..n).map(|i| ((i * 37 % 11) as f32 - 5.0) / 7.0).collect();
            let b: Vec<f32> = (0..n).map(|i| ((i * 13 % 17) as f32 - 8.0) / 9.0).collect();
            for (name, kernel) in &kernels {
                let found = f64::from(kernel(&a, &b));
                assert!((found - exact(&a, &b)).abs() < 1e-4, "{name}, n = {n}");
            }
        }
    }

    #[test]
    fn unequal_lengths_use_the_common_prefix() {
        let a = vec![1.0f32; 40];
        let b = vec![2.0f32; 21];
        assert_eq!(dot(&a, &b), 42.0);
        assert_eq!(dot_portable(&a, &b), 42.0);
    }
}
