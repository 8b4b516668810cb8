//! Shards and merge through the real binary, with the tiny test model: parts
//! embedded apart and merged make the store one index run makes (compared
//! with exact equality, embeddings bit for bit); merging is idempotent,
//! resumes after a kill, refuses another model's shards and removes only what
//! a complete partition no longer holds. pyarrow (the reference reader of
//! the Parquet format) reads back what vitrine wrote.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use common::{by_paths, write_image, Fixture};
use serde_json::Value;
use vitrine_engine::shards::Shard;

const PARTS: u32 = 3;

/// 36 distinct pictures over three splits, two byte-identical copies, a
/// truncated JPEG and a text file.
fn fill_images(fx: &Fixture) {
    let images = fx.images();
    for seed in 0..36u32 {
        let split = ["train", "val", "test"][seed as usize % 3];
        let label = ["cat", "dog"][seed as usize / 3 % 2];
        write_image(&images.join(format!("{split}/{label}/{seed:03}.png")), seed);
    }
    for (from, to) in [
        ("train/cat/000.png", "test/cat/copy-of-000.png"),
        ("val/cat/001.png", "val/dog/copy-of-001.png"),
    ] {
        std::fs::copy(images.join(from), images.join(to)).unwrap();
    }
    let jpeg_start = [0xFF, 0xD8, 0xFF, 0xE0, 0x00, 0x10, b'J', b'F', b'I', b'F'];
    std::fs::write(images.join("train/dog/broken.jpg"), jpeg_start).unwrap();
    std::fs::write(images.join("notes.txt"), "not a picture").unwrap();
}

