//! Procedural renderings of the six Kiln & Knot product classes.
//!
//! Ceramics and baskets are surfaces of revolution seen slightly from above: a radius profile
//! along the height, an elliptical opening, diffuse + specular shading from one key light.
//! Scarves are a folded band of patterned cloth lying on the table.

use std::f32::consts::{FRAC_PI_2, PI, TAU};

use image::RgbImage;
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::canvas::{add, fractal_noise, hsv, mix, scale, smoothstep, value_noise, Canvas, Rgb};
use crate::portable::PortableMath;
use crate::scene::{finish, paint_backdrop, paint_contact_shadow, Light};

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Label {
    Mug,
    Bowl,
    Vase,
    Basket,
    Scarf,
    Planter,
}

impl Label {
    pub const ALL: [Label; 6] = [
        Label::Mug,
        Label::Bowl,
        Label::Vase,
        Label::Basket,
        Label::Scarf,
        Label::Planter,
    ];

    pub fn name(self) -> &'static str {
        match self {
            Label::Mug => "mug",
            Label::Bowl => "bowl",
            Label::Vase => "vase",
            Label::Basket => "basket",
            Label::Scarf => "scarf",
            Label::Planter => "planter",
        }
    }
}

/// Renders one product photo; every random choice comes from `rng`.
pub fn render(label: Label, width: u32, height: u32, rng: &mut ChaCha8Rng) -> RgbImage {
    let mut canvas = Canvas::new(width as usize, height as usize);
    let light = Light::random(rng);
    let horizon = paint_backdrop(&mut canvas, rng, light);
    let stage = Stage {
        light,
        horizon,
        width: width as f32,
        height: height as f32,
    };
    match label {
        Label::Mug => paint_mug(&mut canvas, rng, &stage),
        Label::Bowl => paint_bowl(&mut canvas, rng, &stage),
        Label::Vase => paint_vase(&mut canvas, rng, &stage),
        Label::Basket => paint_basket(&mut canvas, rng, &stage),
        Label::Scarf => paint_scarf(&mut canvas, rng, &stage),
        Label::Planter => paint_planter(&mut canvas, rng, &stage),
    }
    finish(&mut canvas, rng);
    canvas.to_image()
}

struct Stage {
    light: Light,
    horizon: f32,
    width: f32,
    height: f32,
}

impl Stage {
    /// A random x for the product's axis, away from the frame edges.
    fn centre_x(&self, rng: &mut ChaCha8Rng, half_width: f32) -> f32 {
        let margin = (half_width + self.width * 0.04).min(self.width * 0.5);
        let low = margin.min(self.width * 0.38);
        let high = (self.width - margin).max(self.width * 0.62);
        rng.random_range(low..high)
    }

    /// A random y on the table where the product's foot stands.
    fn foot_y(&self, rng: &mut ChaCha8Rng) -> f32 {
        self.horizon + (self.height - self.horizon) * rng.random_range(0.35..0.7)
    }
}

fn frac(x: f32) -> f32 {
    x - x.floor()
}

fn random_glaze_colour(rng: &mut ChaCha8Rng) -> Rgb {
    let hue = rng.random_range(0.0..360.0);
    match rng.random_range(0..5) {
        0 => hsv(
            hue,
            rng.random_range(0.15..0.35),
            rng.random_range(0.75..0.95),
        ),
        1 => hsv(
            rng.random_range(30.0..60.0),
            rng.random_range(0.03..0.12),
            rng.random_range(0.85..0.96),
        ),
        2 => hsv(
            hue,
            rng.random_range(0.1..0.4),
            rng.random_range(0.15..0.32),
        ),
        _ => hsv(
            hue,
            rng.random_range(0.4..0.85),
            rng.random_range(0.35..0.85),
        ),
    }
}

enum GlazeStyle {
    Solid,
    Bands {
        accent: Rgb,
        count: f32,
        duty: f32,
    },
    Drip {
        lower: Rgb,
        level: f32,
        amplitude: f32,
        frequency: f32,
    },
    Dots {
        accent: Rgb,
        columns: f32,
        rows: f32,
        radius: f32,
    },
    Wave {
        accent: Rgb,
        level: f32,
        frequency: f32,
        amplitude: f32,
        thickness: f32,
    },
}

struct Glaze {
    base: Rgb,
    style: GlazeStyle,
    speckle: f32,
    unglazed_foot: Option<(f32, Rgb)>,
    gloss: f32,
    seed: u32,
}

