//! Decoding and preprocessing compared with Pillow.
//!
//! Every expected value here was computed by Pillow (and numpy) in
//! tests/fixtures/make_pillow_reference.py, never by this crate.

mod common;

use anyhow::{Context, Result};
use common::{fixture, pixel_difference, reference_png};
use image::{ImageBuffer, Luma, Rgb, RgbImage};
use serde::Deserialize;
use vitrine_imaging::{
    decode_bytes, decode_path, preprocess, DecodeOptions, ImageFormatKind, PreprocessSpec,
};

#[derive(Deserialize)]
struct Manifest {
    recipes: Vec<RecipeCase>,
}

#[derive(Deserialize)]
struct RecipeCase {
    input: String,
    resize_shorter: u32,
    crop: u32,
    mean: [f32; 3],
    std: [f32; 3],
    expected: String,
    shape: [usize; 3],
}

fn read_f32_le(name: &str) -> Result<Vec<f32>> {
    let bytes = std::fs::read(fixture(name)).with_context(|| format!("reading {name}"))?;
    Ok(bytes
        .chunks_exact(4)
        .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
        .collect())
}

fn full_decode() -> DecodeOptions {
    DecodeOptions::default()
}

fn reduced_decode(target_shorter_side: u32) -> DecodeOptions {
    DecodeOptions {
        target_shorter_side: Some(target_shorter_side),
        ..DecodeOptions::default()
    }
}

#[test]
fn preprocessing_matches_pillow_bicubic_torchvision_recipe() -> Result<()> {
    let manifest: Manifest = serde_json::from_slice(&std::fs::read(fixture("manifest.json"))?)?;
    assert!(manifest.recipes.len() >= 4);
    for case in &manifest.recipes {
        let spec = PreprocessSpec {
            resize_shorter: case.resize_shorter,
            crop: case.crop,
            mean: case.mean,
            std: case.std,
        };
        let decoded = decode_path(&fixture(&case.input), &full_decode())?;
        let prepared = preprocess(&decoded.rgb, &spec)?;
        let expected = read_f32_le(&case.expected)?;
        assert_eq!(
            [3, prepared.height as usize, prepared.width as usize],
            case.shape
        );
        assert_eq!(prepared.chw.len(), expected.len());

        // Differences are measured in 0..1 pixel units (undo the division by
        // std) so the tolerance reads as "fraction of the pixel range".
        let plane = expected.len() / 3;
        let mut sum = 0.0f64;
        let mut max = 0.0f64;
        for (index, (ours, theirs)) in prepared.chw.iter().zip(&expected).enumerate() {
            let d = f64::from((ours - theirs).abs() * case.std[index / plane]);
            sum += d;
            max = max.max(d);
        }
        let mean = sum / expected.len() as f64;
        println!(
            "{}: resize {} crop {}: mean |diff| = {:.3}/255, max = {:.1}/255",
            case.input,
            case.resize_shorter,
            case.crop,
            mean * 255.0,
            max * 255.0
        );
        // Reference: Pillow Image.resize(..., Image.BICUBIC) + torchvision-style
        // CenterCrop and Normalize (make_pillow_reference.py). JPEG/WebP inputs
        // also differ by decoder (libjpeg-turbo/libwebp vs Rust decoders).
        assert!(
            mean <= 1.0 / 255.0,
            "{}: mean difference {:.3}/255 exceeds 1/255",
            case.input,
            mean * 255.0
        );
    }
    Ok(())
}

#[test]
fn exif_orientation_matches_pillow_exif_transpose() -> Result<()> {
    for orientation in [3, 6, 8] {
        let decoded = decode_path(
            &fixture(&format!("orientation{orientation}.jpg")),
            &full_decode(),
        )?;
        let reference = reference_png(&format!("orientation{orientation}.ref.png"));
        assert_eq!(
            (decoded.original_width, decoded.original_height),
            reference.dimensions()
        );
        let (mean, max) = pixel_difference(&decoded.rgb, &reference);
        println!("orientation {orientation}: mean |diff| {mean:.2}, max {max}");
        // Reference: Pillow ImageOps.exif_transpose. Only JPEG decoder
        // rounding differs, so pixels agree to a few levels on average.
        assert!(mean < 2.0, "orientation {orientation}: mean diff {mean}");
    }
    Ok(())
}

