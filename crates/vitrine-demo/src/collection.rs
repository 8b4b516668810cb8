//! The demo collection: which photos exist, which copies are planted, and their ground truth.

use std::collections::BTreeMap;
use std::fs;
use std::path::Path;

use anyhow::{Context, Result};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::derive::{encode, encode_jpeg, encode_png, Derivation, Format, PngSettings};
use crate::products::{render, Label};

/// Every byte of the collection follows from this seed ("KilnKnot" in ASCII).
pub const SEED: u64 = 0x4b69_6c6e_4b6e_6f74;

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Split {
    Train,
    Val,
    Test,
}

impl Split {
    pub const ALL: [Split; 3] = [Split::Train, Split::Val, Split::Test];

    pub fn name(self) -> &'static str {
        match self {
            Split::Train => "train",
            Split::Val => "val",
            Split::Test => "test",
        }
    }

    fn rendered_per_label(self) -> usize {
        match self {
            Split::Train => 20,
            Split::Val | Split::Test => 5,
        }
    }
}

/// One freshly rendered photo: the `index`-th of its label in its split.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
struct Slot {
    split: Split,
    label: Label,
    index: usize,
}

const fn slot(split: Split, label: Label, index: usize) -> Slot {
    Slot {
        split,
        label,
        index,
    }
}

use Label::{Basket, Bowl, Mug, Planter, Scarf, Vase};
use Split::{Test, Train, Val};

/// Photos copied byte for byte into the same folder, with the number of extra copies.
const EXACT_DUPLICATES: [(Slot, usize); 4] = [
    (slot(Train, Mug, 2), 1),
    (slot(Val, Bowl, 1), 1),
    (slot(Train, Scarf, 4), 1),
    (slot(Train, Basket, 6), 2),
];

/// PNG photos saved a second time with other compression settings.
const PIXEL_IDENTICAL_PNGS: [Slot; 3] = [
    slot(Train, Vase, 3),
    slot(Test, Planter, 2),
    slot(Train, Mug, 9),
];

/// Further photos stored as PNG so that the format mix is realistic.
const OTHER_PNGS: [Slot; 3] = [
    slot(Train, Bowl, 10),
    slot(Val, Scarf, 4),
    slot(Test, Mug, 1),
];

/// Edited copies placed next to their original.
const NEAR_DUPLICATES: [(Slot, Derivation); 10] = [
    (
        slot(Train, Bowl, 5),
        Derivation::JpegReencode { quality: 30 },
    ),
    (
        slot(Test, Scarf, 0),
        Derivation::JpegReencode { quality: 30 },
    ),
    (slot(Train, Vase, 7), Derivation::Resize { percent: 60 }),
    (slot(Val, Mug, 3), Derivation::Resize { percent: 60 }),
    (
        slot(Train, Planter, 4),
        Derivation::Crop {
            left: 18,
            top: 0,
            right: 0,
            bottom: 0,
        },
    ),
    (
        slot(Train, Basket, 11),
        Derivation::Crop {
            left: 0,
            top: 12,
            right: 10,
            bottom: 0,
        },
    ),
    (slot(Train, Scarf, 12), Derivation::Brighten { percent: 20 }),
    (slot(Val, Vase, 2), Derivation::Brighten { percent: 20 }),
    (slot(Train, Mug, 14), Derivation::Border { pixels: 16 }),
    (slot(Test, Bowl, 3), Derivation::Border { pixels: 16 }),
];

/// Training photos whose copies also appear in an evaluation split.
const LEAKS: [(Slot, Split, Derivation); 6] = [
    (slot(Train, Mug, 17), Val, Derivation::ExactCopy),
    (slot(Train, Planter, 8), Test, Derivation::ExactCopy),
    (
        slot(Train, Bowl, 13),
        Test,
        Derivation::JpegReencode { quality: 70 },
    ),
    (
        slot(Train, Basket, 15),
        Val,
        Derivation::JpegReencode { quality: 70 },
    ),
    (
        slot(Train, Vase, 16),
        Test,
        Derivation::Crop {
            left: 0,
            top: 0,
            right: 0,
            bottom: 8,
        },
    ),
    (
        slot(Train, Scarf, 18),
        Val,
        Derivation::Resize { percent: 75 },
    ),
];

#[derive(Clone, Copy, Serialize)]
#[serde(rename_all = "kebab-case")]
enum Breakage {
    /// A real JPEG cut off partway through its compressed data.
    TruncatedJpeg,
    /// Zero bytes with a `.jpg` name.
    EmptyFile,
    /// Plain text with a `.png` name.
    NotAnImage,
}

const BROKEN: [(Split, Label, Breakage); 3] = [
    (Train, Vase, Breakage::TruncatedJpeg),
    (Val, Planter, Breakage::EmptyFile),
    (Test, Scarf, Breakage::NotAnImage),
];

