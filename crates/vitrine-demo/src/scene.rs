//! The studio around a product: wall, table surface, lighting, cast shadow and sensor grain.

use rand::Rng;
use rand_chacha::ChaCha8Rng;

use crate::canvas::{add, fractal_noise, hsv, mix, scale, smoothstep, value_noise, Canvas, Rgb};
use crate::portable::PortableMath;

/// Direction towards the key light: `x` < 0 means the light is on the left.
#[derive(Clone, Copy)]
pub struct Light {
    pub x: f32,
    pub z: f32,
}

impl Light {
    pub fn random(rng: &mut ChaCha8Rng) -> Self {
        let x: f32 = rng.random_range(-0.8..0.8);
        Light {
            x,
            z: (1.0 - x * x).sqrt(),
        }
    }

    /// Diffuse plus ambient shading of a vertical surface whose normal has horizontal part `nx`.
    pub fn shade(&self, nx: f32) -> f32 {
        let nz = (1.0 - nx * nx).max(0.0).sqrt();
        0.34 + 0.66 * (nx * self.x + nz * self.z).max(0.0)
    }

    /// Specular highlight seen from the front (half vector between light and viewer).
    pub fn highlight(&self, nx: f32, shininess: f32) -> f32 {
        let (hx, hz) = (self.x, self.z + 1.0);
        let norm = (hx * hx + hz * hz).sqrt();
        let nz = (1.0 - nx * nx).max(0.0).sqrt();
        ((nx * hx + nz * hz) / norm)
            .max(0.0)
            .powf_portable(shininess)
    }
}

enum Surface {
    Wood {
        light: Rgb,
        dark: Rgb,
        frequency: f32,
    },
    Linen {
        colour: Rgb,
        weave: f32,
    },
    Concrete {
        colour: Rgb,
    },
    PaperSweep,
}

/// Paints wall and table and returns the y of the horizon line between them.
pub fn paint_backdrop(canvas: &mut Canvas, rng: &mut ChaCha8Rng, light: Light) -> f32 {
    let (width, height) = (canvas.width as f32, canvas.height as f32);
    let wall_hue = rng.random_range(0.0..360.0);
    let wall_saturation = rng.random_range(0.03..0.32);
    let wall_value = rng.random_range(0.5..0.92);
    let wall_top = hsv(wall_hue, wall_saturation, wall_value * 0.82);
    let wall_bottom = hsv(
        wall_hue + rng.random_range(-25.0..25.0),
        wall_saturation,
        wall_value,
    );
    let surface = match rng.random_range(0..4) {
        0 => {
            let hue = rng.random_range(18.0..40.0);
            let value = rng.random_range(0.35..0.8);
            Surface::Wood {
                light: hsv(hue, rng.random_range(0.35..0.6), value),
                dark: hsv(hue - 5.0, 0.6, value * 0.62),
                frequency: rng.random_range(0.08..0.2),
            }
        }
        1 => Surface::Linen {
            colour: hsv(
                rng.random_range(20.0..60.0),
                rng.random_range(0.08..0.3),
                rng.random_range(0.6..0.9),
            ),
            weave: rng.random_range(1.6..2.6),
        },
        2 => Surface::Concrete {
            colour: hsv(
                rng.random_range(0.0..360.0),
                rng.random_range(0.0..0.08),
                rng.random_range(0.45..0.8),
            ),
        },
        _ => Surface::PaperSweep,
    };
    let horizon = height * rng.random_range(0.48..0.7);
    let edge_softness = match surface {
        Surface::PaperSweep => rng.random_range(30.0..70.0),
        _ => rng.random_range(1.0..6.0),
    };
    let noise_seed: u32 = rng.random();
    let spot = (
        width * (0.5 + 0.5 * light.x),
        height * rng.random_range(0.05..0.35),
    );
    let spot_radius = width * rng.random_range(0.35..0.7);

    canvas.paint(canvas.full_box(), |x, y, _| {
        let blotch = fractal_noise(x / 70.0, y / 70.0, noise_seed) - 0.5;
        let wall = add(mix(wall_top, wall_bottom, y / height), 0.06 * blotch);
        let depth = ((y - horizon) / (height - horizon)).max(0.0);
        let table = match &surface {
            Surface::Wood {
                light,
                dark,
                frequency,
            } => {
                // Grain lines run left to right and get denser towards the back.
                let along = (y - horizon).max(0.0) / (0.25 + depth);
                let warp = 9.0 * fractal_noise(x / 90.0, along / 40.0, noise_seed ^ 0x55);
                let grain = (along * frequency + warp).sin_portable() * 0.5 + 0.5;
                mix(*dark, *light, grain.powf_portable(0.6))
            }
            Surface::Linen { colour, weave } => {
                let threads = (x * weave).sin_portable() * (y * weave * 1.1).sin_portable();
                add(*colour, 0.035 * threads + 0.05 * (blotch + 0.3))
            }
            Surface::Concrete { colour } => {
                let fine = value_noise(x / 3.0, y / 3.0, noise_seed ^ 0x99) - 0.5;
                add(*colour, 0.12 * blotch + 0.06 * fine)
            }
            Surface::PaperSweep => add(mix(wall_bottom, wall_top, 0.25 * depth), 0.05 * blotch),
        };
        // Closer parts of the table catch more light than the far edge.
        let table = scale(table, 0.82 + 0.25 * depth);
        let on_table = smoothstep(-edge_softness, edge_softness, y - horizon);
        let base = mix(wall, table, on_table);
        let (dx, dy) = (x - spot.0, y - spot.1);
        let glow =
            0.8 + 0.32 * (-(dx * dx + dy * dy) / (2.0 * spot_radius * spot_radius)).exp_portable();
        Some((scale(base, glow), 1.0))
    });
    horizon
}

