//! Decode + preprocess throughput on camera-sized JPEGs, with and without
//! reduced-scale (DCT) decoding, next to Pillow doing the same work.
//!
//!     cargo run --release -p vitrine-imaging --example decode_bench [-- ROUNDS]
//!
//! The JPEGs are made here: photos from the test fixtures upscaled to
//! 2304x1728 (4 MP) with a little deterministic grain so they compress like
//! camera output rather than like smooth upscales. Pillow runs through
//! examples/decode_bench_pillow.py with the Python in $VITRINE_PYTHON
//! (default `python3`); if it cannot run, its rows say so.
//! Everything is single-threaded; each figure is the median of ROUNDS rounds.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use anyhow::{Context, Result};
use image::RgbImage;
use vitrine_imaging::{decode_path, preprocess, DecodeOptions, PreprocessSpec};

const WIDTH: u32 = 2304;
const HEIGHT: u32 = 1728;
const SOURCES: [&str; 4] = [
    "astronaut_q90.jpg",
    "coffee_300x200.png",
    "chelsea_q85.webp",
    "camera_grey_120x90.png",
];

fn default_spec() -> PreprocessSpec {
    PreprocessSpec {
        resize_shorter: 256,
        crop: 224,
        mean: [0.485, 0.456, 0.406],
        std: [0.229, 0.224, 0.225],
    }
}

/// Adds +-6 levels of xorshift noise, deterministic per image.
fn add_grain(image: &mut RgbImage, seed: u32) {
    let mut state = seed.wrapping_mul(2_654_435_761) | 1;
    for value in image.iter_mut() {
        state ^= state << 13;
        state ^= state >> 17;
        state ^= state << 5;
        let offset = (state % 13) as i16 - 6;
        *value = (i16::from(*value) + offset).clamp(0, 255) as u8;
    }
}

fn make_camera_jpegs(dir: &Path) -> Result<Vec<PathBuf>> {
    let fixtures = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures");
    let mut paths = Vec::new();
    for (index, source) in SOURCES.iter().enumerate() {
        let photo = image::open(fixtures.join(source))
            .with_context(|| format!("opening fixture {source}"))?
            .into_rgb8();
        let mut large = image::imageops::resize(
            &photo,
            WIDTH,
            HEIGHT,
            image::imageops::FilterType::CatmullRom,
        );
        add_grain(&mut large, index as u32 + 1);
        let path = dir.join(format!("camera_{index}.jpg"));
        let mut file = std::io::BufWriter::new(std::fs::File::create(&path)?);
        image::codecs::jpeg::JpegEncoder::new_with_quality(&mut file, 90).encode_image(&large)?;
        paths.push(path);
    }
    Ok(paths)
}

fn median(mut values: Vec<f64>) -> f64 {
    values.sort_by(f64::total_cmp);
    values[values.len() / 2]
}

/// Images per second over `rounds` passes through all files (median pass).
fn measure(paths: &[PathBuf], opts: &DecodeOptions, rounds: usize) -> Result<(f64, u8)> {
    let spec = default_spec();
    let mut rates = Vec::new();
    let mut scale = 1;
    for _ in 0..rounds {
        let start = Instant::now();
        for path in paths {
            let decoded = decode_path(path, opts)?;
            scale = decoded.reduced_scale;
            let prepared = preprocess(&decoded.rgb, &spec)?;
            std::hint::black_box(prepared);
        }
        rates.push(paths.len() as f64 / start.elapsed().as_secs_f64());
    }
    Ok((median(rates), scale))
}

/// Runs the Pillow counterpart; returns (full, draft) images per second.
fn measure_pillow(dir: &Path, rounds: usize) -> Result<(f64, f64)> {
    let python = std::env::var("VITRINE_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("examples/decode_bench_pillow.py");
    let output = Command::new(&python)
        .arg(&script)
        .arg(dir)
        .arg(rounds.to_string())
        .output()
        .with_context(|| format!("running {python}"))?;
    anyhow::ensure!(
        output.status.success(),
        "pillow benchmark failed: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    let text = String::from_utf8(output.stdout)?;
    let rate = |label: &str| -> Result<f64> {
        text.lines()
            .find_map(|line| line.strip_prefix(label))
            .context("missing line in pillow output")?
            .trim()
            .parse()
            .context("parsing pillow rate")
    };
    Ok((rate("full ")?, rate("draft ")?))
}

fn main() -> Result<()> {
    let rounds: usize = match std::env::args().nth(1) {
        Some(arg) => arg.parse().context("ROUNDS must be a number")?,
        None => 5,
    };
    let dir = tempfile::tempdir()?;
    let paths = make_camera_jpegs(dir.path())?;
    let spec = default_spec();

    let full = DecodeOptions::default();
    let reduced = DecodeOptions {
        target_shorter_side: Some(spec.resize_shorter),
        ..DecodeOptions::default()
    };
    let (full_rate, _) = measure(&paths, &full, rounds)?;
    let (reduced_rate, scale) = measure(&paths, &reduced, rounds)?;
    let pillow = measure_pillow(dir.path(), rounds);

    println!(
        "decode + preprocess ({} JPEGs of {WIDTH}x{HEIGHT}, resize {} crop {}, 1 thread, median of {rounds} rounds)",
        paths.len(),
        spec.resize_shorter,
        spec.crop
    );
    println!("| pipeline                                  | images/s |");
    println!("|-------------------------------------------|---------:|");
    println!("| vitrine, full decode (zune-jpeg)          | {full_rate:8.1} |");
    println!("| vitrine, 1/{scale} DCT decode (jpeg-decoder)     | {reduced_rate:8.1} |");
    match pillow {
        Ok((pillow_full, pillow_draft)) => {
            println!("| Pillow, full decode + resize              | {pillow_full:8.1} |");
            println!("| Pillow, draft() + resize                  | {pillow_draft:8.1} |");
        }
        Err(err) => println!("| Pillow: not measured ({err:#})"),
    }
    Ok(())
}