impl Glaze {
    fn random(rng: &mut ChaCha8Rng) -> Self {
        let base = random_glaze_colour(rng);
        let style = match rng.random_range(0..5) {
            0 => GlazeStyle::Solid,
            1 => GlazeStyle::Bands {
                accent: random_glaze_colour(rng),
                count: rng.random_range(2.0..7.0),
                duty: rng.random_range(0.15..0.45),
            },
            2 => GlazeStyle::Drip {
                lower: random_glaze_colour(rng),
                level: rng.random_range(0.25..0.65),
                amplitude: rng.random_range(0.03..0.12),
                frequency: rng.random_range(6.0..16.0),
            },
            3 => GlazeStyle::Dots {
                accent: random_glaze_colour(rng),
                columns: rng.random_range(4.0..10.0),
                rows: rng.random_range(3.0..8.0),
                radius: rng.random_range(0.15..0.35),
            },
            _ => GlazeStyle::Wave {
                accent: random_glaze_colour(rng),
                level: rng.random_range(0.3..0.7),
                frequency: rng.random_range(1.5..5.0),
                amplitude: rng.random_range(0.03..0.12),
                thickness: rng.random_range(0.03..0.1),
            },
        };
        let speckle = if rng.random_bool(0.4) {
            rng.random_range(0.03..0.12)
        } else {
            0.0
        };
        let unglazed_foot = rng.random_bool(0.35).then(|| {
            let clay = hsv(
                rng.random_range(20.0..40.0),
                rng.random_range(0.2..0.5),
                rng.random_range(0.5..0.8),
            );
            (rng.random_range(0.8..0.92), clay)
        });
        Glaze {
            base,
            style,
            speckle,
            unglazed_foot,
            gloss: rng.random_range(0.15..0.7),
            seed: rng.random(),
        }
    }

    /// Terracotta: unglazed fired clay, matte.
    fn terracotta(rng: &mut ChaCha8Rng) -> Self {
        Glaze {
            base: hsv(
                rng.random_range(10.0..26.0),
                rng.random_range(0.5..0.75),
                rng.random_range(0.5..0.8),
            ),
            style: GlazeStyle::Solid,
            speckle: rng.random_range(0.0..0.06),
            unglazed_foot: None,
            gloss: 0.03,
            seed: rng.random(),
        }
    }

    /// Colour at `around` (-1 left silhouette .. 1 right silhouette) and height fraction `t`.
    fn colour(&self, around: f32, t: f32) -> Rgb {
        if let Some((level, clay)) = self.unglazed_foot {
            if t > level {
                let grit = value_noise(around * 40.0, t * 60.0, self.seed ^ 7) - 0.5;
                return add(clay, 0.08 * grit);
            }
        }
        let variation = fractal_noise(around * 3.0 + 5.0, t * 4.0, self.seed);
        let mut colour = scale(self.base, 0.9 + 0.2 * variation);
        match self.style {
            GlazeStyle::Solid => {}
            GlazeStyle::Bands {
                accent,
                count,
                duty,
            } => {
                if frac(t * count) < duty {
                    colour = accent;
                }
            }
            GlazeStyle::Drip {
                lower,
                level,
                amplitude,
                frequency,
            } => {
                let boundary = level
                    + amplitude
                        * (around * frequency + self.seed as f32 * 1e-3)
                            .sin_portable()
                            .abs()
                    + amplitude * (variation - 0.5);
                colour = mix(
                    colour,
                    lower,
                    smoothstep(boundary - 0.015, boundary + 0.015, t),
                );
            }
            GlazeStyle::Dots {
                accent,
                columns,
                rows,
                radius,
            } => {
                let row = t * rows;
                let column = (around + 1.0) * 0.5 * columns + 0.5 * (row.floor() % 2.0);
                let (dx, dy) = (frac(column) - 0.5, frac(row) - 0.5);
                if dx * dx + dy * dy < radius * radius {
                    colour = accent;
                }
            }
            GlazeStyle::Wave {
                accent,
                level,
                frequency,
                amplitude,
                thickness,
            } => {
                let centre = level + amplitude * (around * frequency * PI).sin_portable();
                if (t - centre).abs() < thickness {
                    colour = accent;
                }
            }
        }
        if self.speckle > 0.0
            && value_noise(around * 70.0, t * 90.0, self.seed ^ 1) > 1.0 - self.speckle
        {
            colour = scale(colour, 0.45);
        }
        colour
    }
}

/// A surface of revolution standing on the table with its opening at `top`.
struct Body<'a> {
    centre_x: f32,
    top: f32,
    height: f32,
    /// Height/width ratio of horizontal cross-sections as seen by the camera.
    tilt: f32,
    radius: &'a dyn Fn(f32) -> f32,
    surface: &'a dyn Fn(f32, f32) -> Rgb,
    /// Colour inside the opening at normalised ellipse coordinates (-1..1, -1..1).
    inside: &'a dyn Fn(f32, f32) -> Rgb,
    /// Fraction of the opening's radius taken by the lip.
    lip: f32,
    gloss: f32,
    shininess: f32,
}

