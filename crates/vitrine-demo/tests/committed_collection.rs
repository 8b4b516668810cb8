//! The committed demo-images/ must be exactly what `vitrine-demo-gen` writes, and every claim
//! in its ground-truth.json must hold when the files are read back with the `image` crate
//! (an independent decoder, not our generator's code).

use std::collections::{BTreeMap, BTreeSet};
use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{ensure, Context, Result};
use image::RgbImage;
use serde_json::Value;

/// Written by hand, so neither generated nor compared.
const HAND_WRITTEN: &str = "README.md";
/// Files the generator writes next to the photos.
const METADATA: [&str; 2] = ["ground-truth.json", "manifest-example.csv"];

fn committed_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../demo-images")
}

/// Relative path (with `/`) -> bytes for every file under `root` except the hand-written one.
fn read_tree(root: &Path) -> Result<BTreeMap<String, Vec<u8>>> {
    let mut files = BTreeMap::new();
    for entry in walkdir::WalkDir::new(root) {
        let entry = entry?;
        if !entry.file_type().is_file() {
            continue;
        }
        let relative = entry.path().strip_prefix(root)?;
        let relative = relative
            .components()
            .map(|part| part.as_os_str().to_string_lossy())
            .collect::<Vec<_>>()
            .join("/");
        if relative != HAND_WRITTEN {
            files.insert(relative, fs::read(entry.path())?);
        }
    }
    Ok(files)
}

#[test]
fn regenerating_reproduces_the_committed_collection_bit_for_bit() -> Result<()> {
    let out_dir = tempfile::tempdir()?;
    let run = Command::new(env!("CARGO_BIN_EXE_vitrine-demo-gen"))
        .arg(out_dir.path())
        .output()
        .context("running vitrine-demo-gen")?;
    ensure!(
        run.status.success(),
        "vitrine-demo-gen failed ({}): {}",
        run.status,
        String::from_utf8_lossy(&run.stderr)
    );
    let fresh = read_tree(out_dir.path())?;
    let committed = read_tree(&committed_dir())?;
    let fresh_paths: BTreeSet<&String> = fresh.keys().collect();
    let committed_paths: BTreeSet<&String> = committed.keys().collect();
    assert_eq!(
        fresh_paths, committed_paths,
        "the generator writes a different set of files than demo-images/ holds; rerun vitrine-demo-gen"
    );
    for (path, bytes) in &fresh {
        assert!(
            committed[path] == *bytes,
            "{path} differs from the committed file; rerun vitrine-demo-gen"
        );
    }
    Ok(())
}

struct Collection {
    root: PathBuf,
    truth: Value,
}

impl Collection {
    fn load() -> Result<Self> {
        let root = committed_dir();
        let truth = serde_json::from_slice(&fs::read(root.join("ground-truth.json"))?)?;
        Ok(Collection { root, truth })
    }

    fn section(&self, name: &str) -> Vec<&Value> {
        self.truth[name]
            .as_array()
            .unwrap_or_else(|| panic!("ground truth has no array `{name}`"))
            .iter()
            .collect()
    }

    fn bytes(&self, path: &str) -> Vec<u8> {
        fs::read(self.root.join(path)).unwrap_or_else(|error| panic!("reading {path}: {error}"))
    }

    fn decode(&self, path: &str) -> RgbImage {
        image::load_from_memory(&self.bytes(path))
            .unwrap_or_else(|error| panic!("decoding {path}: {error}"))
            .to_rgb8()
    }
}

fn text(value: &Value) -> &str {
    value
        .as_str()
        .unwrap_or_else(|| panic!("expected a string, found {value}"))
}

fn group_files(group: &Value) -> Vec<&str> {
    group["files"]
        .as_array()
        .unwrap_or_else(|| panic!("group without files: {group}"))
        .iter()
        .map(text)
        .collect()
}