/// Darkens a soft ellipse on the table where the product blocks the light.
pub fn paint_contact_shadow(
    canvas: &mut Canvas,
    light: Light,
    (centre_x, centre_y): (f32, f32),
    (radius_x, radius_y): (f32, f32),
) {
    let centre_x = centre_x - light.x * radius_x * 0.45;
    let bounds = (
        centre_x - radius_x * 2.0,
        centre_y - radius_y * 2.0,
        centre_x + radius_x * 2.0,
        centre_y + radius_y * 2.0,
    );
    canvas.paint(bounds, |x, y, current| {
        let (dx, dy) = ((x - centre_x) / radius_x, (y - centre_y) / radius_y);
        let falloff = (-(dx * dx + dy * dy) * 1.6).exp_portable();
        Some((scale(current, 1.0 - 0.5 * falloff), 1.0))
    });
}

/// Final touches: vignette, a white-balance tint and per-pixel sensor noise.
pub fn finish(canvas: &mut Canvas, rng: &mut ChaCha8Rng) {
    let tint = [
        1.0 + rng.random_range(-0.04..0.04),
        1.0,
        1.0 + rng.random_range(-0.04..0.04),
    ];
    let noise_amplitude = rng.random_range(0.004..0.009);
    let vignette = rng.random_range(0.1..0.3);
    let (width, height) = (canvas.width as f32, canvas.height as f32);
    for y in 0..canvas.height {
        for x in 0..canvas.width {
            let (dx, dy) = (
                (x as f32 + 0.5) / width - 0.5,
                (y as f32 + 0.5) / height - 0.5,
            );
            let falloff = 1.0 - vignette * (dx * dx + dy * dy) * 2.0;
            let noise = (rng.random::<f32>() + rng.random::<f32>() - 1.0) * noise_amplitude;
            let [r, g, b] = canvas.get(x, y);
            let colour = [
                r * tint[0] * falloff + noise,
                g * tint[1] * falloff + noise,
                b * tint[2] * falloff + noise,
            ];
            canvas.blend(x, y, colour, 1.0);
        }
    }
}