impl Body<'_> {
    fn foot_y(&self) -> f32 {
        self.top + self.height
    }

    fn paint(&self, canvas: &mut Canvas, light: Light) {
        let widest = (0..=64)
            .map(|step| (self.radius)(step as f32 / 64.0))
            .fold(0.0f32, f32::max);
        let opening_radius = (self.radius)(0.0);
        let opening_half_height = (self.tilt * opening_radius).max(1.0);
        let bounds = (
            self.centre_x - widest - 2.0,
            self.top - opening_half_height - 2.0,
            self.centre_x + widest + 2.0,
            self.foot_y() + self.tilt * (self.radius)(1.0) + 2.0,
        );
        canvas.paint(bounds, |x, y, _| {
            let dx = x - self.centre_x;
            let (ex, ey) = (dx / opening_radius, (y - self.top) / opening_half_height);
            let q = (ex * ex + ey * ey).sqrt();
            if q <= 1.0 {
                let alpha = ((1.0 - q) * opening_half_height + 0.5).clamp(0.0, 1.0);
                let colour = if q > 1.0 - self.lip {
                    scale(
                        (self.surface)(ex.clamp(-1.0, 1.0), 0.0),
                        0.2 + light.shade(ex),
                    )
                } else {
                    let inner = 1.0 - self.lip;
                    (self.inside)(ex / inner, ey / inner)
                };
                return Some((colour, alpha));
            }
            // The front surface of cross-section t sits lower by tilt * r * cos(angle);
            // one fixed-point step from the naive t is accurate enough at these tilts.
            let naive_t = ((y - self.top) / self.height).clamp(0.0, 1.0);
            let naive_radius = (self.radius)(naive_t);
            let u = (dx / naive_radius).clamp(-1.0, 1.0);
            let t = (y - self.top - self.tilt * naive_radius * (1.0 - u * u).sqrt()) / self.height;
            if !(0.0..=1.0).contains(&t) {
                return None;
            }
            let radius = (self.radius)(t);
            if dx.abs() > radius + 0.5 {
                return None;
            }
            let alpha = (radius - dx.abs() + 0.5).clamp(0.0, 1.0)
                * ((1.0 - t) * self.height + 0.5).clamp(0.0, 1.0);
            let u = (dx / radius).clamp(-1.0, 1.0);
            let around = u.asin_portable() / FRAC_PI_2;
            // A radius growing downwards means the surface faces up, towards the key light.
            let slope = ((self.radius)((t + 0.01).min(1.0)) - (self.radius)((t - 0.01).max(0.0)))
                / (0.02 * self.height);
            let facing_up = slope / (1.0 + slope * slope).sqrt();
            let occlusion = 1.0 - 0.22 * smoothstep(0.8, 1.0, t);
            let shade = light.shade(u) * occlusion * (1.0 + 0.25 * facing_up);
            let shine = self.gloss * light.highlight(u, self.shininess);
            Some((
                add(scale((self.surface)(around, t), shade), 0.85 * shine),
                alpha,
            ))
        });
    }

    fn paint_shadow(&self, canvas: &mut Canvas, light: Light) {
        let foot = (self.radius)(1.0);
        paint_contact_shadow(
            canvas,
            light,
            (self.centre_x, self.foot_y()),
            (foot * 1.15, (self.tilt * foot).max(3.0) + 3.0),
        );
    }
}

/// Shading of a glazed inner wall seen through an opening, lit from the other side.
fn glazed_inside(glaze: &Glaze, light: Light, ex: f32, ey: f32) -> Rgb {
    let facing_light = -ex * light.x;
    let back_wall = (-ey).max(0.0);
    scale(
        glaze.colour(ex.clamp(-1.0, 1.0), 0.1),
        0.35 + 0.3 * facing_light.max(0.0) + 0.3 * back_wall,
    )
}

fn paint_mug(canvas: &mut Canvas, rng: &mut ChaCha8Rng, stage: &Stage) {
    let glaze = Glaze::random(rng);
    let height = stage.height * rng.random_range(0.32..0.45);
    let radius = height * rng.random_range(0.36..0.5);
    let taper = rng.random_range(-0.15..0.15);
    let handle_side = if rng.random_bool(0.5) { 1.0 } else { -1.0 };
    let handle_outer = height * rng.random_range(0.26..0.36);
    let handle_thickness = handle_outer * rng.random_range(0.25..0.4);
    let handle_stretch = rng.random_range(1.0..1.5);
    let centre_x = stage.centre_x(rng, radius + handle_outer);
    let foot_y = stage.foot_y(rng);
    let profile =
        move |t: f32| radius * (1.0 + taper * (t - 0.5)) * (1.0 - 0.08 * smoothstep(0.9, 1.0, t));
    let surface = |around: f32, t: f32| glaze.colour(around, t);
    let inside = |ex: f32, ey: f32| glazed_inside(&glaze, stage.light, ex, ey);
    let body = Body {
        centre_x,
        top: foot_y - height,
        height,
        tilt: rng.random_range(0.14..0.26),
        radius: &profile,
        surface: &surface,
        inside: &inside,
        lip: 0.07,
        gloss: glaze.gloss,
        shininess: 30.0,
    };
    body.paint_shadow(canvas, stage.light);

    // The handle is a stretched ring beside the body; the body painted afterwards hides its inner half.
    let handle_centre = (
        centre_x + handle_side * (radius * 0.95 + handle_outer * 0.3),
        body.top + height * 0.48,
    );
    let handle_inner = handle_outer - handle_thickness;
    let light = stage.light;
    canvas.paint(
        (
            handle_centre.0 - handle_outer - 1.0,
            handle_centre.1 - handle_outer * handle_stretch - 1.0,
            handle_centre.0 + handle_outer + 1.0,
            handle_centre.1 + handle_outer * handle_stretch + 1.0,
        ),
        |x, y, _| {
            let (dx, dy) = (x - handle_centre.0, (y - handle_centre.1) / handle_stretch);
            let distance = (dx * dx + dy * dy).sqrt();
            if distance < handle_inner - 0.5 || distance > handle_outer + 0.5 {
                return None;
            }
            let alpha = (handle_outer - distance + 0.5).min(distance - handle_inner + 0.5);
            let across = 2.0 * (distance - handle_inner) / handle_thickness - 1.0;
            let normal_x = (across * dx / distance.max(1e-3)).clamp(-1.0, 1.0);
            let colour = glaze.colour(normal_x * 0.3 + 0.6 * handle_side, 0.4);
            let shine = glaze.gloss * light.highlight(normal_x, 20.0);
            Some((
                add(scale(colour, light.shade(normal_x)), 0.7 * shine),
                alpha,
            ))
        },
    );
    body.paint(canvas, stage.light);
}