#[test]
fn transparency_is_composited_over_white_like_pillow() -> Result<()> {
    for name in ["alpha_rgba", "alpha_grey"] {
        let decoded = decode_path(&fixture(&format!("{name}.png")), &full_decode())?;
        let (_, max) = pixel_difference(&decoded.rgb, &reference_png(&format!("{name}.ref.png")));
        // Reference: Pillow Image.alpha_composite over an opaque white image;
        // fixed-point rounding may differ by one level.
        assert!(max <= 1, "{name}: max diff {max}");
    }
    Ok(())
}

#[test]
fn gif_decodes_its_first_frame_like_pillow() -> Result<()> {
    let decoded = decode_path(&fixture("two_frames.gif"), &full_decode())?;
    assert_eq!(decoded.format, ImageFormatKind::Gif);
    let (_, max) = pixel_difference(&decoded.rgb, &reference_png("two_frames.ref.png"));
    // Reference: Pillow, frame 0 converted to RGB (palette lookup is exact).
    assert_eq!(max, 0);
    Ok(())
}

#[test]
fn cmyk_jpeg_matches_pillow_in_full_and_reduced_decodes() -> Result<()> {
    let full = decode_path(&fixture("cmyk.jpg"), &full_decode())?;
    let (mean, _) = pixel_difference(&full.rgb, &reference_png("cmyk.ref.png"));
    println!("cmyk full decode: mean |diff| {mean:.2}");
    // Reference: Pillow's CMYK JPEG decode converted to RGB.
    assert!(mean < 2.0, "full cmyk decode mean diff {mean}");

    // Shorter side 96: 1/4 gives 24 >= 2 * 12, 1/8 would give 12 < 24.
    let reduced = decode_path(&fixture("cmyk.jpg"), &reduced_decode(12))?;
    assert_eq!(reduced.reduced_scale, 4);
    assert_eq!((reduced.original_width, reduced.original_height), (128, 96));
    let (mean, _) = pixel_difference(&reduced.rgb, &reference_png("cmyk.draft4.png"));
    println!("cmyk 1/4 DCT decode: mean |diff| {mean:.2}");
    // Reference: Pillow draft() (libjpeg DCT scaling) on the same file; see
    // reduced_dct_decode_matches_pillow_draft for why it is not exact.
    assert!(mean < 4.5, "reduced cmyk decode mean diff {mean}");
    Ok(())
}

#[test]
fn reduced_dct_decode_matches_pillow_draft() -> Result<()> {
    // Shorter side 512: 1/4 gives 128 >= 2 * 64, 1/8 would give 64 < 128.
    let decoded = decode_path(&fixture("astronaut_q90.jpg"), &reduced_decode(64))?;
    assert_eq!(decoded.reduced_scale, 4);
    assert_eq!(
        (decoded.original_width, decoded.original_height),
        (512, 512)
    );
    let (mean, max) = pixel_difference(&decoded.rgb, &reference_png("astronaut_q90.draft4.png"));
    println!("astronaut 1/4 DCT decode: mean |diff| {mean:.2}, max {max}");
    // Reference: Pillow Image.draft('RGB', (128, 128)), i.e. libjpeg's scaled
    // IDCT. jpeg-decoder's scaled IDCT and chroma upsampling are not
    // libjpeg's, so a few levels of difference remain (measured 2.7 here and
    // 2.9 below); a wrong scale, orientation or one-pixel shift gives 13+.
    assert!(mean < 4.5, "mean diff {mean}");

    // The reduced path applies EXIF orientation too: 128x80 stored, rotated.
    let decoded = decode_path(&fixture("orientation6.jpg"), &reduced_decode(10))?;
    assert_eq!(decoded.reduced_scale, 4);
    assert_eq!((decoded.original_width, decoded.original_height), (80, 128));
    let (mean, _) = pixel_difference(&decoded.rgb, &reference_png("orientation6.draft4.png"));
    println!("orientation 6, 1/4 DCT decode: mean |diff| {mean:.2}");
    // Reference: Pillow draft() followed by ImageOps.exif_transpose.
    assert!(mean < 4.5, "mean diff {mean}");
    Ok(())
}

