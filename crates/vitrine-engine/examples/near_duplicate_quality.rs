//! What near-duplicate verification buys, measured on real photos and on
//! generated low-texture pictures, with Copydays-style edits (Jégou, Douze
//! and Schmid, 2008; strengths from memory, see `vitrine_engine::calibrate`).
//! Also compares poolings and runs the threshold calibration on the photos.
//!
//! Photos: scikit-image's sample data (`skimage.data`, public domain),
//! scikit-learn's sample images (`sklearn/datasets/images`) and, when
//! matplotlib is installed, its `grace_hopper.jpg` sample.
//!
//! ```text
//! VITRINE_MODEL_DIR=... VITRINE_PYTHON=... cargo run -p vitrine-engine --example near_duplicate_quality
//! ```

use std::collections::HashSet;
use std::path::PathBuf;
use std::process::Command;

use anyhow::{bail, Context, Result};
use image::{Rgb, RgbImage};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use vitrine_engine::calibrate::{calibrate, CalibrationOptions, Edit, MILD_EDITS, STRONG_EDITS};
use vitrine_engine::catalog::{dot, Catalog};
use vitrine_engine::ingest::{fingerprint_of, index_roots, IndexOptions};
use vitrine_engine::progress::NoProgress;
use vitrine_engine::verify::{compare, ImageEvidence, PairCheck, VerifyOptions};
use vitrine_imaging::{decode_path, preprocess, DecodeOptions, PreparedImage};
use vitrine_model::config::Pooling;
use vitrine_model::encoder::Encoder;
use vitrine_model::fetch::{default_model_root, DEFAULT_WHEEL};
use vitrine_store::Store;

/// One picture of an evaluation set.
struct Item {
    source: usize,
    edit: Option<Edit>,
    cls: Vec<f32>,
    mean: Vec<f32>,
    evidence: ImageEvidence,
}

fn python_dir(python: &str, code: &str) -> Option<PathBuf> {
    let out = Command::new(python).args(["-c", code]).output().ok()?;
    out.status
        .success()
        .then(|| PathBuf::from(String::from_utf8_lossy(&out.stdout).trim()))
}

fn photo_paths(python: &str) -> Result<Vec<PathBuf>> {
    let skimage = python_dir(
        python,
        "import skimage, os; print(os.path.join(os.path.dirname(skimage.__file__), 'data'))",
    )
    .context("scikit-image not found")?;
    let mut paths: Vec<PathBuf> = [
        "astronaut.png",
        "chelsea.png",
        "coffee.png",
        "rocket.jpg",
        "motorcycle_left.png",
        "hubble_deep_field.jpg",
        "retina.jpg",
        "ihc.png",
        "camera.png",
        "moon.png",
        "coins.png",
        "brick.png",
        "grass.png",
        "gravel.png",
        "page.png",
    ]
    .iter()
    .map(|name| skimage.join(name))
    .collect();
    if let Some(dir) = python_dir(
        python,
        "import sklearn, os; print(os.path.join(os.path.dirname(sklearn.__file__), 'datasets', 'images'))",
    ) {
        paths.extend(["china.jpg", "flower.jpg"].iter().map(|n| dir.join(n)));
    }
    if let Some(dir) = python_dir(
        python,
        "import matplotlib, os; print(os.path.join(matplotlib.get_data_path(), 'sample_data'))",
    ) {
        paths.push(dir.join("grace_hopper.jpg"));
    }
    Ok(paths)
}