fn paint_bowl(canvas: &mut Canvas, rng: &mut ChaCha8Rng, stage: &Stage) {
    let glaze = Glaze::random(rng);
    let inner_glaze = if rng.random_bool(0.5) {
        Glaze::random(rng)
    } else {
        Glaze {
            style: GlazeStyle::Solid,
            ..Glaze::random(rng)
        }
    };
    let rim_radius = stage.width.min(stage.height * 1.2) * rng.random_range(0.26..0.38);
    let height = rim_radius * rng.random_range(0.5..0.8);
    let foot = rng.random_range(0.38..0.55);
    let curve = rng.random_range(1.6..2.6);
    let inner_ring = rng.random_bool(0.5).then(|| {
        (
            rng.random_range(0.35..0.7),
            random_glaze_colour(rng),
            rng.random_range(0.04..0.1),
        )
    });
    let centre_x = stage.centre_x(rng, rim_radius);
    let foot_y = stage.foot_y(rng);
    let light = stage.light;
    let profile = move |t: f32| rim_radius * (1.0 - (1.0 - foot) * t.powf_portable(curve));
    let surface = |around: f32, t: f32| glaze.colour(around, t);
    let inside = |ex: f32, ey: f32| {
        let distance = (ex * ex + (ey - 0.25) * (ey - 0.25)).sqrt();
        let mut colour = inner_glaze.colour(ex.clamp(-1.0, 1.0), distance);
        if let Some((radius, accent, width)) = inner_ring {
            if (distance - radius).abs() < width {
                colour = accent;
            }
        }
        // Glaze pools darker in the well; the wall nearest the light is in its own shadow.
        let pool = 1.0 - 0.2 * smoothstep(0.45, 0.1, distance);
        let lit = 0.55 + 0.3 * (-ex * light.x).max(0.0) + 0.2 * (-ey).max(0.0);
        let shine = inner_glaze.gloss
            * 0.6
            * smoothstep(0.25, 0.0, (ex + 0.5 * light.x).abs() + (ey + 0.3).abs());
        add(scale(colour, lit * pool), shine)
    };
    let body = Body {
        centre_x,
        top: foot_y - height,
        height,
        tilt: rng.random_range(0.3..0.45),
        radius: &profile,
        surface: &surface,
        inside: &inside,
        lip: 0.035,
        gloss: glaze.gloss,
        shininess: 24.0,
    };
    body.paint_shadow(canvas, stage.light);
    body.paint(canvas, stage.light);
}

fn paint_vase(canvas: &mut Canvas, rng: &mut ChaCha8Rng, stage: &Stage) {
    let glaze = Glaze::random(rng);
    let foot_y = stage.foot_y(rng);
    let height = (stage.height * rng.random_range(0.55..0.78)).min(foot_y - stage.height * 0.07);
    let belly_radius = (height * rng.random_range(0.2..0.3)).min(stage.width * 0.3);
    let neck = rng.random_range(0.25..0.5);
    let belly = rng.random_range(0.45..0.75);
    let spread = rng.random_range(0.2..0.35);
    let flare = rng.random_range(0.05..0.3);
    let profile = move |t: f32| {
        let bulge = (-((t - belly) / spread).powi(2)).exp_portable();
        let lip = flare * (-(t / 0.05).powi(2)).exp_portable();
        belly_radius * (neck + (1.0 - neck) * bulge + lip) * (1.0 - 0.12 * smoothstep(0.92, 1.0, t))
    };
    let centre_x = stage.centre_x(rng, belly_radius);
    let surface = |around: f32, t: f32| glaze.colour(around, t);
    let inside = |_: f32, ey: f32| scale(glaze.base, 0.12 + 0.1 * (-ey).max(0.0));
    let body = Body {
        centre_x,
        top: foot_y - height,
        height,
        tilt: rng.random_range(0.12..0.22),
        radius: &profile,
        surface: &surface,
        inside: &inside,
        lip: 0.2,
        gloss: glaze.gloss,
        shininess: 40.0,
    };
    body.paint_shadow(canvas, stage.light);
    body.paint(canvas, stage.light);
}

/// Woven cane: horizontal strands passing over and under vertical stakes.
struct Weave {
    strand: Rgb,
    stake: Rgb,
    accent: Option<(Rgb, f32, f32)>,
    stakes: f32,
    rows: f32,
    braid_rim: f32,
    seed: u32,
}