fn succeed(out: std::process::Output) -> String {
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// Writes every part of the fixture's images into `folder`, returns the
/// files in part order.
fn write_parts(fx: &Fixture, folder: &Path) -> Vec<PathBuf> {
    write_parts_of(fx, folder, &[fx.images()])
}

fn write_parts_of(fx: &Fixture, folder: &Path, roots: &[PathBuf]) -> Vec<PathBuf> {
    (0..PARTS)
        .map(|index| {
            let mut command =
                fx.command(&["shard", "--part", &format!("{index}/{PARTS}"), "--out"]);
            command.arg(folder).args(roots);
            succeed(command.output().unwrap());
            folder.join(format!("part-{index}-of-{PARTS}.parquet"))
        })
        .collect()
}

fn merge(fx: &Fixture, store: &Path, files: &[PathBuf]) -> String {
    let mut command = fx.command(&["merge"]);
    command.arg("--store").arg(store).args(files);
    succeed(command.output().unwrap())
}

/// The store's whole content, as `export --format parquet` writes it.
fn exported(fx: &Fixture, store: &Path) -> (Shard, Vec<u8>) {
    let file = fx.dir.path().join("export.parquet");
    let mut command = fx.command(&["export", "--format", "parquet", "--output"]);
    command.arg(&file).arg("--store").arg(store);
    succeed(command.output().unwrap());
    let shard = vitrine_parquet::read_shard(&file).unwrap();
    (shard, std::fs::read(&file).unwrap())
}

fn json(fx: &Fixture, store: &Path, args: &[&str]) -> Value {
    let mut command = fx.command(args);
    command.args(["--format", "json", "--store"]).arg(store);
    serde_json::from_str(&succeed(command.output().unwrap())).unwrap()
}

#[test]
fn merged_parts_make_the_store_one_index_run_makes() {
    let fx = Fixture::new();
    fill_images(&fx);
    let files = write_parts(&fx, &fx.dir.path().join("shards"));
    let merged = fx.dir.path().join("merged");
    // A folder stands for the shard files in it.
    let summary = merge(&fx, &merged, &[fx.dir.path().join("shards")]);
    assert!(summary.contains("3 shards merged: 38 new"), "{summary}");
    let indexed = fx.store();
    fx.index();

    // Records, embeddings (bit for bit) and failed files are equal.
    let (from_shards, _) = exported(&fx, &merged);
    let (from_index, _) = exported(&fx, &indexed);
    assert_eq!(from_shards.images.len(), 38);
    assert_eq!(from_shards.failures.len(), 1);
    assert_eq!(from_shards, from_index);

    // So are the reports, once ids are named by path (clusters and labels
    // read rows in path order, so they need nothing more).
    for args in [
        &["duplicates", "--threshold", "1", "--no-verify"][..],
        &["leaks", "--threshold", "1", "--no-verify"][..],
        &["clusters", "-k", "4"][..],
        &["labels", "suggest", "--min-confidence", "0"][..],
        &["labels", "suspects"][..],
    ] {
        let shards_report = by_paths(&json(&fx, &merged, args));
        let index_report = by_paths(&json(&fx, &indexed, args));
        assert_eq!(shards_report, index_report, "{args:?}");
    }
    let leaks = json(&fx, &merged, &["leaks", "--threshold", "1", "--no-verify"]);
    assert_eq!(leaks["leaks"].as_array().unwrap().len(), 1, "{leaks}");

    // A part written again is the same file, byte for byte.
    let again = write_parts(&fx, &fx.dir.path().join("again"));
    for (first, second) in files.iter().zip(&again) {
        assert_eq!(
            std::fs::read(first).unwrap(),
            std::fs::read(second).unwrap()
        );
    }
}

#[test]
fn merging_again_changes_nothing_and_a_killed_merge_resumes() {
    let fx = Fixture::new();
    fill_images(&fx);
    for seed in 100..220u32 {
        write_image(&fx.images().join(format!("unsorted/{seed}.png")), seed);
    }
    // One commit per image, so that a kill lands between commits.
    std::fs::write(
        fx.dir.path().join("vitrine.toml"),
        "[index]\ncommit_every = 1\n",
    )
    .unwrap();
    let files = write_parts(&fx, &fx.dir.path().join("shards"));
    let clean = fx.dir.path().join("clean");
    merge(&fx, &clean, &files);
    let (_, clean_bytes) = exported(&fx, &clean);

    let second = merge(&fx, &clean, &files);
    assert!(
        second.contains("0 new, 0 changed, 158 unchanged, 0 removed"),
        "{second}"
    );
    assert_eq!(exported(&fx, &clean).1, clean_bytes);

    // Kill merges at growing delays until one is caught part-way.
    let mut caught_part_way = false;
    for (attempt, delay_ms) in [5u64, 10, 20, 40, 80, 160, 320, 640, 1280]
        .into_iter()
        .enumerate()
    {
        let store = fx.dir.path().join(format!("killed-{attempt}"));
        let mut command = fx.command(&["merge"]);
        command.arg("--store").arg(&store).args(&files);
        let mut child = command
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(Duration::from_millis(delay_ms));
        child.kill().unwrap();
        child.wait().unwrap();
        // The killed store opens; how far did the merge get?
        let status = fx
            .command(&["status", "--format", "json", "--store"])
            .arg(&store)
            .output()
            .unwrap();
        let images = match serde_json::from_slice::<Value>(&status.stdout) {
            Ok(status) => status["images"].as_u64().unwrap(),
            Err(_) => continue, // killed before the store was created
        };
        merge(&fx, &store, &files);
        assert_eq!(
            exported(&fx, &store).1,
            clean_bytes,
            "killed after {delay_ms} ms"
        );
        if images > 0 && images < 158 {
            caught_part_way = true;
            break;
        }
    }
    assert!(caught_part_way, "no kill landed part-way through a merge");
}

#[test]
fn a_shard_of_another_model_is_refused_and_the_store_is_untouched() {
    let fx = Fixture::new();
    fill_images(&fx);
    let files = write_parts(&fx, &fx.dir.path().join("shards"));
    merge(&fx, &fx.store(), &files);
    let (_, before) = exported(&fx, &fx.store());

    // The same checkpoint imported under another id is another model.
    let other_model = fx.dir.path().join("other-model");
    let checkpoint = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../vitrine-model/tests/fixtures/families/dinov2");
    succeed(fx.run(&[
        "model",
        "import",
        checkpoint.to_str().unwrap(),
        "--out",
        other_model.to_str().unwrap(),
        "--id",
        "tiny-other",
        "--crop",
        "32",
        "--resize",
        "36",
    ]));
    let foreign_folder = fx.dir.path().join("foreign");
    let foreign = foreign_folder.join("part-0-of-1.parquet");
    let out = Command::new(common::BIN)
        .arg("--model")
        .arg(&other_model)
        .env("VITRINE_CONFIG", fx.dir.path().join("vitrine.toml"))
        .args(["shard", "--part", "0/1", "--out"])
        .arg(&foreign_folder)
        .arg(fx.images())
        .output()
        .unwrap();
    succeed(out);

    let refused = fx.command(&["merge"]).arg(&foreign).output().unwrap();
    assert!(!refused.status.success());
    let message = String::from_utf8_lossy(&refused.stderr);
    assert!(
        message.contains("tiny-other")
            && message.contains("tiny-dinov2")
            && message.contains("model_id"),
        "{message}"
    );
    assert_eq!(exported(&fx, &fx.store()).1, before);

    // Two models in one merge: refused before a new store is made.
    let fresh = fx.dir.path().join("fresh");
    let mut mixed = fx.command(&["merge"]);
    mixed
        .arg("--store")
        .arg(&fresh)
        .arg(&files[0])
        .arg(&foreign);
    let out = mixed.output().unwrap();
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("cannot be merged"));
    assert!(!fresh.exists());

    // A part that is not I/N with I < N is refused, naming the form.
    let mut command = fx.command(&["shard", "--part", "3/3", "--out"]);
    command.arg(fx.dir.path().join("parts")).arg(fx.images());
    let out = command.output().unwrap();
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("I/N"));
}