/// Low-texture pictures: linear/radial gradients, flat designs with a few
/// shapes, skies with soft noise. Eight of each, all different.
fn low_texture_images(seed: u64) -> Vec<(String, RgbImage)> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let (w, h) = (640u32, 480u32);
    let colour = |rng: &mut ChaCha8Rng| -> [f32; 3] {
        std::array::from_fn(|_| rng.random_range(0.0..255.0))
    };
    let mut out = Vec::new();
    for i in 0..8 {
        let angle = (i as f32 * 45.0 + rng.random_range(-10.0..10.0)).to_radians();
        let stops: Vec<[f32; 3]> = (0..rng.random_range(2..4))
            .map(|_| colour(&mut rng))
            .collect();
        let radial = i % 3 == 2;
        let (cx, cy) = (
            rng.random_range(0.2..0.8) * w as f32,
            rng.random_range(0.2..0.8) * h as f32,
        );
        let image = RgbImage::from_fn(w, h, |x, y| {
            let t = if radial {
                ((x as f32 - cx).hypot(y as f32 - cy) / (w as f32 * 0.8)).min(1.0)
            } else {
                let (dx, dy) = (x as f32 / w as f32 - 0.5, y as f32 / h as f32 - 0.5);
                (0.5 + dx * angle.cos() + dy * angle.sin()).clamp(0.0, 1.0)
            };
            let span = t * (stops.len() - 1) as f32;
            let k = (span.floor() as usize).min(stops.len() - 2);
            let f = span - k as f32;
            Rgb(std::array::from_fn(|c| {
                (stops[k][c] * (1.0 - f) + stops[k + 1][c] * f) as u8
            }))
        });
        out.push((format!("gradient{i}"), image));
    }
    for i in 0..8 {
        let background = colour(&mut rng);
        let mut image = RgbImage::from_pixel(w, h, Rgb(background.map(|v| v as u8)));
        for _ in 0..rng.random_range(2..5) {
            let fill = Rgb(colour(&mut rng).map(|v| v as u8));
            let (x0, y0) = (rng.random_range(0..w - 100), rng.random_range(0..h - 100));
            let size = rng.random_range(40..200u32);
            let round = rng.random_bool(0.5);
            for y in y0..(y0 + size).min(h) {
                for x in x0..(x0 + size).min(w) {
                    let r = size as f32 / 2.0;
                    let inside =
                        !round || (x as f32 - x0 as f32 - r).hypot(y as f32 - y0 as f32 - r) <= r;
                    if inside {
                        image.put_pixel(x, y, fill);
                    }
                }
            }
        }
        out.push((format!("flat{i}"), image));
    }
    for i in 0..8 {
        let top = [
            rng.random_range(20.0..80.0),
            rng.random_range(60.0..130.0),
            rng.random_range(150.0..230.0),
        ];
        let bottom = [
            rng.random_range(170.0..230.0),
            rng.random_range(190.0..235.0),
            rng.random_range(225.0..255.0),
        ];
        // Soft noise: a coarse random grid, bilinearly upsampled.
        let grid: Vec<f32> = (0..8 * 8).map(|_| rng.random_range(-1.0..1.0)).collect();
        let amplitude = rng.random_range(8.0..25.0);
        let image = RgbImage::from_fn(w, h, |x, y| {
            let t = y as f32 / h as f32;
            let (u, v) = (x as f32 / w as f32 * 7.0, y as f32 / h as f32 * 7.0);
            let (x0, y0) = (u.floor() as usize, v.floor() as usize);
            let (fx, fy) = (u - x0 as f32, v - y0 as f32);
            let g = |xx: usize, yy: usize| grid[yy.min(7) * 8 + xx.min(7)];
            let noise = (g(x0, y0) * (1.0 - fx) + g(x0 + 1, y0) * fx) * (1.0 - fy)
                + (g(x0, y0 + 1) * (1.0 - fx) + g(x0 + 1, y0 + 1) * fx) * fy;
            Rgb(std::array::from_fn(|c| {
                (top[c] * (1.0 - t) + bottom[c] * t + amplitude * noise).clamp(0.0, 255.0) as u8
            }))
        });
        out.push((format!("sky{i}"), image));
    }
    out
}

fn embed_items(
    encoder: &Encoder,
    mean_encoder: &Encoder,
    pictures: &[(usize, Option<Edit>, RgbImage)],
) -> Result<Vec<Item>> {
    let spec = &encoder.spec().preprocess;
    let mut items = Vec::new();
    for chunk in pictures.chunks(16) {
        let prepared: Vec<PreparedImage> = chunk
            .iter()
            .map(|(_, _, rgb)| preprocess(rgb, spec))
            .collect::<Result<_, _>>()?;
        let with_evidence = ImageEvidence::of_prepared(encoder, &prepared)?;
        let means = mean_encoder.embed(&prepared)?;
        for (((source, edit, _), (cls, evidence)), mean) in
            chunk.iter().zip(with_evidence).zip(means)
        {
            items.push(Item {
                source: *source,
                edit: *edit,
                cls,
                mean,
                evidence,
            });
        }
    }
    Ok(items)
}