impl Weave {
    fn random(rng: &mut ChaCha8Rng) -> Self {
        let hue = rng.random_range(25.0..45.0);
        let value = rng.random_range(0.45..0.85);
        let strand = hsv(hue, rng.random_range(0.3..0.65), value);
        let stake = hsv(
            hue - 4.0,
            rng.random_range(0.3..0.7),
            value * rng.random_range(0.7..1.0),
        );
        let accent = rng.random_bool(0.55).then(|| {
            (
                hsv(
                    rng.random_range(0.0..360.0),
                    rng.random_range(0.4..0.8),
                    rng.random_range(0.3..0.7),
                ),
                rng.random_range(0.2..0.7),
                rng.random_range(0.06..0.16),
            )
        });
        Weave {
            strand,
            stake,
            accent,
            stakes: rng.random_range(9.0..18.0),
            rows: rng.random_range(8.0..20.0),
            braid_rim: rng.random_range(0.05..0.11),
            seed: rng.random(),
        }
    }

    fn colour(&self, around: f32, t: f32) -> Rgb {
        let wobble = 0.15 * (value_noise(around * 8.0, t * 8.0, self.seed) - 0.5);
        if t < self.braid_rim {
            // A braided rim: diagonal plaits.
            let plait = frac((around + 1.0) * self.stakes * 1.5 + t / self.braid_rim);
            return scale(
                self.strand,
                0.6 + 0.45 * (plait * PI).sin_portable() + wobble,
            );
        }
        let column = (around + 1.0) * 0.5 * self.stakes;
        let row = t * self.rows;
        let strand_on_top = (column.floor() as i64 + row.floor() as i64) % 2 == 0;
        let (colour, across) = if strand_on_top {
            let mut strand = self.strand;
            if let Some((accent, level, width)) = self.accent {
                if (t - level).abs() < width {
                    strand = accent;
                }
            }
            (strand, frac(row))
        } else {
            (self.stake, frac(column))
        };
        // Rounded strands: brightest along their middle, dark gaps between them.
        let rounding = 0.55 + 0.45 * (across * PI).sin_portable();
        scale(colour, rounding + wobble)
    }
}

fn paint_basket(canvas: &mut Canvas, rng: &mut ChaCha8Rng, stage: &Stage) {
    let weave = Weave::random(rng);
    let height = stage.height * rng.random_range(0.26..0.4);
    let rim_radius = (height * rng.random_range(0.75..1.15)).min(stage.width * 0.4);
    let taper = rng.random_range(0.0..0.28);
    let has_handle = rng.random_bool(0.5);
    let handle_rise = height * rng.random_range(0.6..1.0);
    let handle_thickness = rim_radius * rng.random_range(0.07..0.12);
    let centre_x = stage.centre_x(rng, rim_radius);
    let foot_y = stage
        .foot_y(rng)
        .max(height + handle_rise + stage.height * 0.05);
    let foot_y = foot_y.min(stage.height * 0.97);
    let light = stage.light;
    let profile = move |t: f32| rim_radius * (1.0 - taper * t + 0.05 * (PI * t).sin_portable());
    let surface = |around: f32, t: f32| weave.colour(around, t);
    let inside = |ex: f32, ey: f32| {
        let shade = 0.3 + 0.25 * (-ex * light.x).max(0.0) + 0.2 * (-ey).max(0.0);
        scale(weave.colour(ex.clamp(-1.0, 1.0), 0.5 + 0.3 * ey), shade)
    };
    let body = Body {
        centre_x,
        top: foot_y - height,
        height,
        tilt: rng.random_range(0.2..0.35),
        radius: &profile,
        surface: &surface,
        inside: &inside,
        lip: 0.05,
        gloss: 0.0,
        shininess: 1.0,
    };
    body.paint_shadow(canvas, stage.light);
    body.paint(canvas, stage.light);
    if !has_handle {
        return;
    }
    // A twisted arch from one side of the rim to the other.
    let (arch_x, arch_y) = (centre_x, body.top);
    let arch_width = rim_radius * 0.92;
    canvas.paint(
        (
            arch_x - arch_width - 2.0,
            arch_y - handle_rise - 2.0,
            arch_x + arch_width + 2.0,
            arch_y,
        ),
        |x, y, _| {
            let (nx, ny) = ((x - arch_x) / arch_width, (y - arch_y) / handle_rise);
            let distance = (nx * nx + ny * ny).sqrt();
            let thickness = handle_thickness / arch_width;
            let across = (distance - (1.0 - thickness)) / thickness;
            if !(0.0..=1.0).contains(&across) {
                return None;
            }
            let angle = ny.atan2_portable(nx);
            let twist = frac(angle * 9.0 + across * 1.5);
            let colour = scale(weave.strand, 0.55 + 0.45 * (twist * PI).sin_portable());
            Some((scale(colour, light.shade(nx.clamp(-1.0, 1.0) * 0.5)), 1.0))
        },
    );
}

