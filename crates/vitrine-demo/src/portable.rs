//! Transcendental functions that give the same bits on every machine.
//!
//! `f32::sin` and friends call the C library, whose implementation is chosen at run time by CPU
//! features (for example an FMA variant), so the committed demo images would not regenerate
//! bit for bit on another machine. The `libm` crate is plain Rust and has one code path.

pub trait PortableMath {
    fn sin_portable(self) -> Self;
    fn cos_portable(self) -> Self;
    fn asin_portable(self) -> Self;
    fn exp_portable(self) -> Self;
    fn powf_portable(self, exponent: Self) -> Self;
    fn atan2_portable(self, other: Self) -> Self;
}

impl PortableMath for f32 {
    fn sin_portable(self) -> f32 {
        libm::sinf(self)
    }
    fn cos_portable(self) -> f32 {
        libm::cosf(self)
    }
    fn asin_portable(self) -> f32 {
        libm::asinf(self)
    }
    fn exp_portable(self) -> f32 {
        libm::expf(self)
    }
    fn powf_portable(self, exponent: f32) -> f32 {
        libm::powf(self, exponent)
    }
    fn atan2_portable(self, other: f32) -> f32 {
        libm::atan2f(self, other)
    }
}