/// True classes of the photos in unsorted/, which carry no label.
const UNSORTED: [Label; 8] = [Mug, Bowl, Vase, Basket, Scarf, Planter, Vase, Scarf];

/// Which unsorted photo (by position in `UNSORTED`) is stored as PNG.
const UNSORTED_PNG: usize = 3;

#[derive(Clone, Copy, Serialize)]
#[serde(rename_all = "lowercase")]
enum FileKind {
    Jpeg,
    Png,
    Broken,
}

struct Entry {
    split: Option<Split>,
    label: Option<Label>,
    extension: &'static str,
    kind: FileKind,
    bytes: Vec<u8>,
}

impl Entry {
    fn image(split: Option<Split>, label: Option<Label>, bytes: Vec<u8>, format: Format) -> Self {
        Entry {
            split,
            label,
            extension: format.extension(),
            kind: match format {
                Format::Jpeg => FileKind::Jpeg,
                Format::Png => FileKind::Png,
            },
            bytes,
        }
    }

    fn format(&self) -> Option<Format> {
        match self.kind {
            FileKind::Jpeg => Some(Format::Jpeg),
            FileKind::Png => Some(Format::Png),
            FileKind::Broken => None,
        }
    }
}

#[derive(Serialize)]
struct FileRecord {
    path: String,
    split: Option<Split>,
    label: Option<Label>,
    format: FileKind,
}

#[derive(Serialize)]
struct DuplicateGroup {
    files: Vec<String>,
}

#[derive(Serialize)]
struct NearDuplicate {
    original: String,
    edited: String,
    edit: &'static str,
    detail: String,
}

#[derive(Serialize)]
struct Leak {
    leaked: String,
    train_counterpart: String,
    kind: &'static str,
    detail: String,
}

#[derive(Serialize)]
struct Unlabelled {
    path: String,
    true_label: Label,
}

#[derive(Serialize)]
struct BrokenFile {
    path: String,
    failure: Breakage,
}

/// The ground-truth file; `README.md` in demo-images/ documents every field.
#[derive(Serialize)]
struct GroundTruth {
    schema_version: u32,
    scenario: &'static str,
    /// Hexadecimal, so that JSON readers with 53-bit numbers see it exactly.
    seed: String,
    labels: Vec<Label>,
    splits: Vec<Split>,
    image_counts: BTreeMap<Split, BTreeMap<Label, usize>>,
    files: Vec<FileRecord>,
    exact_duplicates: Vec<DuplicateGroup>,
    pixel_identical_reencodings: Vec<DuplicateGroup>,
    near_duplicates: Vec<NearDuplicate>,
    leaks: Vec<Leak>,
    unlabelled: Vec<Unlabelled>,
    broken: Vec<BrokenFile>,
}

pub struct Collection {
    entries: Vec<Entry>,
    paths: Vec<String>,
    ground_truth: GroundTruth,
}

/// Renders photo number `render_number`; each number has its own random stream.
fn render_photo(label: Label, format: Format, render_number: u64) -> image::RgbImage {
    let mut rng = ChaCha8Rng::seed_from_u64(SEED);
    rng.set_stream(render_number);
    // PNG is lossless and so much larger: keep those photos at the small end of the range.
    let width = match format {
        Format::Jpeg => rng.random_range(256..=392),
        Format::Png => rng.random_range(256..=288),
    };
    let aspect: f32 = rng.random_range(0.75..1.33);
    let height = ((width as f32 * aspect) as u32).clamp(256, 480);
    render(label, width, height, &mut rng)
}