enum Pattern {
    Stripes {
        colours: Vec<Rgb>,
        width: f32,
    },
    Plaid {
        base: Rgb,
        warp: Rgb,
        weft: Rgb,
        pitch: f32,
    },
    Chevron {
        base: Rgb,
        accent: Rgb,
        pitch: f32,
    },
    Bordered {
        base: Rgb,
        border: Rgb,
    },
}

impl Pattern {
    fn random(rng: &mut ChaCha8Rng, scarf_width: f32) -> Self {
        let wool = |rng: &mut ChaCha8Rng| {
            hsv(
                rng.random_range(0.0..360.0),
                rng.random_range(0.25..0.85),
                rng.random_range(0.3..0.9),
            )
        };
        match rng.random_range(0..4) {
            0 => Pattern::Stripes {
                colours: (0..rng.random_range(2..5)).map(|_| wool(rng)).collect(),
                width: scarf_width * rng.random_range(0.12..0.45),
            },
            1 => Pattern::Plaid {
                base: wool(rng),
                warp: wool(rng),
                weft: wool(rng),
                pitch: scarf_width * rng.random_range(0.2..0.45),
            },
            2 => Pattern::Chevron {
                base: wool(rng),
                accent: wool(rng),
                pitch: scarf_width * rng.random_range(0.12..0.3),
            },
            _ => Pattern::Bordered {
                base: wool(rng),
                border: wool(rng),
            },
        }
    }

    /// Colour at `along` pixels from the scarf's middle and `across` in -1..1.
    fn colour(&self, along: f32, across: f32, half_width: f32) -> Rgb {
        match self {
            Pattern::Stripes { colours, width } => {
                let index = (along / width).floor().rem_euclid(colours.len() as f32) as usize;
                colours[index]
            }
            Pattern::Plaid {
                base,
                warp,
                weft,
                pitch,
            } => {
                let in_warp = frac(along / pitch) < 0.3;
                let in_weft = frac(across * half_width / pitch + 0.25) < 0.3;
                match (in_warp, in_weft) {
                    (true, true) => mix(*warp, *weft, 0.5),
                    (true, false) => mix(*base, *warp, 0.75),
                    (false, true) => mix(*base, *weft, 0.75),
                    (false, false) => *base,
                }
            }
            Pattern::Chevron {
                base,
                accent,
                pitch,
            } => {
                if frac((along + across.abs() * half_width) / pitch) < 0.5 {
                    *accent
                } else {
                    *base
                }
            }
            Pattern::Bordered { base, border } => {
                if across.abs() > 0.72 {
                    *border
                } else {
                    *base
                }
            }
        }
    }
}

/// A long band of cloth in gentle S-folds: centre line `amplitude * sin(frequency * along)`.
struct Band {
    centre: (f32, f32),
    direction: (f32, f32),
    half_length: f32,
    half_width: f32,
    amplitude: f32,
    frequency: f32,
    phase: f32,
    fringe: f32,
    /// Whether the start end has a fringe too (a scarf hung over a rail shows only one end).
    fringe_at_start: bool,
    /// Vertical foreshortening: below 1 for cloth lying flat on the table.
    squash: f32,
}

struct BandPoint {
    along: f32,
    across: f32,
    slope: f32,
    in_fringe: bool,
}

impl Band {
    fn locate(&self, x: f32, y: f32) -> Option<BandPoint> {
        let (px, py) = (x - self.centre.0, (y - self.centre.1) / self.squash);
        let along = px * self.direction.0 + py * self.direction.1;
        let start_limit = if self.fringe_at_start {
            self.half_length + self.fringe
        } else {
            self.half_length
        };
        if along > self.half_length + self.fringe || along < -start_limit {
            return None;
        }
        let perpendicular = -px * self.direction.1 + py * self.direction.0;
        let wave = self.frequency * along + self.phase;
        let slope = self.amplitude * self.frequency * wave.cos_portable();
        let half_thickness = self.half_width * (1.0 + slope * slope).sqrt();
        let across = (perpendicular - self.amplitude * wave.sin_portable()) / half_thickness;
        (across.abs() <= 1.0).then_some(BandPoint {
            along,
            across,
            slope,
            in_fringe: along.abs() > self.half_length,
        })
    }
}

/// How the cloth itself looks, independent of how it is laid out.
struct Cloth {
    pattern: Pattern,
    tassels: f32,
    fold_length: f32,
    knit_pitch: f32,
}

impl Cloth {
    fn random(rng: &mut ChaCha8Rng, half_width: f32) -> Self {
        Cloth {
            pattern: Pattern::random(rng, half_width * 2.0),
            tassels: rng.random_range(6.0..13.0),
            fold_length: rng.random_range(18.0..50.0),
            knit_pitch: rng.random_range(2.5..4.5),
        }
    }

