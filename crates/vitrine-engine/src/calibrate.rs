//! Threshold calibration on the user's own collection.
//!
//! A sample of the collection's images is edited IN MEMORY with the kinds of
//! edits the Copydays protocol (Jégou, Douze and Schmid, 2008) uses — JPEG
//! recompression, resizing, cropping, brightness and contrast, borders, small
//! rotations, overlaid text, colour changes; the exact strengths here are our
//! reading of the protocol, written from memory. Similarities of edited copies
//! to their originals are the positives; each sampled original's nearest
//! distinct image in the collection gives a negative. The precision/recall
//! trade-off over a grid of thresholds shows where this collection and model
//! separate copies from different pictures. User files are only ever read.

use std::collections::HashMap;
use std::io::Cursor;

use image::codecs::jpeg::JpegEncoder;
use image::imageops::FilterType;
use image::{Rgb, RgbImage};
use rand::seq::index::sample as sample_indices;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::Serialize;
use vitrine_imaging::{decode_path, preprocess, DecodeOptions};
use vitrine_model::encoder::Encoder;
use vitrine_store::Store;

use crate::catalog::{dot, Catalog};
use crate::decisions::{DecisionState, Fate};
use crate::error::EngineError;
use crate::ingest::fingerprint_of;
use crate::progress::Progress;

/// How far an edit moves an image from its original.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Severity {
    /// What copies usually go through: recompression, resizing, light crops.
    Mild,
    /// Heavy crops, larger rotations, strong colour changes.
    Strong,
}

/// One Copydays-style edit.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Edit {
    /// Re-encode as JPEG at this quality.
    Jpeg { quality: u8 },
    /// Scale both sides to this percentage.
    Resize { percent: u32 },
    /// Keep an off-centre window holding `100 - removed_percent` % of the
    /// surface, with the original aspect ratio.
    Crop { removed_percent: u32 },
    /// Add this percentage of full scale to every channel.
    Brightness { percent: i32 },
    /// Scale the distance from mid-grey by `1 + percent / 100`.
    Contrast { percent: i32 },
    /// Shrink the picture inside a black frame this many pixels wide.
    Border { pixels: u32 },
    /// Rotate about the centre (bilinear), keeping the size; corners go black.
    Rotate { degrees: f32 },
    /// A date stamp in the bottom-right corner.
    Caption,
    /// Rotate the hue by this many degrees and boost saturation by half.
    HueShift { degrees: f32 },
}

/// The mild edits, one of each kind and strength.
pub const MILD_EDITS: &[Edit] = &[
    Edit::Jpeg { quality: 75 },
    Edit::Jpeg { quality: 50 },
    Edit::Jpeg { quality: 30 },
    Edit::Resize { percent: 50 },
    Edit::Resize { percent: 80 },
    Edit::Crop {
        removed_percent: 10,
    },
    Edit::Crop {
        removed_percent: 25,
    },
    Edit::Brightness { percent: 20 },
    Edit::Brightness { percent: -20 },
    Edit::Contrast { percent: 20 },
    Edit::Contrast { percent: -20 },
    Edit::Border { pixels: 16 },
    Edit::Rotate { degrees: 3.0 },
    Edit::Rotate { degrees: -5.0 },
    Edit::Caption,
];

/// The strong edits.
pub const STRONG_EDITS: &[Edit] = &[
    Edit::Crop {
        removed_percent: 40,
    },
    Edit::Crop {
        removed_percent: 50,
    },
    Edit::Rotate { degrees: 10.0 },
    Edit::Rotate { degrees: -15.0 },
    Edit::HueShift { degrees: 90.0 },
    Edit::HueShift { degrees: 180.0 },
];

impl Edit {
    pub fn severity(&self) -> Severity {
        if MILD_EDITS.contains(self) {
            Severity::Mild
        } else {
            Severity::Strong
        }
    }