/// Pictures of a set: each original then its copies under `edits`.
fn with_copies(
    originals: &[RgbImage],
    edits: &[Edit],
) -> Result<Vec<(usize, Option<Edit>, RgbImage)>> {
    let mut out = Vec::new();
    for (source, rgb) in originals.iter().enumerate() {
        out.push((source, None, rgb.clone()));
        for edit in edits {
            out.push((source, Some(*edit), edit.apply(rgb)?));
        }
    }
    Ok(out)
}

/// Which candidate pairs a rule keeps.
enum Rule {
    Plain { threshold: f32 },
    Verified { candidate: f32 },
}

impl Rule {
    fn name(&self) -> String {
        match self {
            Rule::Plain { threshold } => format!("cosine >= {threshold:.2}"),
            Rule::Verified { candidate } => format!("cand {candidate:.2} + verify"),
        }
    }

    fn keeps(&self, pair: &Pair) -> bool {
        match self {
            Rule::Plain { threshold } => pair.cosine >= *threshold,
            Rule::Verified { candidate } => {
                pair.cosine >= *candidate && pair.check.is_some_and(|c| c.confirmed)
            }
        }
    }
}

/// Lowest candidate threshold evaluated: pairs below it are never checked.
const LOWEST_CANDIDATE: f32 = 0.5;

/// A candidate pair: from someone's 10 nearest neighbours (class-token
/// cosine, as the engine's default k), or a (copy, original) pair.
struct Pair {
    i: usize,
    j: usize,
    cosine: f32,
    check: Option<PairCheck>,
}

fn candidate_pairs(items: &[Item], options: &VerifyOptions) -> Vec<Pair> {
    const K: usize = 10;
    let n = items.len();
    let mut keys: HashSet<(usize, usize)> = HashSet::new();
    for i in 0..n {
        let mut scored: Vec<(f32, usize)> = (0..n)
            .filter(|&j| j != i)
            .map(|j| (dot(&items[i].cls, &items[j].cls), j))
            .collect();
        scored.sort_by(|a, b| b.0.total_cmp(&a.0));
        for &(_, j) in scored.iter().take(K) {
            keys.insert((i.min(j), i.max(j)));
        }
    }
    let mut keys: Vec<(usize, usize)> = keys.into_iter().collect();
    keys.sort_unstable();
    keys.into_iter()
        .map(|(i, j)| {
            let cosine = dot(&items[i].cls, &items[j].cls);
            let check = (cosine >= LOWEST_CANDIDATE)
                .then(|| compare(&items[i].evidence, &items[j].evidence, options));
            Pair {
                i,
                j,
                cosine,
                check,
            }
        })
        .collect()
}

struct Outcome {
    precision: f64,
    recall: f64,
    merged_originals: usize,
}

fn find(parent: &mut [usize], x: usize) -> usize {
    let mut root = x;
    while parent[root] != root {
        root = parent[root];
    }
    parent[x] = root;
    root
}

/// Recall = copies in their original's component; precision = kept edges
/// joining the same source; merged = pairs of distinct originals joined.
fn evaluate(items: &[Item], pairs: &[Pair], rule: &Rule) -> Outcome {
    let n = items.len();
    let mut parent: Vec<usize> = (0..n).collect();
    let (mut kept, mut correct) = (0usize, 0usize);
    for pair in pairs.iter().filter(|p| rule.keeps(p)) {
        kept += 1;
        correct += usize::from(items[pair.i].source == items[pair.j].source);
        let (a, b) = (find(&mut parent, pair.i), find(&mut parent, pair.j));
        parent[a] = b;
    }
    let original_of = |source: usize| {
        items
            .iter()
            .position(|it| it.source == source && it.edit.is_none())
    };
    let copies: Vec<usize> = (0..n).filter(|&i| items[i].edit.is_some()).collect();
    let found = copies
        .iter()
        .filter(|&&i| {
            let o = original_of(items[i].source).unwrap_or(i);
            find(&mut parent, i) == find(&mut parent, o)
        })
        .count();
    let originals: Vec<usize> = (0..n).filter(|&i| items[i].edit.is_none()).collect();
    let mut merged = 0;
    for (a, &x) in originals.iter().enumerate() {
        for &y in &originals[a + 1..] {
            merged += usize::from(find(&mut parent, x) == find(&mut parent, y));
        }
    }
    Outcome {
        precision: if kept == 0 {
            1.0
        } else {
            correct as f64 / kept as f64
        },
        recall: found as f64 / copies.len().max(1) as f64,
        merged_originals: merged,
    }
}