    /// Paints the band's shadow at `shadow_offset`, then the band, darkened by `dim`.
    fn paint(
        &self,
        canvas: &mut Canvas,
        band: &Band,
        light: Light,
        shadow_offset: (f32, f32),
        dim: f32,
    ) {
        canvas.paint(canvas.full_box(), |x, y, current| {
            band.locate(x - shadow_offset.0, y - shadow_offset.1)
                .map(|_| (scale(current, 0.72), 0.8))
        });
        canvas.paint(canvas.full_box(), |x, y, _| {
            let point = band.locate(x, y)?;
            let along = point.along.clamp(-band.half_length, band.half_length);
            let colour = scale(
                self.pattern.colour(along, point.across, band.half_width),
                dim,
            );
            if point.in_fringe {
                let tassel = frac((point.across + 1.0) * 0.5 * self.tassels);
                if tassel > 0.5 {
                    return None;
                }
                return Some((
                    scale(colour, 0.7 + 0.5 * (tassel * TAU).sin_portable()),
                    1.0,
                ));
            }
            // Folds turn the cloth towards or away from the light; knit ribs give fine texture.
            let tilt_to_light =
                (point.slope / (1.0 + point.slope * point.slope).sqrt()) * light.x.signum();
            let folds =
                0.1 * (TAU * point.along / self.fold_length + 2.0 * point.across).sin_portable();
            let ribs = 0.07
                * (TAU * point.along / self.knit_pitch).sin_portable()
                * (point.across * band.half_width * 1.3).sin_portable().abs();
            let edge = 1.0 - 0.25 * smoothstep(0.8, 1.0, point.across.abs());
            let shade = (0.85 + 0.2 * tilt_to_light + folds + ribs) * edge;
            Some((scale(colour, shade), 1.0))
        });
    }
}

fn paint_scarf(canvas: &mut Canvas, rng: &mut ChaCha8Rng, stage: &Stage) {
    let short_side = stage.width.min(stage.height);
    let half_width = short_side * rng.random_range(0.09..0.15);
    let cloth = Cloth::random(rng, half_width);
    let light = stage.light;
    if rng.random_bool(0.6) {
        // Lying on the table, seen at a grazing angle.
        let angle: f32 = rng.random_range(-0.45..0.45);
        let (cos, sin) = (angle.cos_portable(), angle.sin_portable().abs());
        let centre_x = stage.width * rng.random_range(0.42..0.58);
        let wanted_y = stage.horizon + (stage.height - stage.horizon) * rng.random_range(0.4..0.6);
        let half_width = half_width * 1.15;
        let amplitude = half_width * rng.random_range(0.3..0.9);
        let fringe = half_width * rng.random_range(0.2..0.5);
        let squash = rng.random_range(0.55..0.8);
        // Keep the whole scarf in frame: ends inside the sides, lowest fold above the bottom.
        let sway = amplitude + half_width;
        let room_x = centre_x.min(stage.width - centre_x) * 0.95;
        let half_length =
            (short_side * rng.random_range(0.36..0.46)).min((room_x - sway * sin) / cos - fringe);
        let reach_down = squash * ((half_length + fringe) * sin + sway * cos);
        let band = Band {
            centre: (centre_x, wanted_y.min(stage.height * 0.97 - reach_down)),
            direction: (cos, angle.sin_portable()),
            half_length,
            half_width,
            amplitude,
            frequency: TAU / (short_side * rng.random_range(0.45..0.9)),
            phase: rng.random_range(0.0..TAU),
            fringe,
            fringe_at_start: true,
            squash,
        };
        cloth.paint(canvas, &band, light, (-light.x * 6.0, 5.0), 1.0);
        return;
    }
    // Folded over a wooden wall rail: two hanging lengths, the back one in shade.
    let rail_y = stage.height * rng.random_range(0.1..0.22);
    let rail_radius = rng.random_range(4.0..8.0f32);
    let centre_x = stage.width * rng.random_range(0.38..0.62);
    let frequency = TAU / (stage.height * rng.random_range(0.6..1.2));
    for (side, dim) in [(-1.0f32, 0.82), (1.0, 1.0)] {
        let length = (stage.height * rng.random_range(0.45..0.7)).min(stage.height * 0.93 - rail_y);
        let band = Band {
            centre: (
                centre_x + side * half_width * rng.random_range(0.5..0.9),
                rail_y + length * 0.5,
            ),
            direction: (0.0, 1.0),
            half_length: length * 0.5,
            half_width,
            amplitude: half_width * rng.random_range(0.05..0.3),
            frequency,
            phase: rng.random_range(0.0..TAU),
            fringe: half_width * rng.random_range(0.2..0.5),
            fringe_at_start: false,
            squash: 1.0,
        };
        cloth.paint(canvas, &band, light, (-light.x * 9.0, 4.0), dim);
    }
    let wood = hsv(
        rng.random_range(20.0..38.0),
        rng.random_range(0.4..0.65),
        rng.random_range(0.4..0.75),
    );
    canvas.paint(
        (
            0.0,
            rail_y - rail_radius - 1.0,
            stage.width,
            rail_y + rail_radius + 1.0,
        ),
        |_, y, _| {
            let across = (y - rail_y) / rail_radius;
            if across.abs() > 1.0 {
                return None;
            }
            // A dowel lit from above-front: brightest a little above its axis.
            let shade = 0.45 + 0.6 * (1.0 - (across + 0.3).powi(2)).max(0.0);
            Some((
                scale(wood, shade),
                (rail_radius * (1.0 - across.abs()) + 0.5).min(1.0),
            ))
        },
    );
}