    /// A short name, also usable in file names.
    pub fn name(&self) -> String {
        match *self {
            Edit::Jpeg { quality } => format!("jpeg{quality}"),
            Edit::Resize { percent } => format!("resize{percent}"),
            Edit::Crop { removed_percent } => format!("crop{removed_percent}"),
            Edit::Brightness { percent } => format!("brightness{percent:+}"),
            Edit::Contrast { percent } => format!("contrast{percent:+}"),
            Edit::Border { pixels } => format!("border{pixels}"),
            Edit::Rotate { degrees } => format!("rotate{degrees:+}"),
            Edit::Caption => "caption".into(),
            Edit::HueShift { degrees } => format!("hue{degrees}"),
        }
    }

    /// The edited copy; `rgb` is left untouched.
    pub fn apply(&self, rgb: &RgbImage) -> Result<RgbImage, EngineError> {
        let (width, height) = rgb.dimensions();
        if width < 8 || height < 8 {
            return Err(EngineError::InvalidArgument(format!(
                "image of {width}x{height} is too small to edit"
            )));
        }
        Ok(match *self {
            Edit::Jpeg { quality } => recompress(rgb, quality)?,
            Edit::Resize { percent } => image::imageops::resize(
                rgb,
                scaled(width, percent as f32 / 100.0),
                scaled(height, percent as f32 / 100.0),
                FilterType::CatmullRom,
            ),
            Edit::Crop { removed_percent } => {
                let side_scale = (1.0 - removed_percent as f32 / 100.0).sqrt();
                let (w, h) = (scaled(width, side_scale), scaled(height, side_scale));
                // Off-centre, as real crops usually are.
                let (x, y) = ((width - w) / 4, (height - h) * 3 / 4);
                image::imageops::crop_imm(rgb, x, y, w, h).to_image()
            }
            Edit::Brightness { percent } => {
                let shift = 255.0 * percent as f32 / 100.0;
                map_channels(rgb, |v| v + shift)
            }
            Edit::Contrast { percent } => {
                let gain = 1.0 + percent as f32 / 100.0;
                map_channels(rgb, |v| 127.5 + (v - 127.5) * gain)
            }
            Edit::Border { pixels } => with_border(rgb, pixels),
            Edit::Rotate { degrees } => rotate(rgb, degrees),
            Edit::Caption => with_caption(rgb, "2008 06 14"),
            Edit::HueShift { degrees } => hue_shift(rgb, degrees),
        })
    }
}

fn scaled(side: u32, factor: f32) -> u32 {
    ((side as f32 * factor).round() as u32).max(1)
}

fn recompress(rgb: &RgbImage, quality: u8) -> Result<RgbImage, EngineError> {
    let mut bytes = Vec::new();
    JpegEncoder::new_with_quality(&mut Cursor::new(&mut bytes), quality)
        .encode_image(rgb)
        .map_err(|e| EngineError::InvalidArgument(format!("jpeg re-encoding: {e}")))?;
    image::load_from_memory_with_format(&bytes, image::ImageFormat::Jpeg)
        .map(|decoded| decoded.to_rgb8())
        .map_err(|e| EngineError::InvalidArgument(format!("jpeg re-decoding: {e}")))
}

fn map_channels(rgb: &RgbImage, f: impl Fn(f32) -> f32) -> RgbImage {
    let mut out = rgb.clone();
    for value in out.iter_mut() {
        *value = f(f32::from(*value)).round().clamp(0.0, 255.0) as u8;
    }
    out
}

fn with_border(rgb: &RgbImage, pixels: u32) -> RgbImage {
    let (width, height) = rgb.dimensions();
    let pixels = pixels.min(width / 4).min(height / 4);
    let inner = image::imageops::resize(
        rgb,
        width - 2 * pixels,
        height - 2 * pixels,
        FilterType::CatmullRom,
    );
    let mut out = RgbImage::new(width, height);
    image::imageops::replace(&mut out, &inner, i64::from(pixels), i64::from(pixels));
    out
}