fn folder(path: &str) -> &str {
    path.rsplit_once('/').map_or("", |(folder, _)| folder)
}

/// Every file on disk is listed once in `files`, and every path the ground truth names exists.
#[test]
fn ground_truth_lists_exactly_the_files_on_disk() -> Result<()> {
    let collection = Collection::load()?;
    let on_disk: BTreeSet<String> = read_tree(&collection.root)?
        .into_keys()
        .filter(|path| !METADATA.contains(&path.as_str()))
        .collect();
    let listed: BTreeSet<String> = collection
        .section("files")
        .into_iter()
        .map(|file| text(&file["path"]).to_owned())
        .collect();
    assert_eq!(listed, on_disk);

    let mut named = Vec::new();
    for group in collection
        .section("exact_duplicates")
        .into_iter()
        .chain(collection.section("pixel_identical_reencodings"))
    {
        named.extend(group_files(group));
    }
    for case in collection.section("near_duplicates") {
        named.extend([text(&case["original"]), text(&case["edited"])]);
    }
    for case in collection.section("leaks") {
        named.extend([text(&case["leaked"]), text(&case["train_counterpart"])]);
    }
    for case in collection
        .section("unlabelled")
        .into_iter()
        .chain(collection.section("broken"))
    {
        named.push(text(&case["path"]));
    }
    for path in &named {
        assert!(
            collection.root.join(path).is_file(),
            "{path} is named but missing"
        );
    }
    // Planted cases are kept apart so each file has one unambiguous role.
    let distinct: BTreeSet<&&str> = named.iter().collect();
    assert_eq!(
        distinct.len(),
        named.len(),
        "a file takes part in two planted cases"
    );
    Ok(())
}

#[test]
fn every_labelled_file_sits_in_its_split_and_label_folder_and_counts_match() -> Result<()> {
    let collection = Collection::load()?;
    let mut counted: BTreeMap<(String, String), u64> = BTreeMap::new();
    for file in collection.section("files") {
        let path = text(&file["path"]);
        match (file["split"].as_str(), file["label"].as_str()) {
            (Some(split), Some(label)) => {
                assert_eq!(folder(path), format!("{split}/{label}"));
                if file["format"] != "broken" {
                    *counted
                        .entry((split.to_owned(), label.to_owned()))
                        .or_default() += 1;
                }
            }
            _ => assert_eq!(folder(path), "unsorted"),
        }
    }
    for ((split, label), count) in counted {
        assert_eq!(
            collection.truth["image_counts"][&split][&label].as_u64(),
            Some(count),
            "image_counts for {split}/{label}"
        );
    }
    Ok(())
}

#[test]
fn every_image_decodes_and_every_broken_file_is_broken_as_listed() -> Result<()> {
    let collection = Collection::load()?;
    let broken: BTreeMap<&str, &str> = collection
        .section("broken")
        .into_iter()
        .map(|case| (text(&case["path"]), text(&case["failure"])))
        .collect();
    for file in collection.section("files") {
        let path = text(&file["path"]);
        let bytes = collection.bytes(path);
        match broken.get(path) {
            // JPEG markers per ITU-T T.81 Annex B: SOI FFD8 starts a file, SOS FFDA starts
            // the compressed scan, EOI FFD9 ends it. A cut-off scan has SOI and SOS but no EOI.
            // (Lenient decoders, the `image` crate's among them, still return a partly grey
            // picture, so the check is on the bytes.)
            Some(&"truncated-jpeg") => {
                assert!(
                    bytes.starts_with(&[0xFF, 0xD8, 0xFF]),
                    "{path}: no SOI marker"
                );
                assert!(
                    bytes.windows(2).any(|pair| pair == [0xFF, 0xDA]),
                    "{path}: cut before the scan"
                );
                assert!(!bytes.ends_with(&[0xFF, 0xD9]), "{path}: ends with EOI");
            }
            Some(&"empty-file") => assert!(bytes.is_empty(), "{path}"),
            Some(&"not-an-image") => {
                assert!(image::load_from_memory(&bytes).is_err(), "{path} decodes");
                assert!(std::str::from_utf8(&bytes).is_ok(), "{path} is not text");
            }
            Some(other) => panic!("{path}: unknown failure kind {other}"),
            None => {
                let decoded =
                    image::load_from_memory(&bytes).with_context(|| format!("decoding {path}"))?;
                // The demo's photos are 256-480 px (demo-images/README.md); planted resizes (60%) and frames (+32 px) step outside it.
                let longest = decoded.width().max(decoded.height());
                assert!((150..=520).contains(&longest), "{path} is {longest} px");
            }
        }
    }
    Ok(())
}

