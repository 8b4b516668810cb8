//! Decode + preprocess throughput on camera-sized JPEGs, with and without
//! reduced-scale (DCT) decoding, next to Pillow doing the same work.
//!
//!     cargo run --release -p vitrine-imaging --example decode_bench [-- ROUNDS [WIDTHxHEIGHT]]
//!
//! The JPEGs are made here: photos from the test fixtures upscaled to
//! 2304x1728 (4 MP) by default, with a little deterministic grain so they compress like
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

const DEFAULT_SIZE: (u32, u32) = (2304, 1728);
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

fn make_camera_jpegs(dir: &Path, (width, height): (u32, u32)) -> Result<Vec<PathBuf>> {
    let fixtures = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures");
    let mut paths = Vec::new();
    for (index, source) in SOURCES.iter().enumerate() {
        let photo = image::open(fixtures.join(source))
            .with_context(|| format!("opening fixture {source}"))?
            .into_rgb8();
        let mut large = image::imageops::resize(
            &photo,
            width,
            height,
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

struct Measurement {
    images_per_second: f64,
    decode_ms: f64,
    preprocess_ms: f64,
    reduced_scale: u8,
}

/// Times one pass of decode + preprocess over all files; returns seconds
/// spent decoding, seconds preprocessing and the DCT reduction used.
fn one_pass(paths: &[PathBuf], opts: &DecodeOptions) -> Result<(f64, f64, u8)> {
    let spec = default_spec();
    let (mut decode_s, mut preprocess_s, mut reduced_scale) = (0.0, 0.0, 1);
    for path in paths {
        let start = Instant::now();
        let decoded = decode_path(path, opts)?;
        let decoded_at = Instant::now();
        std::hint::black_box(preprocess(&decoded.rgb, &spec)?);
        decode_s += (decoded_at - start).as_secs_f64();
        preprocess_s += decoded_at.elapsed().as_secs_f64();
        reduced_scale = decoded.reduced_scale;
    }
    Ok((decode_s, preprocess_s, reduced_scale))
}

/// Runs the option sets in alternation, round after round, so a busy machine
/// slows them alike; reports the median round of each.
fn measure(
    paths: &[PathBuf],
    option_sets: &[DecodeOptions],
    rounds: usize,
) -> Result<Vec<Measurement>> {
    let mut passes = vec![Vec::new(); option_sets.len()];
    for _ in 0..rounds {
        for (opts, passes) in option_sets.iter().zip(&mut passes) {
            passes.push(one_pass(paths, opts)?);
        }
    }
    let n = paths.len() as f64;
    Ok(passes
        .into_iter()
        .map(|passes| Measurement {
            images_per_second: median(passes.iter().map(|p| n / (p.0 + p.1)).collect()),
            decode_ms: median(passes.iter().map(|p| p.0 * 1e3 / n).collect()),
            preprocess_ms: median(passes.iter().map(|p| p.1 * 1e3 / n).collect()),
            reduced_scale: passes.last().map_or(1, |p| p.2),
        })
        .collect())
}

/// Decode-only time per image (median pass) for jpeg-decoder at a given DCT
/// scale, to show where the reduced path pays for its slower entropy decoder.
fn jpeg_decoder_ms(files: &[Vec<u8>], reduction: u16, rounds: usize) -> Result<f64> {
    let mut per_image_ms = Vec::new();
    for _ in 0..rounds {
        let start = Instant::now();
        for bytes in files {
            let mut decoder = jpeg_decoder::Decoder::new(bytes.as_slice());
            decoder.read_info()?;
            let info = decoder.info().context("jpeg without a frame")?;
            decoder.scale(
                info.width.div_ceil(reduction),
                info.height.div_ceil(reduction),
            )?;
            std::hint::black_box(decoder.decode()?);
        }
        per_image_ms.push(start.elapsed().as_secs_f64() * 1e3 / files.len() as f64);
    }
    Ok(median(per_image_ms))
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
    let size = match std::env::args().nth(2) {
        Some(arg) => {
            let (w, h) = arg
                .split_once('x')
                .context("size must look like 4000x3000")?;
            (w.parse()?, h.parse()?)
        }
        None => DEFAULT_SIZE,
    };
    let dir = tempfile::tempdir()?;
    let paths = make_camera_jpegs(dir.path(), size)?;
    let spec = default_spec();

    let full = DecodeOptions::default();
    let reduced = DecodeOptions {
        target_shorter_side: Some(spec.resize_shorter),
        ..DecodeOptions::default()
    };
    let measured = measure(&paths, &[full, reduced], rounds)?;
    let (full_decode, reduced_decode) = (&measured[0], &measured[1]);
    let pillow = measure_pillow(dir.path(), rounds);

    println!(
        "decode + preprocess ({} JPEGs of {}x{}, resize {} crop {}, 1 thread, median of {rounds} rounds)",
        paths.len(),
        size.0,
        size.1,
        spec.resize_shorter,
        spec.crop
    );
    println!("| pipeline                                | images/s | decode ms | preprocess ms |");
    println!("|-----------------------------------------|---------:|----------:|--------------:|");
    for (label, m) in [
        ("vitrine, full decode (zune-jpeg)".to_string(), full_decode),
        (
            match reduced_decode.reduced_scale {
                1 => "vitrine, target set: no reduction taken".to_string(),
                scale => format!("vitrine, 1/{scale} DCT decode (jpeg-decoder)"),
            },
            reduced_decode,
        ),
    ] {
        println!(
            "| {label:<39} | {:8.1} | {:9.1} | {:13.1} |",
            m.images_per_second, m.decode_ms, m.preprocess_ms
        );
    }
    match pillow {
        Ok((pillow_full, pillow_draft)) => {
            println!(
                "| {:<39} | {pillow_full:8.1} | {:>9} | {:>13} |",
                "Pillow, full decode + resize", "-", "-"
            );
            println!(
                "| {:<39} | {pillow_draft:8.1} | {:>9} | {:>13} |",
                "Pillow, draft() + resize", "-", "-"
            );
        }
        Err(err) => println!("| Pillow: not measured ({err:#})"),
    }

    let files = paths
        .iter()
        .map(std::fs::read)
        .collect::<std::io::Result<Vec<_>>>()?;
    println!();
    println!(
        "JPEG decode only, jpeg-decoder by DCT scale (zune-jpeg full decode above: {:.1} ms)",
        full_decode.decode_ms
    );
    println!("| scale | decode ms |");
    println!("|-------|----------:|");
    for reduction in [1u16, 2, 4, 8] {
        println!(
            "| 1/{reduction}   | {:9.1} |",
            jpeg_decoder_ms(&files, reduction, rounds)?
        );
    }
    Ok(())
}