/// Bilinear sample at a real position; `None` outside the image.
fn sample_bilinear(rgb: &RgbImage, x: f32, y: f32) -> Option<[f32; 3]> {
    let (width, height) = rgb.dimensions();
    if x < 0.0 || y < 0.0 || x > (width - 1) as f32 || y > (height - 1) as f32 {
        return None;
    }
    let (x0, y0) = (x.floor() as u32, y.floor() as u32);
    let (x1, y1) = ((x0 + 1).min(width - 1), (y0 + 1).min(height - 1));
    let (fx, fy) = (x - x0 as f32, y - y0 as f32);
    let mut out = [0.0; 3];
    for (c, value) in out.iter_mut().enumerate() {
        let at = |xx: u32, yy: u32| f32::from(rgb.get_pixel(xx, yy)[c]);
        let top = at(x0, y0) * (1.0 - fx) + at(x1, y0) * fx;
        let bottom = at(x0, y1) * (1.0 - fx) + at(x1, y1) * fx;
        *value = top * (1.0 - fy) + bottom * fy;
    }
    Some(out)
}

fn rotate(rgb: &RgbImage, degrees: f32) -> RgbImage {
    let (width, height) = rgb.dimensions();
    let (sin, cos) = degrees.to_radians().sin_cos();
    let (cx, cy) = ((width - 1) as f32 / 2.0, (height - 1) as f32 / 2.0);
    RgbImage::from_fn(width, height, |x, y| {
        let (dx, dy) = (x as f32 - cx, y as f32 - cy);
        // Inverse mapping: where this output pixel comes from.
        let (sx, sy) = (cx + cos * dx + sin * dy, cy - sin * dx + cos * dy);
        sample_bilinear(rgb, sx, sy).map_or(Rgb([0, 0, 0]), |v| {
            Rgb(v.map(|c| c.round().clamp(0.0, 255.0) as u8))
        })
    })
}

/// 3x5 bitmaps of the digits, rows top to bottom, 3 bits per row.
const DIGITS: [[u8; 5]; 10] = [
    [7, 5, 5, 5, 7],
    [2, 6, 2, 2, 7],
    [7, 1, 7, 4, 7],
    [7, 1, 7, 1, 7],
    [5, 5, 7, 1, 1],
    [7, 4, 7, 1, 7],
    [7, 4, 7, 5, 7],
    [7, 1, 1, 1, 1],
    [7, 5, 7, 5, 7],
    [7, 5, 7, 1, 7],
];

/// Draws `text` (digits and spaces) in yellow with a dark shadow, glyphs
/// about 4 % of the image height, in the bottom-right corner.
fn with_caption(rgb: &RgbImage, text: &str) -> RgbImage {
    let mut out = rgb.clone();
    let (width, height) = out.dimensions();
    let cell = (height / 100).max(1);
    let advance = 4 * cell;
    let text_width = advance * text.len() as u32;
    let left = width.saturating_sub(text_width + 4 * cell);
    let top = height.saturating_sub(9 * cell);
    let mut fill = |x0: u32, y0: u32, colour: Rgb<u8>| {
        for y in y0..(y0 + cell).min(height) {
            for x in x0..(x0 + cell).min(width) {
                out.put_pixel(x, y, colour);
            }
        }
    };
    for (offset, colour) in [(1, Rgb([20, 20, 20])), (0, Rgb([255, 210, 40]))] {
        for (index, glyph) in text.chars().enumerate() {
            let Some(bits) = glyph.to_digit(10).map(|d| DIGITS[d as usize]) else {
                continue;
            };
            for (row, pattern) in bits.iter().enumerate() {
                for col in 0..3u32 {
                    if pattern & (4 >> col) != 0 {
                        let x = left + index as u32 * advance + (col + offset) * cell;
                        let y = top + (row as u32 + offset) * cell;
                        fill(x, y, colour);
                    }
                }
            }
        }
    }
    out
}

