//! Bytes to 8-bit RGB pixels.
//!
//! The format is recognised from the content (magic bytes), never from the
//! file name. EXIF orientation is applied, transparency is composited over
//! white, and every colour type (grey, 16-bit, CMYK JPEG, palette) ends up as
//! 8-bit RGB. Sizes are checked from the header before any pixel buffer is
//! allocated, so a decompression bomb costs a header read.

use std::fs::File;
use std::io::{BufReader, Cursor, Read};
use std::path::Path;

use image::metadata::Orientation;
use image::{DynamicImage, ImageDecoder, ImageError, ImageFormat, ImageReader, Limits, RgbImage};
use serde::{Deserialize, Serialize};

use crate::ImagingError;

/// Bytes per pixel of the widest layout a decoder may produce (16-bit RGBA);
/// used to size the decoder's allocation budget from the pixel limit.
const WIDEST_PIXEL_BYTES: u64 = 8;
/// The reduced-scale path is taken only from this DCT reduction on. Its
/// decoder (`jpeg-decoder`) spends most of its time in entropy decoding, which
/// no scale saves, and is slower at it than the full-size decoder
/// (`zune-jpeg`): in examples/decode_bench.rs a 1/2 decode of a 4 MP JPEG
/// took longer than a full decode, while 1/4 of a 12 MP one was clearly
/// faster end to end.
const MIN_WORTHWHILE_REDUCTION: u8 = 4;
/// Headroom for decoder state beyond the output buffer (tables, line buffers).
const DECODER_OVERHEAD_BYTES: u64 = 64 << 20;

/// Limits and hints for decoding.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct DecodeOptions {
    /// Images with more pixels than this are rejected from their header.
    pub max_pixels: u64,
    /// Files larger than this are rejected before they are read.
    pub max_file_bytes: u64,
    /// The shorter side the caller will resize to. When set, JPEGs at least
    /// 8x larger than it on the shorter side are decoded at a reduced DCT
    /// scale of 1/4 or 1/8 (see [`dct_reduction`]; 1/2 is not worth it).
    pub target_shorter_side: Option<u32>,
}

impl Default for DecodeOptions {
    fn default() -> Self {
        Self {
            max_pixels: 100_000_000,
            max_file_bytes: 256 << 20,
            target_shorter_side: None,
        }
    }
}

/// The image formats we decode.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ImageFormatKind {
    Jpeg,
    Png,
    WebP,
    Gif,
    Bmp,
    Tiff,
}

impl ImageFormatKind {
    fn from_image_format(format: ImageFormat) -> Result<Self, ImagingError> {
        Ok(match format {
            ImageFormat::Jpeg => Self::Jpeg,
            ImageFormat::Png => Self::Png,
            ImageFormat::WebP => Self::WebP,
            ImageFormat::Gif => Self::Gif,
            ImageFormat::Bmp => Self::Bmp,
            ImageFormat::Tiff => Self::Tiff,
            other => {
                return Err(ImagingError::Unsupported(
                    format!("{other:?}").to_lowercase(),
                ))
            }
        })
    }
}

/// A decoded image, upright and in 8-bit RGB.
#[derive(Clone, Debug)]
pub struct DecodedImage {
    pub rgb: RgbImage,
    /// Full-resolution size after EXIF orientation, whatever `reduced_scale` is.
    pub original_width: u32,
    pub original_height: u32,
    pub format: ImageFormatKind,
    /// 1, 2, 4 or 8: the JPEG DCT reduction applied while decoding.
    pub reduced_scale: u8,
}

/// Reads and decodes an image file. The file is opened read-only.
pub fn decode_path(path: &Path, opts: &DecodeOptions) -> Result<DecodedImage, ImagingError> {
    let bytes = read_file(path, opts.max_file_bytes)?;
    decode_bytes(&bytes, opts)
}