fn quantiles(mut v: Vec<f32>) -> String {
    if v.is_empty() {
        return "none".into();
    }
    v.sort_by(f32::total_cmp);
    let q = |p: f64| v[((v.len() - 1) as f64 * p).round() as usize];
    format!(
        "n={:4} min {:.2} p10 {:.2} p50 {:.2} p90 {:.2} max {:.2}",
        v.len(),
        q(0.0),
        q(0.1),
        q(0.5),
        q(0.9),
        q(1.0)
    )
}

/// Per edit: cosine to the original, and the verification verdict.
fn per_edit_table(items: &[Item], options: &VerifyOptions) {
    println!(
        "    {:<14} {:>8} {:>8} {:>9}  verification scores",
        "edit", "cos min", "cos mean", "verified"
    );
    for edit in MILD_EDITS.iter().chain(STRONG_EDITS) {
        let mut cos = Vec::new();
        let mut scores = Vec::new();
        let mut verified = 0;
        for item in items.iter().filter(|it| it.edit == Some(*edit)) {
            let Some(original) = items
                .iter()
                .find(|o| o.source == item.source && o.edit.is_none())
            else {
                continue;
            };
            cos.push(dot(&item.cls, &original.cls));
            let check = compare(&original.evidence, &item.evidence, options);
            verified += usize::from(check.confirmed);
            scores.push(check.score);
        }
        if cos.is_empty() {
            continue;
        }
        let min = cos.iter().copied().fold(f32::INFINITY, f32::min);
        let mean = cos.iter().sum::<f32>() / cos.len() as f32;
        println!(
            "    {:<14} {:>8.3} {:>8.3} {:>5}/{:<3}  {}",
            edit.name(),
            min,
            mean,
            verified,
            cos.len(),
            quantiles(scores)
        );
    }
}

/// Recall of (copy, original) pairs at the lowest threshold with no
/// cross-source pair above it, and at precision >= 0.99 (all pairs).
fn pooling_table(label: &str, items: &[Item]) {
    type PairSimilarity = fn(&Item, &Item) -> f32;
    let poolings: [(&str, PairSimilarity); 3] = [
        ("cls", |a, b| dot(&a.cls, &b.cls)),
        ("mean", |a, b| dot(&a.mean, &b.mean)),
        ("cls+mean", |a, b| {
            0.5 * (dot(&a.cls, &b.cls) + dot(&a.mean, &b.mean))
        }),
    ];
    for (name, similarity) in poolings {
        let mut positives = Vec::new();
        let mut negatives = Vec::new();
        for i in 0..items.len() {
            for j in i + 1..items.len() {
                let s = similarity(&items[i], &items[j]);
                if items[i].source != items[j].source {
                    negatives.push(s);
                } else if items[i].edit.is_none() || items[j].edit.is_none() {
                    positives.push(s);
                }
            }
        }
        let max_negative = negatives.iter().copied().fold(f32::NEG_INFINITY, f32::max);
        let recall_at =
            |t: f32| positives.iter().filter(|&&s| s >= t).count() as f64 / positives.len() as f64;
        let at_full_precision =
            positives.iter().filter(|&&s| s > max_negative).count() as f64 / positives.len() as f64;
        let mut best = 0.0f64;
        for step in 0..=400 {
            let t = step as f32 / 400.0;
            let tp = positives.iter().filter(|&&s| s >= t).count();
            let fp = negatives.iter().filter(|&&s| s >= t).count();
            if tp > 0 && tp as f64 / (tp + fp) as f64 >= 0.99 {
                best = best.max(recall_at(t));
            }
        }
        println!(
            "  {label:<12} {name:<9} max distinct {max_negative:.3}  recall@P=1 {at_full_precision:.3}  recall@P>=0.99 {best:.3}"
        );
    }
}