/// Hue rotation in the YIQ plane (luma kept), chroma scaled by 1.5.
fn hue_shift(rgb: &RgbImage, degrees: f32) -> RgbImage {
    let (sin, cos) = degrees.to_radians().sin_cos();
    let mut out = rgb.clone();
    for pixel in out.pixels_mut() {
        let [r, g, b] = pixel.0.map(f32::from);
        let y = 0.299 * r + 0.587 * g + 0.114 * b;
        let i = 0.596 * r - 0.274 * g - 0.322 * b;
        let q = 0.211 * r - 0.523 * g + 0.312 * b;
        let (i2, q2) = (1.5 * (cos * i - sin * q), 1.5 * (sin * i + cos * q));
        let back = [
            y + 0.956 * i2 + 0.621 * q2,
            y - 0.272 * i2 - 0.647 * q2,
            y - 1.106 * i2 + 1.703 * q2,
        ];
        pixel.0 = back.map(|v| v.round().clamp(0.0, 255.0) as u8);
    }
    out
}

/// What to sample and where to look.
#[derive(Clone, Debug)]
pub struct CalibrationOptions {
    /// Originals to edit (fewer if the collection is smaller).
    pub sample: usize,
    pub seed: u64,
    /// The recommended threshold is the one with the best recall among
    /// those reaching this precision on the sample.
    pub target_precision: f64,
    /// Thresholds to report, ascending.
    pub thresholds: Vec<f32>,
}

impl Default for CalibrationOptions {
    fn default() -> Self {
        Self {
            sample: 50,
            seed: 0,
            target_precision: 0.99,
            thresholds: (10..=39).map(|step| step as f32 * 0.025).collect(),
        }
    }
}

/// Similarities of one edit's copies to their originals.
#[derive(Clone, Debug, Serialize)]
pub struct EditSummary {
    pub edit: String,
    pub severity: Severity,
    pub copies: usize,
    pub min_similarity: f32,
    pub mean_similarity: f32,
}

/// One row of the trade-off table. Precision counts mild copies against
/// negatives; strong copies only get a recall.
#[derive(Clone, Debug, Serialize)]
pub struct ThresholdPoint {
    pub threshold: f32,
    pub precision: f64,
    pub recall_mild: f64,
    pub recall_strong: f64,
    pub false_positives: usize,
    /// Of the copies people confirmed (see [`CalibrationReport::decided_copies`]),
    /// the share at or above the threshold; `None` without such decisions.
    pub recall_decided: Option<f64>,
}

#[derive(Clone, Debug, Serialize)]
pub struct CalibrationReport {
    pub originals: usize,
    /// Sampled files that could not be read or decoded (skipped).
    pub unreadable: usize,
    pub mild_copies: usize,
    pub strong_copies: usize,
    pub negatives: usize,
    /// The highest similarity of any sampled original to its nearest distinct image.
    pub max_negative_similarity: f32,
    /// Copies people confirmed by dropping an image: each dropped image
    /// paired with its nearest image that was not dropped. Their recall is
    /// given per threshold.
    pub decided_copies: usize,
    /// Pairs people decided are not copies; they count as negatives, beside
    /// the nearest distinct images of the sample.
    pub decided_not_copies: usize,
    pub edits: Vec<EditSummary>,
    pub points: Vec<ThresholdPoint>,
    /// `None` when no threshold reaches the target precision.
    pub recommended_threshold: Option<f32>,
    pub rule: String,
}

/// Similarities of a set of copies (positives) and of distinct images
/// (negatives), from which the threshold table is built.
#[derive(Clone, Debug, Default)]
pub struct SimilaritySample {
    /// `(edit, similarity of the copy to its original)`.
    pub positives: Vec<(Edit, f32)>,
    pub negatives: Vec<f32>,
    /// Similarities of the pairs people confirmed as copies.
    pub decided_copies: Vec<f32>,
    /// Similarities of the pairs people decided are not copies (also in `negatives`).
    pub decided_not_copies: Vec<f32>,
}

