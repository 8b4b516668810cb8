//! A floating-point RGB canvas plus the small colour and noise helpers the scenes share.

use image::{Rgb as RgbPixel, RgbImage};

/// An sRGB colour with channels in 0..=1 (values outside are clamped on export).
pub type Rgb = [f32; 3];

pub struct Canvas {
    pub width: usize,
    pub height: usize,
    pixels: Vec<Rgb>,
}

impl Canvas {
    pub fn new(width: usize, height: usize) -> Self {
        Canvas {
            width,
            height,
            pixels: vec![[0.0; 3]; width * height],
        }
    }

    pub fn get(&self, x: usize, y: usize) -> Rgb {
        self.pixels[y * self.width + x]
    }

    /// Mixes `colour` over the pixel with coverage `alpha` (0 leaves it, 1 replaces it).
    pub fn blend(&mut self, x: usize, y: usize, colour: Rgb, alpha: f32) {
        let pixel = &mut self.pixels[y * self.width + x];
        *pixel = mix(*pixel, colour, alpha.clamp(0.0, 1.0));
    }

    /// Calls `shader` with every pixel centre inside the clamped box and the colour already
    /// there, and blends what it returns.
    pub fn paint(
        &mut self,
        (x0, y0, x1, y1): (f32, f32, f32, f32),
        mut shader: impl FnMut(f32, f32, Rgb) -> Option<(Rgb, f32)>,
    ) {
        let clamp_x = |v: f32| (v.max(0.0) as usize).min(self.width);
        let clamp_y = |v: f32| (v.max(0.0) as usize).min(self.height);
        let (xs, xe, ys, ye) = (
            clamp_x(x0.floor()),
            clamp_x(x1.ceil()),
            clamp_y(y0.floor()),
            clamp_y(y1.ceil()),
        );
        for y in ys..ye {
            for x in xs..xe {
                let current = self.get(x, y);
                if let Some((colour, alpha)) = shader(x as f32 + 0.5, y as f32 + 0.5, current) {
                    self.blend(x, y, colour, alpha);
                }
            }
        }
    }

    pub fn full_box(&self) -> (f32, f32, f32, f32) {
        (0.0, 0.0, self.width as f32, self.height as f32)
    }

    pub fn to_image(&self) -> RgbImage {
        RgbImage::from_fn(self.width as u32, self.height as u32, |x, y| {
            let [r, g, b] = self.get(x as usize, y as usize);
            RgbPixel([to_byte(r), to_byte(g), to_byte(b)])
        })
    }
}

fn to_byte(channel: f32) -> u8 {
    (channel.clamp(0.0, 1.0) * 255.0).round() as u8
}

pub fn mix(a: Rgb, b: Rgb, t: f32) -> Rgb {
    [
        a[0] + (b[0] - a[0]) * t,
        a[1] + (b[1] - a[1]) * t,
        a[2] + (b[2] - a[2]) * t,
    ]
}

pub fn scale(c: Rgb, factor: f32) -> Rgb {
    [c[0] * factor, c[1] * factor, c[2] * factor]
}

pub fn add(c: Rgb, amount: f32) -> Rgb {
    [c[0] + amount, c[1] + amount, c[2] + amount]
}

/// Hue in degrees, saturation and value in 0..=1.
pub fn hsv(hue: f32, saturation: f32, value: f32) -> Rgb {
    let h = hue.rem_euclid(360.0) / 60.0;
    let chroma = value * saturation;
    let second = chroma * (1.0 - (h % 2.0 - 1.0).abs());
    let (r, g, b) = match h as u32 {
        0 => (chroma, second, 0.0),
        1 => (second, chroma, 0.0),
        2 => (0.0, chroma, second),
        3 => (0.0, second, chroma),
        4 => (second, 0.0, chroma),
        _ => (chroma, 0.0, second),
    };
    let m = value - chroma;
    [r + m, g + m, b + m]
}

pub fn smoothstep(edge0: f32, edge1: f32, x: f32) -> f32 {
    let t = ((x - edge0) / (edge1 - edge0)).clamp(0.0, 1.0);
    t * t * (3.0 - 2.0 * t)
}

/// Integer hash of a lattice point to 0..=1; the multipliers are arbitrary odd constants.
fn lattice(ix: i32, iy: i32, seed: u32) -> f32 {
    let mut h = (ix as u32).wrapping_mul(0x8da6_b343)
        ^ (iy as u32).wrapping_mul(0xd816_3841)
        ^ seed.wrapping_mul(0xcb1a_b31f);
    h ^= h >> 13;
    h = h.wrapping_mul(0x5bd1_e995);
    h ^= h >> 15;
    (h & 0xffff) as f32 / 65535.0
}

/// Smoothly interpolated value noise in 0..=1 with unit lattice spacing.
pub fn value_noise(x: f32, y: f32, seed: u32) -> f32 {
    let (fx, fy) = (x.floor(), y.floor());
    let (ix, iy) = (fx as i32, fy as i32);
    let (tx, ty) = (smoothstep(0.0, 1.0, x - fx), smoothstep(0.0, 1.0, y - fy));
    let top = lattice(ix, iy, seed) + (lattice(ix + 1, iy, seed) - lattice(ix, iy, seed)) * tx;
    let bottom = lattice(ix, iy + 1, seed)
        + (lattice(ix + 1, iy + 1, seed) - lattice(ix, iy + 1, seed)) * tx;
    top + (bottom - top) * ty
}

/// Three octaves of value noise, 0..=1, for blotches, grain warps and glaze variation.
pub fn fractal_noise(x: f32, y: f32, seed: u32) -> f32 {
    let mut total = 0.0;
    let mut amplitude = 0.5;
    let mut frequency = 1.0;
    for octave in 0..3u32 {
        total += amplitude * value_noise(x * frequency, y * frequency, seed.wrapping_add(octave));
        amplitude *= 0.5;
        frequency *= 2.0;
    }
    total / 0.875
}