pub fn build() -> Result<Collection> {
    let mut entries: Vec<Entry> = Vec::new();
    let mut slots: BTreeMap<Slot, usize> = BTreeMap::new();
    let mut render_number = 0u64;
    let mut next_render = || {
        render_number += 1;
        render_number
    };

    for label in Label::ALL {
        for split in Split::ALL {
            for index in 0..split.rendered_per_label() {
                let this = slot(split, label, index);
                let format = if PIXEL_IDENTICAL_PNGS.contains(&this) || OTHER_PNGS.contains(&this) {
                    Format::Png
                } else {
                    Format::Jpeg
                };
                let photo = render_photo(label, format, next_render());
                slots.insert(this, entries.len());
                entries.push(Entry::image(
                    Some(split),
                    Some(label),
                    encode(&photo, format)?,
                    format,
                ));
            }
        }
    }

    let mut exact_duplicates = Vec::new();
    for (original, extra_copies) in EXACT_DUPLICATES {
        let mut group = vec![slots[&original]];
        for _ in 0..extra_copies {
            group.push(add_derived(
                &mut entries,
                slots[&original],
                Derivation::ExactCopy,
                original.split,
            )?);
        }
        exact_duplicates.push(group);
    }

    let mut pixel_identical = Vec::new();
    for original in PIXEL_IDENTICAL_PNGS {
        let original_index = slots[&original];
        let pixels = image::load_from_memory(&entries[original_index].bytes)
            .context("decoding a png to store it again")?
            .to_rgb8();
        let bytes = encode_png(&pixels, PngSettings::PaethFilter)?;
        entries.push(Entry::image(
            Some(original.split),
            Some(original.label),
            bytes,
            Format::Png,
        ));
        pixel_identical.push(vec![original_index, entries.len() - 1]);
    }

    let mut near_duplicates = Vec::new();
    for (original, edit) in NEAR_DUPLICATES {
        let edited = add_derived(&mut entries, slots[&original], edit, original.split)?;
        near_duplicates.push((slots[&original], edited, edit));
    }

    let mut leaks = Vec::new();
    for (original, destination, derivation) in LEAKS {
        let leaked = add_derived(&mut entries, slots[&original], derivation, destination)?;
        leaks.push((leaked, slots[&original], derivation));
    }

    let mut unlabelled = Vec::new();
    for (position, label) in UNSORTED.into_iter().enumerate() {
        let format = if position == UNSORTED_PNG {
            Format::Png
        } else {
            Format::Jpeg
        };
        let photo = render_photo(label, format, next_render());
        entries.push(Entry::image(None, None, encode(&photo, format)?, format));
        unlabelled.push((entries.len() - 1, label));
    }

    let mut broken = Vec::new();
    for (split, label, breakage) in BROKEN {
        let (bytes, extension) = match breakage {
            Breakage::TruncatedJpeg => {
                let mut bytes = encode_jpeg(&render_photo(label, Format::Jpeg, next_render()), 85)?;
                bytes.truncate(bytes.len() * 11 / 20);
                (bytes, "jpg")
            }
            Breakage::EmptyFile => (Vec::new(), "jpg"),
            Breakage::NotAnImage => (
                b"Kiln & Knot product photo placeholder: re-shoot pending.\n".to_vec(),
                "png",
            ),
        };
        entries.push(Entry {
            split: Some(split),
            label: Some(label),
            extension,
            kind: FileKind::Broken,
            bytes,
        });
        broken.push((entries.len() - 1, breakage));
    }

    let paths = assign_paths(&entries);
    let path = |index: usize| paths[index].clone();
    let paths_of = |group: Vec<usize>| DuplicateGroup {
        files: group.into_iter().map(path).collect(),
    };

    let mut image_counts: BTreeMap<Split, BTreeMap<Label, usize>> = BTreeMap::new();
    for entry in &entries {
        if let (Some(split), Some(label), Some(_)) = (entry.split, entry.label, entry.format()) {
            *image_counts
                .entry(split)
                .or_default()
                .entry(label)
                .or_default() += 1;
        }
    }
    let mut files: Vec<FileRecord> = entries
        .iter()
        .enumerate()
        .map(|(index, entry)| FileRecord {
            path: path(index),
            split: entry.split,
            label: entry.label,
            format: entry.kind,
        })
        .collect();
    files.sort_by(|a, b| a.path.cmp(&b.path));

    let ground_truth = GroundTruth {
        schema_version: 1,
        scenario: "Kiln & Knot product photos (invented)",
        seed: format!("{SEED:#018x}"),
        labels: Label::ALL.to_vec(),
        splits: Split::ALL.to_vec(),
        image_counts,
        files,
        exact_duplicates: exact_duplicates.into_iter().map(paths_of).collect(),
        pixel_identical_reencodings: pixel_identical.into_iter().map(paths_of).collect(),
        near_duplicates: near_duplicates
            .into_iter()
            .map(|(original, edited, edit)| NearDuplicate {
                original: path(original),
                edited: path(edited),
                edit: edit.kind(),
                detail: edit.detail(),
            })
            .collect(),
        leaks: leaks
            .into_iter()
            .map(|(leaked, counterpart, derivation)| Leak {
                leaked: path(leaked),
                train_counterpart: path(counterpart),
                kind: derivation.kind(),
                detail: derivation.detail(),
            })
            .collect(),
        unlabelled: unlabelled
            .into_iter()
            .map(|(index, true_label)| Unlabelled {
                path: path(index),
                true_label,
            })
            .collect(),
        broken: broken
            .into_iter()
            .map(|(index, failure)| BrokenFile {
                path: path(index),
                failure,
            })
            .collect(),
    };
    Ok(Collection {
        entries,
        paths,
        ground_truth,
    })
}