impl SimilaritySample {
    /// The trade-off table and the recommendation of `options`.
    pub fn report(&self, options: &CalibrationOptions) -> CalibrationReport {
        let mild: Vec<f32> = self.similarities_of(Severity::Mild);
        let strong: Vec<f32> = self.similarities_of(Severity::Strong);
        let share_at_or_above = |values: &[f32], t: f32| values.iter().filter(|&&v| v >= t).count();
        let recall = |values: &[f32], t: f32| {
            if values.is_empty() {
                0.0
            } else {
                share_at_or_above(values, t) as f64 / values.len() as f64
            }
        };
        let points: Vec<ThresholdPoint> = options
            .thresholds
            .iter()
            .map(|&threshold| {
                let hits = share_at_or_above(&mild, threshold);
                let false_positives = share_at_or_above(&self.negatives, threshold);
                ThresholdPoint {
                    threshold,
                    precision: if hits + false_positives == 0 {
                        1.0
                    } else {
                        hits as f64 / (hits + false_positives) as f64
                    },
                    recall_mild: recall(&mild, threshold),
                    recall_strong: recall(&strong, threshold),
                    false_positives,
                    recall_decided: (!self.decided_copies.is_empty())
                        .then(|| recall(&self.decided_copies, threshold)),
                }
            })
            .collect();
        // Best mild recall at the target precision; among equals the higher
        // threshold, which leaves more margin against unseen distinct pairs.
        let recommended_threshold = points
            .iter()
            .filter(|p| p.precision >= options.target_precision && p.recall_mild > 0.0)
            .max_by(|a, b| {
                a.recall_mild
                    .total_cmp(&b.recall_mild)
                    .then(a.threshold.total_cmp(&b.threshold))
            })
            .map(|p| p.threshold);
        let mut edits: Vec<EditSummary> = Vec::new();
        for edit in MILD_EDITS.iter().chain(STRONG_EDITS) {
            let values: Vec<f32> = self
                .positives
                .iter()
                .filter(|(e, _)| e == edit)
                .map(|&(_, s)| s)
                .collect();
            if values.is_empty() {
                continue;
            }
            edits.push(EditSummary {
                edit: edit.name(),
                severity: edit.severity(),
                copies: values.len(),
                min_similarity: values.iter().copied().fold(f32::INFINITY, f32::min),
                mean_similarity: values.iter().sum::<f32>() / values.len() as f32,
            });
        }
        CalibrationReport {
            originals: 0,
            unreadable: 0,
            mild_copies: mild.len(),
            strong_copies: strong.len(),
            negatives: self.negatives.len(),
            max_negative_similarity: self
                .negatives
                .iter()
                .copied()
                .fold(f32::NEG_INFINITY, f32::max),
            decided_copies: self.decided_copies.len(),
            decided_not_copies: self.decided_not_copies.len(),
            edits,
            points,
            recommended_threshold,
            rule: format!(
                "the threshold of the grid with the highest recall of mild copies among those \
                 whose precision (mild copies against nearest distinct images) is at least {}; \
                 ties go to the higher threshold",
                options.target_precision
            ),
        }
    }

    fn similarities_of(&self, severity: Severity) -> Vec<f32> {
        self.positives
            .iter()
            .filter(|(edit, _)| edit.severity() == severity)
            .map(|&(_, s)| s)
            .collect()
    }
}