fn main() -> Result<()> {
    let python = std::env::var("VITRINE_PYTHON").unwrap_or_else(|_| "python3".into());
    let model_dir = default_model_root().join(DEFAULT_WHEEL.id);
    let encoder = Encoder::load(&model_dir).with_context(|| model_dir.display().to_string())?;
    let mut mean_encoder = Encoder::load(&model_dir)?;
    mean_encoder.set_pooling(Pooling::Mean);
    let options = VerifyOptions::default();

    let photo_files = photo_paths(&python)?;
    let mut photos = Vec::new();
    for path in &photo_files {
        photos.push(
            decode_path(path, &DecodeOptions::default())
                .with_context(|| path.display().to_string())?
                .rgb,
        );
    }
    let low_texture: Vec<RgbImage> = low_texture_images(7)
        .into_iter()
        .map(|(_, rgb)| rgb)
        .collect();
    if photos.is_empty() {
        bail!("no photos found");
    }
    println!(
        "{} photos, {} low-texture pictures",
        photos.len(),
        low_texture.len()
    );

    let mut all_items = Vec::new();
    for (label, originals) in [("photos", &photos), ("low-texture", &low_texture)] {
        for (severity, edits) in [("mild", MILD_EDITS), ("strong", STRONG_EDITS)] {
            let started = std::time::Instant::now();
            let items = embed_items(&encoder, &mean_encoder, &with_copies(originals, edits)?)?;
            println!(
                "\n== {label}, {severity} edits: {} pictures ({:.0} s to embed)",
                items.len(),
                started.elapsed().as_secs_f64()
            );
            println!(
                "    {:<22} {:>9} {:>7} {:>16}",
                "rule", "precision", "recall", "merged originals"
            );
            let rules = [
                Rule::Plain { threshold: 0.60 },
                Rule::Plain { threshold: 0.70 },
                Rule::Plain { threshold: 0.80 },
                Rule::Plain { threshold: 0.85 },
                Rule::Plain { threshold: 0.90 },
                Rule::Verified { candidate: 0.50 },
                Rule::Verified { candidate: 0.60 },
                Rule::Verified { candidate: 0.70 },
            ];
            let pairs = candidate_pairs(&items, &options);
            for rule in &rules {
                let o = evaluate(&items, &pairs, rule);
                println!(
                    "    {:<22} {:>9.3} {:>7.3} {:>16}",
                    rule.name(),
                    o.precision,
                    o.recall,
                    o.merged_originals
                );
            }
            let distinct: Vec<f32> = pairs
                .iter()
                .filter(|p| items[p.i].source != items[p.j].source)
                .filter_map(|p| p.check.map(|c| c.score))
                .collect();
            println!("    verification scores of distinct candidate pairs (cos >= {LOWEST_CANDIDATE}): {}", quantiles(distinct));
            per_edit_table(&items, &options);
            all_items.push((label, items));
        }
    }

    println!("\n== pooling (copy-original vs all distinct pairs, mild and strong)");
    for label in ["photos", "low-texture"] {
        // Mild and strong sets share their originals: keep them once.
        let mut merged: Vec<Item> = Vec::new();
        for (_, items) in all_items.iter_mut().filter(|(l, _)| *l == label) {
            let first_set = merged.is_empty();
            merged.extend(items.drain(..).filter(|it| first_set || it.edit.is_some()));
        }
        pooling_table(label, &merged);
    }

    println!("\n== calibration on the photos (engine `calibrate`, all photos sampled)");
    let work = tempfile::tempdir()?;
    let folder = work.path().join("photos");
    std::fs::create_dir_all(&folder)?;
    for path in &photo_files {
        let name = path.file_name().context("photo without a name")?;
        std::fs::copy(path, folder.join(name))?;
    }
    let mut store = Store::create_or_open(&work.path().join("store"), &fingerprint_of(&encoder))?;
    index_roots(
        &mut store,
        &encoder,
        &[folder],
        &IndexOptions::default(),
        &NoProgress,
    )?;
    let catalog = Catalog::load(&store)?;
    let report = calibrate(
        &store,
        &catalog,
        &encoder,
        &CalibrationOptions {
            sample: 1000,
            ..CalibrationOptions::default()
        },
        &NoProgress,
    )?;
    println!("{}", serde_json::to_string_pretty(&report)?);
    Ok(())
}