#[test]
fn duplicates_and_reencodings_are_what_they_claim() {
    let collection = Collection::load().expect("ground truth loads");
    for group in collection.section("exact_duplicates") {
        let files = group_files(group);
        assert!(files.len() >= 2);
        let first = collection.bytes(files[0]);
        for path in &files[1..] {
            assert_eq!(
                collection.bytes(path),
                first,
                "{path} is not a byte copy of {}",
                files[0]
            );
            assert_eq!(folder(path), folder(files[0]));
        }
    }
    for group in collection.section("pixel_identical_reencodings") {
        let files = group_files(group);
        assert_eq!(files.len(), 2);
        assert!(files.iter().all(|path| path.ends_with(".png")));
        assert_ne!(collection.bytes(files[0]), collection.bytes(files[1]));
        assert!(
            collection.decode(files[0]) == collection.decode(files[1]),
            "{} and {} decode to different pixels",
            files[0],
            files[1]
        );
    }
}

#[test]
fn near_duplicates_stay_in_one_split_and_leaks_cross_from_train() {
    let collection = Collection::load().expect("ground truth loads");
    for case in collection.section("near_duplicates") {
        let (original, edited) = (text(&case["original"]), text(&case["edited"]));
        assert_eq!(folder(original), folder(edited));
        assert_ne!(collection.bytes(original), collection.bytes(edited));
        if text(&case["edit"]) == "border" {
            let (before, after) = (collection.decode(original), collection.decode(edited));
            assert_eq!(
                after.width(),
                before.width() + 32,
                "a 16 px frame on both sides"
            );
        }
    }
    for case in collection.section("leaks") {
        let (leaked, counterpart) = (text(&case["leaked"]), text(&case["train_counterpart"]));
        let (leaked_split, leaked_label) = folder(leaked).split_once('/').expect("split/label");
        let (train, counterpart_label) = folder(counterpart).split_once('/').expect("split/label");
        assert!(["val", "test"].contains(&leaked_split), "{leaked}");
        assert_eq!(train, "train");
        assert_eq!(leaked_label, counterpart_label);
        if text(&case["kind"]) == "exact-copy" {
            assert_eq!(collection.bytes(leaked), collection.bytes(counterpart));
        }
    }
    let labels: Vec<&str> = collection.section("labels").into_iter().map(text).collect();
    for case in collection.section("unlabelled") {
        assert_eq!(folder(text(&case["path"])), "unsorted");
        assert!(labels.contains(&text(&case["true_label"])));
    }
}

/// Zero-mean, unit-length 24x24 RGB thumbnail: a crude whole-picture descriptor.
fn thumbnail_descriptor(image: &RgbImage) -> Vec<f64> {
    let small = image::imageops::resize(image, 24, 24, image::imageops::FilterType::Triangle);
    let mut values: Vec<f64> = small.as_raw().iter().map(|&v| f64::from(v)).collect();
    let mean = values.iter().sum::<f64>() / values.len() as f64;
    values.iter_mut().for_each(|v| *v -= mean);
    let norm = values.iter().map(|v| v * v).sum::<f64>().sqrt();
    values.iter_mut().for_each(|v| *v /= norm);
    values
}