/// Edits a sample of the collection in memory, embeds the copies, and
/// reports the threshold trade-off (see the module documentation).
pub fn calibrate(
    store: &Store,
    catalog: &Catalog,
    encoder: &Encoder,
    options: &CalibrationOptions,
    progress: &dyn Progress,
) -> Result<CalibrationReport, EngineError> {
    let loaded = fingerprint_of(encoder);
    if store.fingerprint() != &loaded {
        return Err(EngineError::ModelNotCollectionModel {
            stored: store.fingerprint().to_string(),
            loaded: loaded.to_string(),
        });
    }
    if catalog.len() < 2 {
        return Err(EngineError::InvalidArgument(
            "calibration needs a collection of at least two images".into(),
        ));
    }
    let mut rng = ChaCha8Rng::seed_from_u64(options.seed);
    let mut rows =
        sample_indices(&mut rng, catalog.len(), options.sample.min(catalog.len())).into_vec();
    rows.sort_unstable();

    let mut sample = SimilaritySample::default();
    let mut unreadable = 0;
    let preprocess_spec = &encoder.spec().preprocess;
    progress.begin("images edited and embedded", rows.len() as u64);
    for &row in &rows {
        progress.advance(1);
        let Some(path) = catalog.absolute_path(catalog.ids[row]) else {
            unreadable += 1;
            continue;
        };
        let original = match decode_path(&path, &DecodeOptions::default()) {
            Ok(decoded) => decoded.rgb,
            Err(error) => {
                tracing::warn!(path = %path.display(), %error, "skipped in calibration");
                unreadable += 1;
                continue;
            }
        };
        let edits: Vec<Edit> = MILD_EDITS.iter().chain(STRONG_EDITS).copied().collect();
        let prepared = edits
            .par_iter()
            .map(|edit| Ok(preprocess(&edit.apply(&original)?, preprocess_spec)?))
            .collect::<Result<Vec<_>, EngineError>>()?;
        let embeddings = encoder.embed(&prepared)?;
        let stored = catalog.embedding_at(row);
        sample.positives.extend(
            edits
                .iter()
                .zip(&embeddings)
                .map(|(edit, embedding)| (*edit, dot(stored, embedding))),
        );
        if let Some(similarity) = nearest_distinct_similarity(store, catalog, row)? {
            sample.negatives.push(similarity);
        }
    }
    progress.finish();
    add_decided_pairs(store, catalog, &mut sample)?;
    let mut report = sample.report(options);
    report.originals = rows.len() - unreadable;
    report.unreadable = unreadable;
    Ok(report)
}

/// The pairs people labelled through their decisions: a pair decided not
/// to be copies is a negative; a dropped image and its nearest image that was
/// not dropped are a copy.
fn add_decided_pairs(
    store: &Store,
    catalog: &Catalog,
    sample: &mut SimilaritySample,
) -> Result<(), EngineError> {
    let decisions = DecisionState::load(store, catalog)?;
    let row_of_content: HashMap<[u8; 32], usize> = (0..catalog.len())
        .map(|row| (catalog.records[row].content_hash, row))
        .collect();
    for (first, second) in decisions.distinct_pairs() {
        if let (Some(&a), Some(&b)) = (row_of_content.get(&first), row_of_content.get(&second)) {
            let similarity = catalog.similarity(a, b);
            sample.decided_not_copies.push(similarity);
            sample.negatives.push(similarity);
        }
    }
    for row in 0..catalog.len() {
        if decisions.fate(catalog.ids[row]) != Some(Fate::Drop) {
            continue;
        }
        let hits = store.search(catalog.embedding_at(row), NEGATIVE_SEARCH_DEPTH, None)?;
        let nearest_kept = hits.into_iter().find_map(|(id, similarity)| {
            let other = catalog.row(id)?;
            (other != row && decisions.fate(id) != Some(Fate::Drop)).then_some(similarity)
        });
        sample.decided_copies.extend(nearest_kept);
    }
    Ok(())
}

/// Neighbours looked at when the nearest ones are copies of the image itself.
const NEGATIVE_SEARCH_DEPTH: usize = 20;