#[test]
fn a_complete_partition_removes_vanished_files_and_a_partial_one_does_not() {
    let fx = Fixture::new();
    fill_images(&fx);
    merge(
        &fx,
        &fx.store(),
        &write_parts(&fx, &fx.dir.path().join("first")),
    );
    assert_eq!(fx.status()["images"], 38);

    // This test's own copy of a picture is taken away, then every part
    // embedded again.
    std::fs::remove_file(fx.images().join("train/dog/003.png")).unwrap();
    let files = write_parts(&fx, &fx.dir.path().join("second"));
    let partial = merge(&fx, &fx.store(), &files[..2]);
    assert!(partial.contains("0 removed"), "{partial}");
    assert_eq!(fx.status()["images"], 38);
    let complete = merge(&fx, &fx.store(), &files);
    assert!(complete.contains("1 removed"), "{complete}");
    assert_eq!(fx.status()["images"], 37);
}

#[test]
fn a_folder_holding_two_runs_is_refused_and_an_emptied_root_is_cleared() {
    let fx = Fixture::new();
    fill_images(&fx);
    let second_root = fx.dir.path().join("more");
    for seed in 300..303u32 {
        write_image(&second_root.join(format!("{seed}.png")), seed);
    }
    std::fs::write(second_root.join("cut.png"), b"\x89PNG\r\n").unwrap();
    let roots = [fx.images(), second_root.clone()];
    merge(
        &fx,
        &fx.store(),
        &write_parts_of(&fx, &fx.dir.path().join("first"), &roots),
    );
    let status = fx.status();
    assert_eq!(status["images"], 41);
    assert_eq!(status["errors"], 2, "{status}");

    // This test's own second folder is emptied; the new run's files share a
    // folder with a part of another partition.
    for entry in std::fs::read_dir(&second_root).unwrap() {
        std::fs::remove_file(entry.unwrap().path()).unwrap();
    }
    let second = fx.dir.path().join("second");
    write_parts_of(&fx, &second, &roots);
    let mut stray = fx.command(&["shard", "--part", "0/2", "--out"]);
    stray.arg(&second).args(&roots);
    succeed(stray.output().unwrap());
    let mut mixed = fx.command(&["merge"]);
    mixed.arg(&second);
    let out = mixed.output().unwrap();
    assert!(!out.status.success());
    let message = String::from_utf8_lossy(&out.stderr);
    assert!(message.contains("different runs"), "{message}");
    assert_eq!(fx.status()["images"], 41);

    std::fs::remove_file(second.join("part-0-of-2.parquet")).unwrap();
    let complete = merge(&fx, &fx.store(), &[second]);
    assert!(complete.contains("3 removed"), "{complete}");
    let status = fx.status();
    assert_eq!(status["images"], 38);
    // The emptied folder's failed file is gone from the errors too.
    assert_eq!(status["errors"], 1, "{status}");
}