/// Planted copies that keep the whole picture (re-encodes, resizes, brightening) must be more
/// alike than any two unrelated photos, by exact brute-force cosine similarity of thumbnails;
/// this guards against renders so similar that they would read as unplanned near-duplicates.
#[test]
fn whole_picture_copies_are_closer_than_any_two_unrelated_photos() {
    let collection = Collection::load().expect("ground truth loads");
    let paths: Vec<&str> = collection
        .section("files")
        .into_iter()
        .filter(|file| file["format"] != "broken")
        .map(|file| text(&file["path"]))
        .collect();
    let index: BTreeMap<&str, usize> = paths.iter().enumerate().map(|(i, p)| (*p, i)).collect();
    let descriptors: Vec<Vec<f64>> = paths
        .iter()
        .map(|path| thumbnail_descriptor(&collection.decode(path)))
        .collect();
    let similarity = |a: usize, b: usize| -> f64 {
        descriptors[a]
            .iter()
            .zip(&descriptors[b])
            .map(|(x, y)| x * y)
            .sum()
    };

    // Union-find over every planted relation, so that related files are never "unrelated".
    let mut parent: Vec<usize> = (0..paths.len()).collect();
    fn root(parent: &mut [usize], mut i: usize) -> usize {
        while parent[i] != i {
            parent[i] = parent[parent[i]];
            i = parent[i];
        }
        i
    }
    let mut related = Vec::new();
    let mut whole_picture_pairs = Vec::new();
    for group in collection
        .section("exact_duplicates")
        .into_iter()
        .chain(collection.section("pixel_identical_reencodings"))
    {
        let files = group_files(group);
        for other in &files[1..] {
            related.push((index[files[0]], index[other]));
        }
    }
    for case in collection.section("near_duplicates") {
        let pair = (index[text(&case["original"])], index[text(&case["edited"])]);
        related.push(pair);
        if ["jpeg-reencode", "resize", "brighten"].contains(&text(&case["edit"])) {
            whole_picture_pairs.push(pair);
        }
    }
    for case in collection.section("leaks") {
        let pair = (
            index[text(&case["train_counterpart"])],
            index[text(&case["leaked"])],
        );
        related.push(pair);
        if text(&case["kind"]) != "crop" {
            whole_picture_pairs.push(pair);
        }
    }
    for (a, b) in related {
        let (root_a, root_b) = (root(&mut parent, a), root(&mut parent, b));
        parent[root_a] = root_b;
    }

    let mut closest_unrelated = (f64::MIN, 0, 0);
    for a in 0..paths.len() {
        for b in a + 1..paths.len() {
            if root(&mut parent, a) != root(&mut parent, b) {
                let s = similarity(a, b);
                if s > closest_unrelated.0 {
                    closest_unrelated = (s, a, b);
                }
            }
        }
    }
    for (a, b) in whole_picture_pairs {
        assert!(
            similarity(a, b) > closest_unrelated.0,
            "planted pair {} / {} ({:.3}) is no closer than unrelated {} / {} ({:.3})",
            paths[a],
            paths[b],
            similarity(a, b),
            paths[closest_unrelated.1],
            paths[closest_unrelated.2],
            closest_unrelated.0
        );
    }
}

#[test]
fn example_manifest_rows_match_the_folders() -> Result<()> {
    let collection = Collection::load()?;
    let mut reader = csv::Reader::from_path(collection.root.join("manifest-example.csv"))?;
    assert_eq!(reader.headers()?, vec!["path", "split", "label"]);
    let mut rows = 0;
    for record in reader.records() {
        let record = record?;
        let (path, split, label) = (&record[0], &record[1], &record[2]);
        assert!(collection.root.join(path).is_file(), "{path}");
        assert_eq!(folder(path), format!("{split}/{label}"));
        rows += 1;
    }
    assert!(rows > 0);
    Ok(())
}
