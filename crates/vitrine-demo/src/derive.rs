//! Encoding and the edits that turn one stored photo into a planted copy of it.

use anyhow::{Context, Result};
use image::codecs::jpeg::JpegEncoder;
use image::codecs::png::{CompressionType, FilterType, PngEncoder};
use image::imageops::{self, FilterType as ResizeFilter};
use image::{ImageEncoder, Rgb, RgbImage};

/// Quality of ordinary catalogue photos.
pub const CATALOGUE_JPEG_QUALITY: u8 = 85;

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    Jpeg,
    Png,
}

impl Format {
    pub fn extension(self) -> &'static str {
        match self {
            Format::Jpeg => "jpg",
            Format::Png => "png",
        }
    }
}

pub fn encode_jpeg(image: &RgbImage, quality: u8) -> Result<Vec<u8>> {
    let mut bytes = Vec::new();
    JpegEncoder::new_with_quality(&mut bytes, quality)
        .write_image(
            image.as_raw(),
            image.width(),
            image.height(),
            image::ExtendedColorType::Rgb8,
        )
        .context("encoding jpeg")?;
    Ok(bytes)
}

/// The two PNG settings used for pixel-identical pairs: same pixels, different byte streams.
///
/// Both compress with the `png` crate's own fdeflate path: its zlib levels go through flate2,
/// whose backend (miniz_oxide or zlib-rs) depends on which features other crates of the
/// build enable, and the backends write different bytes.
#[derive(Clone, Copy)]
pub enum PngSettings {
    AdaptiveFilter,
    PaethFilter,
}

pub fn encode_png(image: &RgbImage, settings: PngSettings) -> Result<Vec<u8>> {
    let (compression, filter) = match settings {
        PngSettings::AdaptiveFilter => (CompressionType::Fast, FilterType::Adaptive),
        PngSettings::PaethFilter => (CompressionType::Fast, FilterType::Paeth),
    };
    let mut bytes = Vec::new();
    PngEncoder::new_with_quality(&mut bytes, compression, filter)
        .write_image(
            image.as_raw(),
            image.width(),
            image.height(),
            image::ExtendedColorType::Rgb8,
        )
        .context("encoding png")?;
    Ok(bytes)
}

pub fn encode(image: &RgbImage, format: Format) -> Result<Vec<u8>> {
    match format {
        Format::Jpeg => encode_jpeg(image, CATALOGUE_JPEG_QUALITY),
        Format::Png => encode_png(image, PngSettings::AdaptiveFilter),
    }
}

/// How a planted file was made from its original.
#[derive(Clone, Copy, Debug)]
pub enum Derivation {
    /// Byte-identical copy.
    ExactCopy,
    /// Decoded and saved again as JPEG at this quality.
    JpegReencode { quality: u8 },
    /// Both sides scaled to this percentage.
    Resize { percent: u32 },
    /// Percentages cut off each side.
    Crop {
        left: u32,
        top: u32,
        right: u32,
        bottom: u32,
    },
    /// Every channel multiplied by 1 + percent / 100.
    Brighten { percent: u32 },
    /// A solid frame of this many pixels added around the picture.
    Border { pixels: u32 },
}

impl Derivation {
    pub fn kind(self) -> &'static str {
        match self {
            Derivation::ExactCopy => "exact-copy",
            Derivation::JpegReencode { .. } => "jpeg-reencode",
            Derivation::Resize { .. } => "resize",
            Derivation::Crop { .. } => "crop",
            Derivation::Brighten { .. } => "brighten",
            Derivation::Border { .. } => "border",
        }
    }

    pub fn detail(self) -> String {
        match self {
            Derivation::ExactCopy => "byte-identical copy".to_owned(),
            Derivation::JpegReencode { quality } => {
                format!("saved again as JPEG quality {quality}")
            }
            Derivation::Resize { percent } => format!("scaled to {percent}% of width and height"),
            Derivation::Crop {
                left,
                top,
                right,
                bottom,
            } => {
                let sides: Vec<String> = [
                    ("left", left),
                    ("top", top),
                    ("right", right),
                    ("bottom", bottom),
                ]
                .into_iter()
                .filter(|(_, percent)| *percent > 0)
                .map(|(side, percent)| format!("{percent}% off the {side}"))
                .collect();
                sides.join(", ")
            }
            Derivation::Brighten { percent } => format!("brightness +{percent}%"),
            Derivation::Border { pixels } => format!("solid {pixels} px frame added"),
        }
    }

    /// The derived file's bytes and its format, given the original's bytes and format.
    pub fn apply(self, original: &[u8], format: Format) -> Result<(Vec<u8>, Format)> {
        let decode = || -> Result<RgbImage> {
            Ok(image::load_from_memory(original)
                .context("decoding the original of a planted copy")?
                .to_rgb8())
        };
        let edited = match self {
            Derivation::ExactCopy => return Ok((original.to_vec(), format)),
            Derivation::JpegReencode { quality } => {
                return Ok((encode_jpeg(&decode()?, quality)?, Format::Jpeg));
            }
            Derivation::Resize { percent } => {
                let image = decode()?;
                let (width, height) = image.dimensions();
                imageops::resize(
                    &image,
                    width * percent / 100,
                    height * percent / 100,
                    ResizeFilter::Triangle,
                )
            }
            Derivation::Crop {
                left,
                top,
                right,
                bottom,
            } => {
                let image = decode()?;
                let (width, height) = image.dimensions();
                let x = width * left / 100;
                let y = height * top / 100;
                let kept_width = width - x - width * right / 100;
                let kept_height = height - y - height * bottom / 100;
                imageops::crop_imm(&image, x, y, kept_width, kept_height).to_image()
            }
            Derivation::Brighten { percent } => {
                let image = decode()?;
                let (width, height) = image.dimensions();
                let factor = 1.0 + percent as f32 / 100.0;
                RgbImage::from_fn(width, height, |x, y| {
                    let Rgb(channels) = *image.get_pixel(x, y);
                    Rgb(channels.map(|c| (c as f32 * factor).round().min(255.0) as u8))
                })
            }
            Derivation::Border { pixels } => {
                let image = decode()?;
                let (width, height) = image.dimensions();
                let mut framed = RgbImage::from_pixel(
                    width + 2 * pixels,
                    height + 2 * pixels,
                    Rgb([246, 244, 238]),
                );
                imageops::replace(&mut framed, &image, pixels.into(), pixels.into());
                framed
            }
        };
        Ok((encode_jpeg(&edited, CATALOGUE_JPEG_QUALITY)?, Format::Jpeg))
    }
}