#[test]
fn pyarrow_reads_what_vitrine_wrote() {
    let Some(python) = std::env::var_os("VITRINE_PYTHON") else {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must provide VITRINE_PYTHON with pyarrow"
        );
        eprintln!("skipping: VITRINE_PYTHON is not set");
        return;
    };
    let fx = Fixture::new();
    fill_images(&fx);
    let files = write_parts(&fx, &fx.dir.path().join("shards"));

    // pyarrow 26 (tools/requirements-test.txt) is the reference reader.
    let script = r#"
import json, sys
import pyarrow.parquet as pq
out = {"schema": {}, "rows": 0, "embeddings": {}, "errors": {}, "metadata": {}}
for name in sys.argv[1:]:
    table = pq.read_table(name)
    out["schema"] = {f.name: str(f.type) for f in table.schema}
    out["rows"] += table.num_rows
    meta = pq.read_metadata(name).metadata
    out["metadata"] = {k.decode(): v.decode() for k, v in meta.items() if k.startswith(b"vitrine.")}
    for row in table.to_pylist():
        if row["error"] is None:
            out["embeddings"][row["path"]] = row["embedding"]
        else:
            out["errors"][row["path"]] = row["error"]
print(json.dumps(out))
"#;
    let out = Command::new(&python)
        .arg("-c")
        .arg(script)
        .args(&files)
        .output()
        .unwrap();
    let read: Value = serde_json::from_str(&succeed(out)).unwrap();

    // What vitrine makes of each file on its own (`embed`, one JSON line each).
    let mut image_files = Vec::new();
    for entry in walk(&fx.images()) {
        let rel = entry
            .strip_prefix(fx.images())
            .unwrap()
            .to_str()
            .unwrap()
            .to_owned();
        if rel.ends_with(".png") {
            image_files.push((rel, entry));
        }
    }
    let mut command = fx.command(&["embed"]);
    command.args(image_files.iter().map(|(_, path)| path));
    let lines = succeed(command.output().unwrap());
    let embedded: Vec<Value> = lines
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let dim = embedded[0]["dimension"].as_u64().unwrap();

    assert_eq!(read["rows"], 39);
    assert_eq!(
        read["schema"]["embedding"],
        format!("fixed_size_list<item: float not null>[{dim}]")
    );
    assert_eq!(read["schema"]["content_hash"], "fixed_size_binary[32]");
    assert_eq!(read["schema"]["path"], "string");
    assert_eq!(read["schema"]["width"], "uint32");
    assert_eq!(read["metadata"]["vitrine.format_version"], "1");
    assert!(read["errors"]["train/dog/broken.jpg"]
        .as_str()
        .unwrap()
        .contains("truncated"));
    assert_eq!(read["embeddings"].as_object().unwrap().len(), 38);
    for ((rel, _), line) in image_files.iter().zip(&embedded) {
        let from_parquet: Vec<f32> = read["embeddings"][rel.as_str()]
            .as_array()
            .unwrap_or_else(|| panic!("{rel} is not in the shards"))
            .iter()
            .map(|v| v.as_f64().unwrap() as f32)
            .collect();
        let from_embed: Vec<f32> = line["embedding"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap() as f32)
            .collect();
        assert_eq!(from_parquet, from_embed, "{rel}");
    }
}

fn walk(folder: &Path) -> Vec<PathBuf> {
    let mut found = Vec::new();
    for entry in std::fs::read_dir(folder).unwrap() {
        let path = entry.unwrap().path();
        if path.is_dir() {
            found.extend(walk(&path));
        } else {
            found.push(path);
        }
    }
    found.sort();
    found
}
