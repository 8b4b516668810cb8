//! Bad inputs give typed errors, never panics; formats are recognised by
//! content, not by file name.

mod common;

use std::path::Path;

use anyhow::Result;
use common::{expect_error, fixture};
use image::RgbImage;
use vitrine_imaging::{
    decode_bytes, decode_path, read_dimensions, DecodeOptions, ImageFormatKind, ImagingError,
};

fn write(dir: &Path, name: &str, bytes: &[u8]) -> Result<std::path::PathBuf> {
    let path = dir.join(name);
    std::fs::write(&path, bytes)?;
    Ok(path)
}

/// A PNG chunk: length, type, data, CRC-32 over type and data (PNG spec 5.3).
fn png_chunk(kind: &[u8; 4], data: &[u8]) -> Vec<u8> {
    let mut chunk = (data.len() as u32).to_be_bytes().to_vec();
    chunk.extend_from_slice(kind);
    chunk.extend_from_slice(data);
    let mut crc = crc32fast::Hasher::new();
    crc.update(kind);
    crc.update(data);
    chunk.extend_from_slice(&crc.finalize().to_be_bytes());
    chunk
}

/// A PNG whose header claims `width` x `height` 8-bit RGB pixels followed by
/// a tiny IDAT (an empty zlib stream): a decompression-bomb shaped file.
fn png_claiming(width: u32, height: u32) -> Vec<u8> {
    let mut ihdr = width.to_be_bytes().to_vec();
    ihdr.extend_from_slice(&height.to_be_bytes());
    ihdr.extend_from_slice(&[8, 2, 0, 0, 0]); // depth 8, RGB, deflate, no filter/interlace
    let mut png = b"\x89PNG\r\n\x1a\n".to_vec();
    png.extend(png_chunk(b"IHDR", &ihdr));
    png.extend(png_chunk(
        b"IDAT",
        &[0x78, 0x9c, 0x03, 0x00, 0x00, 0x00, 0x00, 0x01],
    ));
    png.extend(png_chunk(b"IEND", &[]));
    png
}

#[test]
fn zero_byte_file_is_empty() -> Result<()> {
    let dir = tempfile::tempdir()?;
    let path = write(dir.path(), "empty.jpg", b"")?;
    let err = expect_error(decode_path(&path, &DecodeOptions::default()));
    assert!(matches!(err, ImagingError::EmptyFile), "{err:?}");
    Ok(())
}

#[test]
fn text_named_jpg_is_not_an_image() -> Result<()> {
    let dir = tempfile::tempdir()?;
    let path = write(dir.path(), "notes.jpg", b"shopping list: eggs, flour\n")?;
    let err = expect_error(decode_path(&path, &DecodeOptions::default()));
    assert!(matches!(err, ImagingError::NotAnImage), "{err:?}");
    Ok(())
}

#[test]
fn truncated_jpeg_is_reported_as_truncated_in_both_decoders() -> Result<()> {
    let jpeg = std::fs::read(fixture("astronaut_q90.jpg"))?;
    let cut = &jpeg[..jpeg.len() / 2];
    let full = expect_error(decode_bytes(cut, &DecodeOptions::default()));
    assert!(matches!(full, ImagingError::Truncated(_)), "{full:?}");
    let reduced_opts = DecodeOptions {
        target_shorter_side: Some(64),
        ..DecodeOptions::default()
    };
    let reduced = expect_error(decode_bytes(cut, &reduced_opts));
    assert!(matches!(reduced, ImagingError::Truncated(_)), "{reduced:?}");
    Ok(())
}

#[test]
fn truncated_png_is_reported_as_truncated() -> Result<()> {
    let png = std::fs::read(fixture("coffee_300x200.png"))?;
    let err = expect_error(decode_bytes(
        &png[..png.len() / 2],
        &DecodeOptions::default(),
    ));
    assert!(matches!(err, ImagingError::Truncated(_)), "{err:?}");
    Ok(())
}