struct Leaf {
    base: (f32, f32),
    angle: f32,
    length: f32,
    width: f32,
    bend: f32,
    colour: Rgb,
    variegated: bool,
    banded: bool,
}

impl Leaf {
    fn paint(&self, canvas: &mut Canvas, light: Light) {
        let reach = self.length + self.width;
        let (dir_x, dir_y) = (self.angle.sin_portable(), -self.angle.cos_portable());
        canvas.paint(
            (
                self.base.0 - reach,
                self.base.1 - reach,
                self.base.0 + reach,
                self.base.1 + reach,
            ),
            |x, y, _| {
                let (px, py) = (x - self.base.0, y - self.base.1);
                let along = px * dir_x + py * dir_y;
                if along <= 0.0 || along >= self.length {
                    return None;
                }
                let fraction = along / self.length;
                let across =
                    (px * -dir_y + py * dir_x) - self.bend * self.length * fraction * fraction;
                let half_width =
                    0.5 * self.width * (PI * fraction).sin_portable().powf_portable(0.7);
                if across.abs() > half_width + 0.5 {
                    return None;
                }
                let alpha = (half_width - across.abs() + 0.5).clamp(0.0, 1.0);
                let side = across / half_width.max(1e-3);
                let mut colour = self.colour;
                if self.variegated && side.abs() > 0.7 {
                    colour = hsv(55.0, 0.45, 0.85);
                }
                if self.banded && frac(along / 9.0) < 0.3 {
                    colour = scale(colour, 0.65);
                }
                // Folded along the midrib: one half faces the light.
                let facing = if side * light.x < 0.0 { 1.0 } else { 0.78 };
                let midrib = if side.abs() < 0.08 { 1.15 } else { 1.0 };
                let shade = facing * midrib * (0.7 + 0.35 * fraction);
                Some((scale(colour, shade), alpha))
            },
        );
    }
}

fn paint_planter(canvas: &mut Canvas, rng: &mut ChaCha8Rng, stage: &Stage) {
    let glaze = if rng.random_bool(0.5) {
        Glaze::terracotta(rng)
    } else {
        Glaze::random(rng)
    };
    let foot_y = stage.foot_y(rng);
    let height = stage.height * rng.random_range(0.24..0.34);
    let rim_radius = (height * rng.random_range(0.55..0.8)).min(stage.width * 0.35);
    let taper = rng.random_range(0.1..0.3);
    let rim_band = rng.random_range(0.1..0.2);
    let profile = move |t: f32| {
        let band = 1.0 + 0.08 * smoothstep(rim_band + 0.02, rim_band, t);
        rim_radius * (1.0 - taper * t) * band
    };
    let centre_x = stage.centre_x(rng, rim_radius);
    let soil_seed: u32 = rng.random();
    let surface = |around: f32, t: f32| {
        let colour = glaze.colour(around, t);
        // The rolled rim throws a thin shadow on the wall of the pot below it.
        scale(
            colour,
            1.0 - 0.3
                * smoothstep(rim_band, rim_band + 0.04, t)
                * smoothstep(rim_band + 0.1, rim_band + 0.04, t),
        )
    };
    let inside = |ex: f32, ey: f32| {
        let crumbs = value_noise(ex * 14.0 + 3.0, ey * 9.0, soil_seed);
        scale(hsv(25.0, 0.55, 0.28), 0.6 + 0.6 * crumbs)
    };
    let body = Body {
        centre_x,
        top: foot_y - height,
        height,
        tilt: rng.random_range(0.16..0.28),
        radius: &profile,
        surface: &surface,
        inside: &inside,
        lip: 0.06,
        gloss: glaze.gloss,
        shininess: 25.0,
    };
    body.paint_shadow(canvas, stage.light);
    body.paint(canvas, stage.light);

    let leaf_hue = rng.random_range(85.0..145.0);
    let leaf_count = rng.random_range(5..13);
    let spread = rng.random_range(0.5..1.35);
    let slenderness = rng.random_range(0.08..0.35);
    let longest = (height * rng.random_range(0.9..1.9)).min(body.top * 0.92);
    let variegated = rng.random_bool(0.3);
    let banded = !variegated && rng.random_bool(0.25);
    let mut leaves: Vec<Leaf> = (0..leaf_count)
        .map(|_| {
            let length = longest * rng.random_range(0.55..1.0);
            Leaf {
                base: (
                    centre_x + rim_radius * rng.random_range(-0.3..0.3),
                    body.top + body.tilt * rim_radius * rng.random_range(-0.3..0.3),
                ),
                angle: rng.random_range(-spread..spread),
                length,
                width: length * slenderness * rng.random_range(0.8..1.2),
                bend: rng.random_range(-0.25..0.25),
                colour: hsv(
                    leaf_hue + rng.random_range(-12.0..12.0),
                    rng.random_range(0.45..0.85),
                    rng.random_range(0.3..0.7),
                ),
                variegated,
                banded,
            }
        })
        .collect();
    // Upright leaves stand at the back of the pot; splayed ones lean out in front.
    leaves.sort_by(|a, b| a.angle.abs().total_cmp(&b.angle.abs()));
    for leaf in &leaves {
        leaf.paint(canvas, stage.light);
    }
}
