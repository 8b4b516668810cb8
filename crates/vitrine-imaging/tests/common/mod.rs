//! Helpers shared by the integration tests.
#![allow(dead_code)] // each test binary uses a different subset

use std::path::PathBuf;

use image::RgbImage;

pub fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures")
        .join(name)
}

/// Mean and maximum absolute difference of two equally sized RGB images, in
/// 0..255 units.
pub fn pixel_difference(ours: &RgbImage, reference: &RgbImage) -> (f64, u8) {
    assert_eq!(
        ours.dimensions(),
        reference.dimensions(),
        "image sizes differ"
    );
    let mut sum = 0u64;
    let mut max = 0u8;
    for (a, b) in ours.as_raw().iter().zip(reference.as_raw()) {
        let d = a.abs_diff(*b);
        sum += u64::from(d);
        max = max.max(d);
    }
    (sum as f64 / ours.as_raw().len() as f64, max)
}

/// A reference PNG written by make_pillow_reference.py, as 8-bit RGB.
pub fn reference_png(name: &str) -> RgbImage {
    image::open(fixture(name))
        .unwrap_or_else(|err| panic!("reading fixture {name}: {err}"))
        .into_rgb8()
}

/// The error of a call that must fail (without printing megabytes of pixels
/// when it unexpectedly succeeds, as `unwrap_err` would).
pub fn expect_error<T>(
    result: Result<T, vitrine_imaging::ImagingError>,
) -> vitrine_imaging::ImagingError {
    match result {
        Ok(_) => panic!("expected an error, but the call succeeded"),
        Err(err) => err,
    }
}