#[test]
fn sixteen_bit_png_scales_to_eight_bits() -> Result<()> {
    // Values v * 257 are exactly v on the 8-bit scale (65535 / 255 = 257),
    // the sample-depth rescaling the PNG specification describes.
    let (width, height) = (37u32, 23u32);
    let eight_bit = RgbImage::from_fn(width, height, |x, y| {
        Rgb([(x * 7) as u8, (y * 11) as u8, ((x * y) % 256) as u8])
    });
    let sixteen_bit: ImageBuffer<Rgb<u16>, Vec<u16>> =
        ImageBuffer::from_fn(width, height, |x, y| {
            let p = eight_bit.get_pixel(x, y).0;
            Rgb(p.map(|v| u16::from(v) * 257))
        });
    let mut png = std::io::Cursor::new(Vec::new());
    sixteen_bit.write_to(&mut png, image::ImageFormat::Png)?;
    let decoded = decode_bytes(png.get_ref(), &full_decode())?;
    assert_eq!(decoded.rgb, eight_bit);

    let grey16: ImageBuffer<Luma<u16>, Vec<u16>> =
        ImageBuffer::from_fn(width, height, |x, _| Luma([x as u16 * 7 * 257]));
    let mut png = std::io::Cursor::new(Vec::new());
    grey16.write_to(&mut png, image::ImageFormat::Png)?;
    let decoded = decode_bytes(png.get_ref(), &full_decode())?;
    for (x, _, pixel) in decoded.rgb.enumerate_pixels() {
        let v = (x * 7) as u8;
        assert_eq!(pixel.0, [v, v, v]);
    }
    Ok(())
}

#[test]
fn reduced_dct_decode_changes_the_tensor_only_slightly() -> Result<()> {
    // A camera-sized JPEG: a real photo upscaled to 4000x3000 (12 MP).
    let photo = decode_path(&fixture("astronaut_q90.jpg"), &full_decode())?.rgb;
    let large = image::imageops::resize(&photo, 4000, 3000, image::imageops::FilterType::Triangle);
    let mut jpeg = Vec::new();
    image::codecs::jpeg::JpegEncoder::new_with_quality(&mut jpeg, 90).encode_image(&large)?;

    let spec = PreprocessSpec {
        resize_shorter: 256,
        crop: 224,
        mean: [0.485, 0.456, 0.406],
        std: [0.229, 0.224, 0.225],
    };
    let full = decode_bytes(&jpeg, &full_decode())?;
    let reduced = decode_bytes(&jpeg, &reduced_decode(256))?;
    assert_eq!(full.reduced_scale, 1);
    // 3000 / 4 = 750 >= 512 but 3000 / 8 = 375 < 512.
    assert_eq!(reduced.reduced_scale, 4);
    assert_eq!(reduced.rgb.dimensions(), (1000, 750));
    assert_eq!(
        (reduced.original_width, reduced.original_height),
        (4000, 3000)
    );

    // A 2:1 reduction is skipped: full decode is faster there (decode_bench).
    let mid_size =
        image::imageops::resize(&photo, 2000, 1500, image::imageops::FilterType::Triangle);
    let mut mid_jpeg = Vec::new();
    image::codecs::jpeg::JpegEncoder::new_with_quality(&mut mid_jpeg, 90)
        .encode_image(&mid_size)?;
    assert_eq!(
        decode_bytes(&mid_jpeg, &reduced_decode(256))?.reduced_scale,
        1
    );

    let a = preprocess(&full.rgb, &spec)?;
    let b = preprocess(&reduced.rgb, &spec)?;
    let plane = a.chw.len() / 3;
    let mut sum = 0.0f64;
    let mut max = 0.0f32;
    for (index, (x, y)) in a.chw.iter().zip(&b.chw).enumerate() {
        let d = (x - y).abs() * spec.std[index / plane];
        sum += f64::from(d);
        max = max.max(d);
    }
    let mean = sum / a.chw.len() as f64;
    println!(
        "4000x3000 JPEG, full vs 1/4 DCT decode after preprocessing: mean |diff| {:.3}/255, max {:.1}/255",
        mean * 255.0,
        max * 255.0
    );
    // Rule of thumb (common practice, not a published figure): a change well
    // under one grey level on average is invisible to an embedding model.
    assert!(mean < 1.0 / 255.0, "mean diff {:.3}/255", mean * 255.0);
    Ok(())
}