/// Decodes an in-memory image.
pub fn decode_bytes(bytes: &[u8], opts: &DecodeOptions) -> Result<DecodedImage, ImagingError> {
    if bytes.is_empty() {
        return Err(ImagingError::EmptyFile);
    }
    check_file_size(bytes.len() as u64, opts.max_file_bytes)?;
    let image_format = image::guess_format(bytes).map_err(|_| ImagingError::NotAnImage)?;
    let format = ImageFormatKind::from_image_format(image_format)?;
    if format == ImageFormatKind::Jpeg && jpeg_ends_early(bytes) {
        // Both JPEG decoders silently fill a cut-off image with grey.
        return Err(ImagingError::Truncated(
            "jpeg data ends before its end-of-image marker".into(),
        ));
    }

    if let (ImageFormatKind::Jpeg, Some(target)) = (format, opts.target_shorter_side) {
        if let Some(decoded) = decode_jpeg_reduced(bytes, opts, target)? {
            return Ok(decoded);
        }
    }

    let mut reader = ImageReader::with_format(Cursor::new(bytes), image_format);
    reader.limits(decoder_limits(opts));
    let mut decoder = reader
        .into_decoder()
        .map_err(|err| classify_image_error(err, None))?;
    let (width, height) = decoder.dimensions();
    check_pixels(width, height, opts.max_pixels)?;
    // A damaged EXIF block should not cost us the pixels.
    let orientation = decoder.orientation().unwrap_or(Orientation::NoTransforms);
    let mut image = DynamicImage::from_decoder(decoder)
        .map_err(|err| classify_image_error(err, Some((width, height, opts.max_pixels))))?;
    image.apply_orientation(orientation);
    let (original_width, original_height) = (image.width(), image.height());
    Ok(DecodedImage {
        rgb: into_rgb_over_white(image),
        original_width,
        original_height,
        format,
        reduced_scale: 1,
    })
}

/// Width and height after EXIF orientation, from the header only (no pixel
/// data is decoded).
pub fn read_dimensions(path: &Path) -> Result<(u32, u32), ImagingError> {
    let io_error = |cause| ImagingError::Io {
        path: path.to_path_buf(),
        cause,
    };
    let file = File::open(path).map_err(io_error)?;
    if file.metadata().map_err(io_error)?.len() == 0 {
        return Err(ImagingError::EmptyFile);
    }
    let reader = ImageReader::new(BufReader::new(file))
        .with_guessed_format()
        .map_err(io_error)?;
    let format = reader.format().ok_or(ImagingError::NotAnImage)?;
    ImageFormatKind::from_image_format(format)?;
    let mut decoder = reader
        .into_decoder()
        .map_err(|err| classify_image_error(err, None))?;
    let (width, height) = decoder.dimensions();
    let orientation = decoder.orientation().unwrap_or(Orientation::NoTransforms);
    Ok(if swaps_axes(orientation) {
        (height, width)
    } else {
        (width, height)
    })
}

/// The DCT reduction (8, 4 or 2) to decode a JPEG whose shorter side is
/// `shorter_side` for a later resize to `target_shorter_side`, if any.
///
/// Rule: the strongest reduction whose reduced shorter side (rounded up, as
/// the JPEG decoder does) is still at least twice the target. Keeping a 2x
/// margin means the antialiased resize that follows still does real
/// filtering over several source pixels, so the result stays close to a
/// full decode followed by the same resize.
pub fn dct_reduction(shorter_side: u32, target_shorter_side: u32) -> Option<u8> {
    let needed = u64::from(target_shorter_side) * 2;
    [8u8, 4, 2]
        .into_iter()
        .find(|&r| u64::from(shorter_side.div_ceil(u32::from(r))) >= needed)
}

fn read_file(path: &Path, max_file_bytes: u64) -> Result<Vec<u8>, ImagingError> {
    let io_error = |cause| ImagingError::Io {
        path: path.to_path_buf(),
        cause,
    };
    // File::open opens read-only; nothing here ever writes to user files.
    let file = File::open(path).map_err(io_error)?;
    let len = file.metadata().map_err(io_error)?.len();
    check_file_size(len, max_file_bytes)?;
    let mut bytes = Vec::with_capacity(usize::try_from(len).unwrap_or(0));
    // `take` guards against a file that grows while we read it.
    file.take(max_file_bytes.saturating_add(1))
        .read_to_end(&mut bytes)
        .map_err(io_error)?;
    check_file_size(bytes.len() as u64, max_file_bytes)?;
    Ok(bytes)
}

fn check_file_size(bytes: u64, limit: u64) -> Result<(), ImagingError> {
    if bytes > limit {
        return Err(ImagingError::TooLarge { bytes, limit });
    }
    Ok(())
}

fn check_pixels(width: u32, height: u32, limit: u64) -> Result<(), ImagingError> {
    if u64::from(width) * u64::from(height) > limit {
        return Err(ImagingError::TooManyPixels {
            width,
            height,
            limit,
        });
    }
    Ok(())
}

fn decoder_allocation_budget(opts: &DecodeOptions) -> u64 {
    opts.max_pixels
        .saturating_mul(WIDEST_PIXEL_BYTES)
        .saturating_add(DECODER_OVERHEAD_BYTES)
}

