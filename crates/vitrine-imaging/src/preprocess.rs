//! RGB pixels to the normalised CHW tensor a vision model consumes.
//!
//! The recipe is the torchvision one used to train most ImageNet models,
//! applied to a PIL image: `Resize(resize_shorter)` with bicubic filtering,
//! `CenterCrop(crop)`, `ToTensor()`, `Normalize(mean, std)`.
//!
//! * Resize filter: antialiased cubic convolution with a = -0.5
//!   (Catmull-Rom), with the kernel widened by the downscale factor, which is
//!   how Pillow's `Image.resize(size, Image.BICUBIC)` works; `fast_image_resize`
//!   implements the same convolution.
//! * Resized size: the shorter side becomes `resize_shorter` and the longer
//!   side is `resize_shorter * long / short` TRUNCATED, as torchvision's
//!   `_compute_resized_output_size` does with `int(...)`. Rounding instead
//!   would shift the crop window by up to half a pixel relative to the
//!   reference models were trained with.
//! * Crop offset: `round((side - crop) / 2)` with Python's round-half-to-even,
//!   as torchvision's `center_crop` does.
//!
//! Only the cropped window is ever computed: the resize is given the source
//! box that maps onto the crop, so pixels outside it are never produced.
//! Filter taps still read source pixels outside the box, exactly as a full
//! resize followed by a crop would, so the result is the same.

use std::cell::RefCell;

use fast_image_resize::images::{Image, ImageRef};
use fast_image_resize::{FilterType, PixelType, ResizeAlg, ResizeOptions, Resizer};
use image::RgbImage;

use crate::{ImagingError, PreparedImage, PreprocessSpec};

thread_local! {
    // The resizer keeps scratch buffers between calls; one per thread avoids
    // reallocating them for every image.
    static RESIZER: RefCell<Resizer> = RefCell::new(Resizer::new());
}

/// Resizes, centre-crops and normalises `rgb` according to `spec`.
pub fn preprocess(rgb: &RgbImage, spec: &PreprocessSpec) -> Result<PreparedImage, ImagingError> {
    validate_spec(spec)?;
    let (width, height) = rgb.dimensions();
    if width == 0 || height == 0 {
        return Err(ImagingError::Preprocess(format!(
            "image is {width}x{height} and has no pixels"
        )));
    }
    let crop = spec.crop;
    let (resized_width, resized_height) = resized_size(width, height, spec.resize_shorter);
    let left = centre_crop_offset(resized_width, crop);
    let top = centre_crop_offset(resized_height, crop);

    // The crop window in source coordinates.
    let scale_x = f64::from(width) / f64::from(resized_width);
    let scale_y = f64::from(height) / f64::from(resized_height);
    let options = ResizeOptions::new()
        .resize_alg(ResizeAlg::Convolution(FilterType::CatmullRom))
        .crop(
            f64::from(left) * scale_x,
            f64::from(top) * scale_y,
            f64::from(crop) * scale_x,
            f64::from(crop) * scale_y,
        );
    let source = ImageRef::new(width, height, rgb.as_raw(), PixelType::U8x3)
        .map_err(|err| ImagingError::Preprocess(format!("source image buffer: {err}")))?;
    let mut cropped = Image::new(crop, crop, PixelType::U8x3);
    RESIZER
        .with(|resizer| resizer.borrow_mut().resize(&source, &mut cropped, &options))
        .map_err(|err| ImagingError::Preprocess(format!("resize: {err}")))?;

    Ok(PreparedImage {
        width: crop,
        height: crop,
        chw: normalise_to_chw(cropped.buffer(), spec),
    })
}

/// Output size of torchvision's `Resize(int)`: the shorter side becomes
/// `shorter`, the longer one is scaled in proportion and truncated.
pub fn resized_size(width: u32, height: u32, shorter: u32) -> (u32, u32) {
    let scaled_long = |long: u32, short: u32| -> u32 {
        let exact = u64::from(shorter) * u64::from(long) / u64::from(short);
        u32::try_from(exact).unwrap_or(u32::MAX)
    };
    if width <= height {
        (shorter, scaled_long(height, width))
    } else {
        (scaled_long(width, height), shorter)
    }
}

/// torchvision's `center_crop` offset: `int(round((side - crop) / 2.0))`,
/// where Python rounds halves to even.
fn centre_crop_offset(side: u32, crop: u32) -> u32 {
    (f64::from(side - crop) / 2.0).round_ties_even() as u32
}

fn validate_spec(spec: &PreprocessSpec) -> Result<(), ImagingError> {
    let problem = if spec.crop == 0 {
        Some("crop size is zero".to_string())
    } else if spec.crop > spec.resize_shorter {
        Some(format!(
            "crop size {} is larger than the resized shorter side {}",
            spec.crop, spec.resize_shorter
        ))
    } else if spec.std.iter().any(|s| !s.is_normal()) {
        Some(format!(
            "standard deviation {:?} has a zero or non-finite entry",
            spec.std
        ))
    } else {
        None
    };
    match problem {
        Some(message) => Err(ImagingError::Preprocess(message)),
        None => Ok(()),
    }
}

/// Interleaved RGB bytes to planar, normalised f32 in one pass.
///
/// Each channel has only 256 possible inputs, so the normalisation is a
/// table lookup. The table uses the same f32 arithmetic as
/// `(x / 255 - mean) / std` in numpy or torchvision.
fn normalise_to_chw(interleaved: &[u8], spec: &PreprocessSpec) -> Vec<f32> {
    let tables: [[f32; 256]; 3] = std::array::from_fn(|channel| {
        std::array::from_fn(|value| (value as f32 / 255.0 - spec.mean[channel]) / spec.std[channel])
    });
    let plane = interleaved.len() / 3;
    let mut chw = vec![0.0f32; plane * 3];
    let (red, rest) = chw.split_at_mut(plane);
    let (green, blue) = rest.split_at_mut(plane);
    for (index, pixel) in interleaved.chunks_exact(3).enumerate() {
        red[index] = tables[0][usize::from(pixel[0])];
        green[index] = tables[1][usize::from(pixel[1])];
        blue[index] = tables[2][usize::from(pixel[2])];
    }
    chw
}