#[test]
fn decompression_bomb_png_is_rejected_from_its_header() -> Result<()> {
    let dir = tempfile::tempdir()?;
    let path = write(dir.path(), "bomb.png", &png_claiming(30_000, 30_000))?;
    // The header is readable and honest about its size...
    assert_eq!(read_dimensions(&path)?, (30_000, 30_000));
    // ...and decoding refuses before allocating 2.7 GB of pixels.
    let err = expect_error(decode_path(&path, &DecodeOptions::default()));
    match err {
        ImagingError::TooManyPixels {
            width,
            height,
            limit,
        } => assert_eq!((width, height, limit), (30_000, 30_000, 100_000_000)),
        other => panic!("expected TooManyPixels, got {other:?}"),
    }
    Ok(())
}

#[test]
fn jpeg_over_the_pixel_limit_is_rejected_in_both_decoders() -> Result<()> {
    let jpeg = std::fs::read(fixture("astronaut_q90.jpg"))?;
    for target in [None, Some(32)] {
        let opts = DecodeOptions {
            max_pixels: 512 * 512 - 1,
            target_shorter_side: target,
            ..DecodeOptions::default()
        };
        let err = expect_error(decode_bytes(&jpeg, &opts));
        assert!(
            matches!(
                err,
                ImagingError::TooManyPixels {
                    width: 512,
                    height: 512,
                    ..
                }
            ),
            "{err:?}"
        );
    }
    Ok(())
}

#[test]
fn file_over_the_byte_limit_is_too_large() -> Result<()> {
    let opts = DecodeOptions {
        max_file_bytes: 1000,
        ..DecodeOptions::default()
    };
    let path = fixture("astronaut_q90.jpg");
    let size = std::fs::metadata(&path)?.len();
    let err = expect_error(decode_path(&path, &opts));
    assert!(
        matches!(err, ImagingError::TooLarge { bytes, limit: 1000 } if bytes == size),
        "{err:?}"
    );
    Ok(())
}

#[test]
fn missing_file_is_an_io_error_naming_the_path() {
    let path = Path::new("/nonexistent/holiday.jpg");
    let err = expect_error(decode_path(path, &DecodeOptions::default()));
    assert!(
        matches!(&err, ImagingError::Io { path: p, .. } if p == path),
        "{err:?}"
    );
    assert!(err.to_string().contains("/nonexistent/holiday.jpg"));
}

#[test]
fn recognised_but_unsupported_format_is_unsupported() {
    // The 14-byte QOI header: magic, width, height, channels, colourspace.
    let mut qoi = b"qoif".to_vec();
    qoi.extend_from_slice(&[0, 0, 0, 4, 0, 0, 0, 4, 3, 0]);
    let err = expect_error(decode_bytes(&qoi, &DecodeOptions::default()));
    assert!(matches!(err, ImagingError::Unsupported(_)), "{err:?}");
}

#[test]
fn damaged_png_is_corrupt() {
    let mut png = png_claiming(4, 4);
    // Break the IHDR CRC.
    png[29] ^= 0xff;
    let err = expect_error(decode_bytes(&png, &DecodeOptions::default()));
    assert!(matches!(err, ImagingError::Corrupt(_)), "{err:?}");
}

#[test]
fn format_comes_from_content_not_extension_and_files_are_untouched() -> Result<()> {
    let dir = tempfile::tempdir()?;
    let original = RgbImage::from_fn(29, 17, |x, y| image::Rgb([x as u8 * 8, y as u8 * 15, 99]));
    for (format, kind) in [
        (image::ImageFormat::Bmp, ImageFormatKind::Bmp),
        (image::ImageFormat::Tiff, ImageFormatKind::Tiff),
        (image::ImageFormat::Png, ImageFormatKind::Png),
    ] {
        let mut encoded = std::io::Cursor::new(Vec::new());
        original.write_to(&mut encoded, format)?;
        // Deliberately misleading extension.
        let path = write(dir.path(), "misnamed.jpg", encoded.get_ref())?;
        let before = std::fs::metadata(&path)?.modified()?;
        let decoded = decode_path(&path, &DecodeOptions::default())?;
        assert_eq!(decoded.format, kind);
        // Lossless formats round-trip the image crate's encoder exactly.
        assert_eq!(decoded.rgb, original);
        assert_eq!(std::fs::read(&path)?, *encoded.get_ref());
        assert_eq!(std::fs::metadata(&path)?.modified()?, before);
    }
    Ok(())
}