fn decoder_limits(opts: &DecodeOptions) -> Limits {
    // Width/height limits are left to `check_pixels`, which reports the
    // dimensions; the allocation cap is a second line of defence.
    let mut limits = Limits::no_limits();
    limits.max_alloc = Some(decoder_allocation_budget(opts));
    limits
}

fn classify_image_error(err: ImageError, known_size: Option<(u32, u32, u64)>) -> ImagingError {
    match err {
        ImageError::IoError(io) if io.kind() == std::io::ErrorKind::UnexpectedEof => {
            ImagingError::Truncated(io.to_string())
        }
        ImageError::Decoding(decoding) => classify_message(decoding.to_string()),
        ImageError::Unsupported(unsupported) => ImagingError::Unsupported(unsupported.to_string()),
        ImageError::Limits(limits) => match known_size {
            Some((width, height, limit)) => ImagingError::TooManyPixels {
                width,
                height,
                limit,
            },
            None => ImagingError::Corrupt(limits.to_string()),
        },
        other => classify_message(other.to_string()),
    }
}

/// Decoders report running out of data in words rather than a distinct error
/// kind; this sorts those messages into `Truncated`.
fn classify_message(message: String) -> ImagingError {
    let lower = message.to_lowercase();
    let truncated = [
        "end of file",
        "eof",
        "truncated",
        "unexpected end",
        "not enough data",
    ]
    .iter()
    .any(|needle| lower.contains(needle));
    if truncated {
        ImagingError::Truncated(message)
    } else {
        ImagingError::Corrupt(message)
    }
}

fn swaps_axes(orientation: Orientation) -> bool {
    matches!(
        orientation,
        Orientation::Rotate90
            | Orientation::Rotate270
            | Orientation::Rotate90FlipH
            | Orientation::Rotate270FlipH
    )
}

/// True when a JPEG stream stops before its end-of-image marker (FF D9).
///
/// Walks the marker segments up to the first scan, then looks for FF D9 after
/// it. Entropy-coded data cannot contain that pair (a data byte FF is always
/// followed by a stuffed 00), and EXIF thumbnails, which end in FF D9 too,
/// sit in segments before the scan. The search runs backwards because an
/// intact file normally ends with the marker.
fn jpeg_ends_early(bytes: &[u8]) -> bool {
    const SOS: u8 = 0xDA;
    const EOI: u8 = 0xD9;
    let mut pos = 2; // after SOI
    let scan_start = loop {
        // Markers may be preceded by any number of FF fill bytes.
        while bytes.get(pos + 1) == Some(&0xFF) && bytes[pos] == 0xFF {
            pos += 1;
        }
        let (Some(&0xFF), Some(&marker)) = (bytes.get(pos), bytes.get(pos + 1)) else {
            // Cut inside the headers, or malformed: a missing byte means cut.
            return bytes.len() <= pos + 1;
        };
        match marker {
            EOI => return false, // an image without a scan; the decoder will say so
            0x01 | 0xD0..=0xD7 => pos += 2, // stand-alone markers have no length
            _ => {
                let Some(length) = bytes.get(pos + 2..pos + 4) else {
                    return true;
                };
                let segment_end = pos + 2 + usize::from(u16::from_be_bytes([length[0], length[1]]));
                if marker == SOS {
                    break segment_end;
                }
                pos = segment_end;
            }
        }
    };
    !bytes
        .get(scan_start..)
        .unwrap_or_default()
        .windows(2)
        .rev()
        .any(|pair| pair == [0xFF, EOI])
}