/// Similarity of `row` to its nearest image that is neither itself nor an
/// exact copy (same bytes or same pixels).
fn nearest_distinct_similarity(
    store: &Store,
    catalog: &Catalog,
    row: usize,
) -> Result<Option<f32>, EngineError> {
    let record = &catalog.records[row];
    let hits = store.search(catalog.embedding_at(row), NEGATIVE_SEARCH_DEPTH, None)?;
    Ok(hits.into_iter().find_map(|(id, similarity)| {
        let other = catalog.row(id)?;
        let exact_copy = catalog.records[other].content_hash == record.content_hash
            || catalog.records[other].pixel_hash == record.pixel_hash;
        (other != row && !exact_copy).then_some(similarity)
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn checkerboard(width: u32, height: u32) -> RgbImage {
        RgbImage::from_fn(width, height, |x, y| {
            if (x / 8 + y / 8) % 2 == 0 {
                Rgb([200, 40, 40])
            } else {
                Rgb([30, 30, 220])
            }
        })
    }

    #[test]
    fn edits_change_pixels_and_keep_expected_sizes() {
        let original = checkerboard(200, 100);
        for edit in MILD_EDITS.iter().chain(STRONG_EDITS) {
            let edited = edit.apply(&original).unwrap();
            assert_ne!(edited, original, "{} left the image unchanged", edit.name());
            let expected = match *edit {
                Edit::Resize { percent } => (2 * percent, percent),
                // Surface removed is the crop's definition in Copydays.
                Edit::Crop { removed_percent } => {
                    let side = (1.0 - removed_percent as f32 / 100.0).sqrt();
                    (scaled(200, side), scaled(100, side))
                }
                _ => (200, 100),
            };
            assert_eq!(edited.dimensions(), expected, "{}", edit.name());
        }
    }

    #[test]
    fn rotation_by_zero_is_identity_and_hue_by_zero_only_scales_chroma() {
        let original = checkerboard(64, 48);
        assert_eq!(rotate(&original, 0.0), original);
        let grey = RgbImage::from_pixel(4, 4, Rgb([90, 90, 90]));
        // Grey has no chroma: any hue rotation leaves it grey.
        assert!(hue_shift(&grey, 90.0)
            .pixels()
            .all(|p| p.0.iter().all(|&c| c.abs_diff(90) <= 1)));
    }

    #[test]
    fn tiny_images_are_refused_not_panicked_on() {
        let tiny = RgbImage::new(3, 3);
        assert!(Edit::Crop {
            removed_percent: 50
        }
        .apply(&tiny)
        .is_err());
    }

    #[test]
    fn recommendation_takes_best_recall_at_target_precision() {
        // Positives spread from 0.70 to 0.98, negatives at 0.50 and 0.80.
        let positives = (0..15)
            .map(|i| (MILD_EDITS[i], 0.70 + 0.02 * i as f32))
            .collect();
        let sample = SimilaritySample {
            positives,
            negatives: vec![0.5, 0.8],
            ..SimilaritySample::default()
        };
        let options = CalibrationOptions {
            target_precision: 1.0,
            thresholds: vec![0.6, 0.75, 0.85, 0.95],
            ..CalibrationOptions::default()
        };
        let report = sample.report(&options);
        // 0.6 and 0.75 let the 0.80 negative through; 0.85 is the lowest clean one.
        assert_eq!(report.recommended_threshold, Some(0.85));
        assert_eq!(report.points[0].false_positives, 1);
        assert_eq!(report.max_negative_similarity, 0.8);
        assert_eq!(report.points[0].recall_decided, None);
    }

    #[test]
    fn copies_people_confirmed_get_a_recall_per_threshold() {
        let sample = SimilaritySample {
            positives: vec![(MILD_EDITS[0], 0.97)],
            negatives: vec![0.5],
            decided_copies: vec![0.96, 0.91, 0.72, 0.88],
            decided_not_copies: Vec::new(),
        };
        let options = CalibrationOptions {
            thresholds: vec![0.7, 0.9],
            ..CalibrationOptions::default()
        };
        let report = sample.report(&options);
        assert_eq!(report.decided_copies, 4);
        assert_eq!(report.points[0].recall_decided, Some(1.0));
        assert_eq!(report.points[1].recall_decided, Some(0.5));
    }
}