/// Appends a copy of `entries[original]` made by `derivation`, filed under `split`.
fn add_derived(
    entries: &mut Vec<Entry>,
    original: usize,
    derivation: Derivation,
    split: Split,
) -> Result<usize> {
    let source = &entries[original];
    let format = source
        .format()
        .context("planted copies are made from decodable photos only")?;
    let (bytes, format) = derivation.apply(&source.bytes, format)?;
    let label = source.label;
    entries.push(Entry::image(Some(split), label, bytes, format));
    Ok(entries.len() - 1)
}

/// Names files `<label>-NNN` (unsorted: `untitled-NN`) with numbers shuffled so that a
/// name never reveals whether a file is an original, a planted copy or broken.
fn assign_paths(entries: &[Entry]) -> Vec<String> {
    let mut rng = ChaCha8Rng::seed_from_u64(SEED);
    rng.set_stream(u64::MAX);
    let mut paths = vec![String::new(); entries.len()];
    let groups: Vec<Option<Label>> = std::iter::once(None).chain(Label::ALL.map(Some)).collect();
    for group in groups {
        let members: Vec<usize> = (0..entries.len())
            .filter(|&index| entries[index].label == group)
            .collect();
        let mut numbers: Vec<usize> = (1..=members.len()).collect();
        numbers.shuffle(&mut rng);
        for (index, number) in members.into_iter().zip(numbers) {
            let entry = &entries[index];
            paths[index] = match (entry.split, entry.label) {
                (Some(split), Some(label)) => format!(
                    "{}/{}/{}-{number:03}.{}",
                    split.name(),
                    label.name(),
                    label.name(),
                    entry.extension
                ),
                _ => format!("unsorted/untitled-{number:02}.{}", entry.extension),
            };
        }
    }
    paths
}

/// Rows of the example manifest: the first two photos (by path) of a few folders.
fn manifest_example(collection: &Collection) -> Result<Vec<u8>> {
    let folders = ["train/mug", "train/scarf", "val/bowl", "test/basket"];
    let mut writer = csv::Writer::from_writer(Vec::new());
    writer.write_record(["path", "split", "label"])?;
    for folder in folders {
        let rows = collection
            .ground_truth
            .files
            .iter()
            .filter(|file| {
                file.path.starts_with(folder) && !matches!(file.format, FileKind::Broken)
            })
            .take(2);
        for file in rows {
            let split = file.split.map(Split::name).unwrap_or_default();
            let label = file.label.map(Label::name).unwrap_or_default();
            writer.write_record([file.path.as_str(), split, label])?;
        }
    }
    writer
        .into_inner()
        .context("finishing the example manifest")
}

/// Replaces the generated parts of `out_dir` (split folders, unsorted/, ground truth,
/// example manifest); other files there, such as README.md, are left alone.
pub fn write(collection: &Collection, out_dir: &Path) -> Result<()> {
    for folder in ["train", "val", "test", "unsorted"] {
        let folder = out_dir.join(folder);
        if folder.exists() {
            fs::remove_dir_all(&folder)
                .with_context(|| format!("removing {}", folder.display()))?;
        }
    }
    for (entry, path) in collection.entries.iter().zip(&collection.paths) {
        let target = out_dir.join(path);
        if let Some(parent) = target.parent() {
            fs::create_dir_all(parent).with_context(|| format!("creating {}", parent.display()))?;
        }
        fs::write(&target, &entry.bytes)
            .with_context(|| format!("writing {}", target.display()))?;
    }
    let mut json = serde_json::to_vec_pretty(&collection.ground_truth)?;
    json.push(b'\n');
    let ground_truth_path = out_dir.join("ground-truth.json");
    fs::write(&ground_truth_path, json)
        .with_context(|| format!("writing {}", ground_truth_path.display()))?;
    let manifest_path = out_dir.join("manifest-example.csv");
    fs::write(&manifest_path, manifest_example(collection)?)
        .with_context(|| format!("writing {}", manifest_path.display()))?;
    Ok(())
}

impl Collection {
    /// One line per split and label with image counts, then the planted cases.
    pub fn summary(&self) -> String {
        let truth = &self.ground_truth;
        let mut lines = Vec::new();
        for (split, counts) in &truth.image_counts {
            let per_label: Vec<String> = counts
                .iter()
                .map(|(label, count)| format!("{}={count}", label.name()))
                .collect();
            lines.push(format!("{:5} {}", split.name(), per_label.join(" ")));
        }
        let total_bytes: usize = self.entries.iter().map(|entry| entry.bytes.len()).sum();
        lines.push(format!(
            "files={} unsorted={} broken={} exact-duplicate-groups={} pixel-identical-pairs={} \
             near-duplicates={} leaks={} bytes={total_bytes}",
            self.entries.len(),
            truth.unlabelled.len(),
            truth.broken.len(),
            truth.exact_duplicates.len(),
            truth.pixel_identical_reencodings.len(),
            truth.near_duplicates.len(),
            truth.leaks.len(),
        ));
        lines.join("\n")
    }
}