/// Decodes a JPEG at a reduced DCT scale with `jpeg-decoder`. Returns `None`
/// when no worthwhile reduction applies (see [`MIN_WORTHWHILE_REDUCTION`]) or
/// the file uses a coding the reduced path does not handle, so the caller
/// falls back to a full decode.
fn decode_jpeg_reduced(
    bytes: &[u8],
    opts: &DecodeOptions,
    target_shorter_side: u32,
) -> Result<Option<DecodedImage>, ImagingError> {
    let mut decoder = jpeg_decoder::Decoder::new(bytes);
    decoder.read_info().map_err(classify_jpeg_error)?;
    let Some(info) = decoder.info() else {
        return Err(ImagingError::Corrupt("jpeg header has no frame".into()));
    };
    let (width, height) = (u32::from(info.width), u32::from(info.height));
    check_pixels(width, height, opts.max_pixels)?;
    if info.coding_process == jpeg_decoder::CodingProcess::Lossless
        || info.pixel_format == jpeg_decoder::PixelFormat::L16
    {
        return Ok(None);
    }
    let reduction = match dct_reduction(width.min(height), target_shorter_side) {
        Some(reduction) if reduction >= MIN_WORTHWHILE_REDUCTION => reduction,
        _ => return Ok(None),
    };
    let requested = |side: u32| -> u16 {
        // Sides come from a u16 header field, so the reduced side fits too.
        u16::try_from(side.div_ceil(u32::from(reduction))).unwrap_or(u16::MAX)
    };
    let (scaled_width, scaled_height) = decoder
        .scale(requested(width), requested(height))
        .map_err(classify_jpeg_error)?;
    decoder.set_max_decoding_buffer_size(
        usize::try_from(decoder_allocation_budget(opts)).unwrap_or(usize::MAX),
    );
    let pixels = decoder.decode().map_err(classify_jpeg_error)?;
    let (scaled_width, scaled_height) = (u32::from(scaled_width), u32::from(scaled_height));
    let rgb_bytes = match info.pixel_format {
        jpeg_decoder::PixelFormat::RGB24 => pixels,
        jpeg_decoder::PixelFormat::L8 => pixels.iter().flat_map(|&v| [v, v, v]).collect(),
        jpeg_decoder::PixelFormat::CMYK32 => cmyk_to_rgb(&pixels),
        jpeg_decoder::PixelFormat::L16 => return Ok(None),
    };
    let rgb = RgbImage::from_raw(scaled_width, scaled_height, rgb_bytes).ok_or_else(|| {
        ImagingError::Corrupt(format!(
            "jpeg decoder returned too few pixels for {scaled_width}x{scaled_height}"
        ))
    })?;
    let orientation = decoder
        .exif_data()
        .and_then(Orientation::from_exif_chunk)
        .unwrap_or(Orientation::NoTransforms);
    let mut image = DynamicImage::ImageRgb8(rgb);
    image.apply_orientation(orientation);
    let (original_width, original_height) = if swaps_axes(orientation) {
        (height, width)
    } else {
        (width, height)
    };
    Ok(Some(DecodedImage {
        rgb: image.into_rgb8(),
        original_width,
        original_height,
        format: ImageFormatKind::Jpeg,
        reduced_scale: reduction,
    }))
}

/// `jpeg-decoder` returns CMYK as `255 - stored`, and stored CMYK JPEGs (Adobe
/// convention, as Photoshop and Pillow write them) are inverted, so the
/// output is true ink coverage: R = (255 - C) * (255 - K) / 255, the same
/// formula Pillow and the full-size decoder use.
fn cmyk_to_rgb(cmyk: &[u8]) -> Vec<u8> {
    let mut rgb = Vec::with_capacity(cmyk.len() / 4 * 3);
    for pixel in cmyk.chunks_exact(4) {
        let white = 255 - u32::from(pixel[3]);
        for &ink in &pixel[..3] {
            rgb.push(mul_div_255(255 - u32::from(ink), white));
        }
    }
    rgb
}

fn classify_jpeg_error(err: jpeg_decoder::Error) -> ImagingError {
    match err {
        jpeg_decoder::Error::Io(io) if io.kind() == std::io::ErrorKind::UnexpectedEof => {
            ImagingError::Truncated(io.to_string())
        }
        jpeg_decoder::Error::Unsupported(feature) => {
            ImagingError::Unsupported(format!("jpeg feature {feature:?}"))
        }
        other => classify_message(other.to_string()),
    }
}

/// Rounded `a * b / 255` for `a, b <= 255`.
fn mul_div_255(a: u32, b: u32) -> u8 {
    // Exact rounding of x / 255 for x <= 255 * 255 (the classic shift form).
    let x = a * b + 128;
    ((x + (x >> 8)) >> 8) as u8
}

/// Converts any decoded layout to 8-bit RGB; transparent pixels are
/// composited over white (as a viewer on a white page would show them).
fn into_rgb_over_white(image: DynamicImage) -> RgbImage {
    if !image.color().has_alpha() {
        return image.into_rgb8();
    }
    let rgba = image.into_rgba8();
    let mut rgb = RgbImage::new(rgba.width(), rgba.height());
    for (out, pixel) in rgb
        .as_mut()
        .chunks_exact_mut(3)
        .zip(rgba.as_raw().chunks_exact(4))
    {
        let alpha = pixel[3];
        for (out_channel, &channel) in out.iter_mut().zip(&pixel[..3]) {
            // c * a + white * (1 - a), in 0..255 units; cannot exceed 255.
            *out_channel = mul_div_255(u32::from(channel), u32::from(alpha)) + (255 - alpha);
        }
    }
    rgb
}
