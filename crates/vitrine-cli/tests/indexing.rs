//! End-to-end indexing through the real `vitrine` binary, a real sled store
//! and real image files. A tiny DINOv2-layout model (the transformers-made
//! fixture of the model crate) keeps forward passes cheap: these tests are
//! about the store and the ingest pipeline, not embedding quality.

mod common;

use std::collections::BTreeMap;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;

use common::{write_image, Fixture};
use image::{ImageBuffer, Rgb};

fn count(line: &str, what: &str) -> usize {
    let pattern = format!(" {what}");
    let end = line
        .find(&pattern)
        .unwrap_or_else(|| panic!("no `{what}` in {line}"));
    line[..end]
        .rsplit(|c: char| !c.is_ascii_digit())
        .next()
        .unwrap()
        .parse()
        .unwrap()
}

#[test]
fn incremental_reindex_counts_exactly() {
    let fx = Fixture::new();
    for i in 0..12 {
        let split = ["train", "val", "test"][i % 3];
        write_image(
            &fx.images().join(format!("{split}/cls{}/img{i}.png", i % 2)),
            i as u32,
        );
    }
    let first = fx.index();
    assert_eq!(count(&first, "new"), 12, "{first}");
    assert_eq!(fx.status()["images"], 12);

    // Add two, change one, delete one, rename one.
    write_image(&fx.images().join("train/cls0/added1.png"), 100);
    write_image(&fx.images().join("val/cls1/added2.png"), 101);
    std::thread::sleep(Duration::from_millis(20));
    write_image(&fx.images().join("train/cls0/img0.png"), 102);
    std::fs::remove_file(fx.images().join("val/cls1/img1.png")).unwrap();
    std::fs::rename(
        fx.images().join("test/cls0/img2.png"),
        fx.images().join("test/cls0/renamed.png"),
    )
    .unwrap();

    let second = fx.index();
    assert_eq!(count(&second, "new"), 3, "{second}"); // two added, one renamed
    assert_eq!(count(&second, "changed"), 1, "{second}");
    assert_eq!(count(&second, "unchanged"), 9, "{second}");
    assert_eq!(count(&second, "removed"), 2, "{second}"); // deleted, old name
    assert_eq!(count(&second, "failed"), 0, "{second}");
    // The renamed file's bytes were already embedded.
    assert!(second.contains("(1 embedded by reuse"), "{second}");
    let status = fx.status();
    assert_eq!(status["images"], 13);
    assert_eq!(status["splits"]["train"], 5);

    let third = fx.index();
    assert_eq!(count(&third, "new"), 0);
    assert_eq!(count(&third, "unchanged"), 13);
}

#[test]
fn bad_files_are_recorded_and_do_not_stop_the_run() {
    let fx = Fixture::new();
    let dir = fx.images().join("train/mixed");
    write_image(&dir.join("good1.png"), 1);
    write_image(&dir.join("good2.png"), 2);
    std::fs::write(dir.join("empty.jpg"), b"").unwrap();
    std::fs::write(
        dir.join("notes.jpg"),
        b"this is a text file, not a picture\n",
    )
    .unwrap();
    let mut jpeg = Vec::new();
    image::DynamicImage::ImageRgb8(ImageBuffer::from_fn(64, 64, |x, y| {
        Rgb([x as u8, y as u8, 9])
    }))
    .write_to(
        &mut std::io::Cursor::new(&mut jpeg),
        image::ImageFormat::Jpeg,
    )
    .unwrap();
    std::fs::write(dir.join("truncated.jpg"), &jpeg[..jpeg.len() / 2]).unwrap();
    std::fs::write(dir.join("bomb.png"), png_header_claiming(30_000, 30_000)).unwrap();

    let summary = fx.index();
    assert_eq!(count(&summary, "new"), 2, "{summary}");
    assert_eq!(count(&summary, "failed"), 4, "{summary}");
    let status = fx.status();
    assert_eq!(status["images"], 2);
    let reasons: BTreeMap<String, String> = status["error_list"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["path"]
                    .as_str()
                    .unwrap()
                    .rsplit('/')
                    .next()
                    .unwrap()
                    .to_owned(),
                e["reason"].as_str().unwrap().to_owned(),
            )
        })
        .collect();
    assert!(reasons["empty.jpg"].contains("empty"), "{reasons:?}");
    assert!(
        reasons["notes.jpg"].contains("not a recognised image"),
        "{reasons:?}"
    );
    assert!(
        reasons["truncated.jpg"].contains("truncated")
            || reasons["truncated.jpg"].contains("corrupt"),
        "{reasons:?}"
    );
    assert!(
        reasons["bomb.png"].contains("over the limit"),
        "{reasons:?}"
    );
    // Fixing a file clears its error on the next run.
    std::fs::remove_file(dir.join("notes.jpg")).unwrap();
    fx.index();
    assert_eq!(fx.status()["errors"], 3);
}

/// A small PNG whose header declares `width × height`: a decompression bomb
/// must be refused from its header, before any pixel is inflated.
fn png_header_claiming(width: u32, height: u32) -> Vec<u8> {
    let mut header = Vec::new();
    header.extend_from_slice(&width.to_be_bytes());
    header.extend_from_slice(&height.to_be_bytes());
    header.extend_from_slice(&[8, 2, 0, 0, 0]);
    let mut png = b"\x89PNG\r\n\x1a\n".to_vec();
    for (kind, data) in [
        (&b"IHDR"[..], &header[..]),
        (b"IDAT", &[0x78, 0x9c, 0x03, 0x00][..]),
        (b"IEND", &[][..]),
    ] {
        let mut chunk = kind.to_vec();
        chunk.extend_from_slice(data);
        png.extend_from_slice(&(data.len() as u32).to_be_bytes());
        png.extend_from_slice(&chunk);
        png.extend_from_slice(&crc32(&chunk).to_be_bytes());
    }
    png
}

fn crc32(bytes: &[u8]) -> u32 {
    let mut crc = 0xffff_ffffu32;
    for &byte in bytes {
        crc ^= u32::from(byte);
        for _ in 0..8 {
            crc = if crc & 1 != 0 {
                (crc >> 1) ^ 0xedb8_8320
            } else {
                crc >> 1
            };
        }
    }
    !crc
}

/// Everything a finished store holds, keyed by path: record fields that do
/// not depend on when a file was indexed, and the embedding.
fn store_contents(fx: &Fixture) -> BTreeMap<String, (String, Vec<f32>)> {
    let store = vitrine_store::Store::open(&fx.store()).unwrap();
    let mut contents = BTreeMap::new();
    for entry in store.records() {
        let (id, record) = entry.unwrap();
        let summary = format!(
            "{:?} {:?} {:?} {:?} {}x{} {}",
            record.split,
            record.label,
            record.content_hash,
            record.pixel_hash,
            record.width,
            record.height,
            record.byte_size
        );
        let embedding = store.embedding(id).unwrap().unwrap();
        assert!(contents
            .insert(record.rel_path.clone(), (summary, embedding))
            .is_none());
    }
    assert_eq!(store.len(), contents.len(), "one record per image");
    contents
}

#[test]
fn killed_runs_resume_to_the_same_store_as_a_clean_run() {
    let small_commits = "[index]\ncommit_every = 8\nbatch_size = 4\n";
    let n_images = 400;
    let fill = |fx: &Fixture| {
        // Small commits so that kills land both between and inside commits.
        std::fs::write(fx.dir.path().join("vitrine.toml"), small_commits).unwrap();
        for i in 0..n_images {
            let split = ["train", "val", "test"][i % 3];
            write_image(
                &fx.images().join(format!("{split}/c{}/p{i:03}.png", i % 4)),
                i as u32,
            );
        }
        std::fs::write(fx.images().join("train/c0/broken.png"), b"nope").unwrap();
    };

    let clean = Fixture::new();
    fill(&clean);
    let started = std::time::Instant::now();
    clean.index();
    let clean_run = started.elapsed();
    println!("a clean run takes {:.2} s", clean_run.as_secs_f64());
    let expected = store_contents(&clean);

    let fx = Fixture::new();
    fill(&fx);
    let mut killed_while_running = 0;
    for _ in 0..6 {
        let mut child = fx
            .command(&["index", fx.images().to_str().unwrap()])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(clean_run / 4);
        if child.try_wait().unwrap().is_none() {
            killed_while_running += 1;
        }
        let _ = child.kill(); // SIGKILL on Unix
        let _ = child.wait();
        // The store opens after every kill.
        let out = fx.run(&["status", "--format", "json"]);
        assert!(
            out.status.success(),
            "store did not open after a kill: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    assert!(
        killed_while_running >= 3,
        "only {killed_while_running} kills hit a running index"
    );
    let last = fx.index();
    assert_eq!(count(&last, "failed"), 1, "{last}");

    let resumed = store_contents(&fx);
    assert_eq!(resumed.len(), n_images);
    assert_eq!(
        resumed.keys().collect::<Vec<_>>(),
        expected.keys().collect::<Vec<_>>()
    );
    for (path, (summary, embedding)) in &resumed {
        let (expected_summary, expected_embedding) = &expected[path];
        assert_eq!(summary, expected_summary, "{path}");
        // Batches differ between a resumed and a clean run; a forward pass
        // may differ in the last bits with batch composition.
        let max_diff = embedding
            .iter()
            .zip(expected_embedding)
            .map(|(a, b)| (a - b).abs())
            .fold(0f32, f32::max);
        assert!(max_diff < 1e-5, "{path}: embeddings differ by {max_diff}");
    }
    assert_eq!(fx.status()["errors"], 1);
}

/// Runs `vitrine ARGS`, expects it to be refused with exit code 2, and
/// returns what it said on standard error.
fn refused(fx: &Fixture, args: &[&str]) -> String {
    let out = fx.run(args);
    assert_eq!(
        out.status.code(),
        Some(2),
        "{args:?} was not refused: {}",
        String::from_utf8_lossy(&out.stdout)
    );
    String::from_utf8(out.stderr).unwrap()
}

fn path_str(path: &Path) -> &str {
    path.to_str().unwrap()
}

#[test]
fn a_file_root_is_refused_naming_the_folder_to_give() {
    let fx = Fixture::new();
    let photo = fx.images().join("train/cat/photo.png");
    write_image(&photo, 1);
    let said = refused(&fx, &["index", path_str(&photo)]);
    assert!(
        said.contains(&format!(
            "{} is a file; give the folder that holds it",
            photo.display()
        )),
        "{said}"
    );
    assert!(!fx.store().exists(), "a refused run created a store");
}

#[test]
fn refused_roots_leave_no_new_store_and_record_nothing() {
    let fx = Fixture::new();
    write_image(&fx.images().join("train/cat/a.png"), 1);
    let missing = fx.dir.path().join("nosuchdir");
    let said = refused(&fx, &["index", path_str(&missing)]);
    assert!(
        said.contains(&format!("root {} does not exist", missing.display())),
        "{said}"
    );
    assert!(!fx.store().exists(), "a refused run created a store");

    // A good root beside a bad one: the run is refused before either is indexed.
    refused(&fx, &["index", path_str(&fx.images()), path_str(&missing)]);
    assert!(!fx.store().exists(), "a refused run created a store");

    // Into an existing store, a refused run records no root and no image.
    fx.index();
    let other = fx.dir.path().join("other");
    write_image(&other.join("b.png"), 2);
    refused(&fx, &["index", path_str(&other), path_str(&missing)]);
    let status = fx.status();
    assert_eq!(status["images"], 1);
    assert_eq!(
        status["roots"],
        serde_json::json!([fx.images().canonicalize().unwrap().to_str().unwrap()])
    );
}

#[test]
fn status_counts_images_per_root_and_marks_empty_roots() {
    let fx = Fixture::new();
    write_image(&fx.images().join("train/cat/a.png"), 1);
    write_image(&fx.images().join("train/dog/b.png"), 2);
    let empty = fx.dir.path().join("empty");
    std::fs::create_dir(&empty).unwrap();
    let notes = fx.dir.path().join("notes");
    std::fs::create_dir(&notes).unwrap();
    std::fs::write(notes.join("README"), "no pictures here\n").unwrap();
    let out = fx.run(&[
        "index",
        path_str(&fx.images()),
        path_str(&empty),
        path_str(&notes),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );

    let [images, empty, notes] =
        [fx.images(), empty, notes].map(|p| p.canonicalize().unwrap().display().to_string());
    let status = fx.status();
    assert_eq!(
        status["images_per_root"],
        serde_json::json!({ &images: 2, &empty: 0, &notes: 0 })
    );
    // `roots` keeps its shape: the paths, in the order they were added.
    assert_eq!(
        status["roots"],
        serde_json::json!([&images, &empty, &notes])
    );

    let out = fx.run(&["status"]);
    let table = String::from_utf8(out.stdout).unwrap();
    for line in [
        format!("root: {images} (2 images)"),
        format!("root: {empty} (no images)"),
        format!("root: {notes} (no images)"),
    ] {
        assert!(table.lines().any(|l| l == line), "no `{line}` in\n{table}");
    }
}

#[test]
fn index_counts_skipped_links_and_special_files_and_names_loops() {
    use std::os::unix::fs::symlink;

    let fx = Fixture::new();
    let cats = fx.images().join("train/cat");
    write_image(&cats.join("a.png"), 1);
    symlink("a.png", cats.join("alias.png")).unwrap();
    symlink(".", fx.images().join("loop")).unwrap();
    symlink("..", cats.join("up")).unwrap();
    let made = Command::new("mkfifo")
        .arg(cats.join("pipe"))
        .status()
        .unwrap();
    assert!(made.success());

    let first = fx.index();
    assert!(
        first.contains("3 symbolic links and 1 special file skipped"),
        "{first}"
    );
    assert!(first.contains("--follow-symlinks follows them"), "{first}");
    assert_eq!(count(&first, "new"), 1, "{first}");
    assert_eq!(count(&first, "failed"), 0, "{first}");

    let out = fx.run(&["index", "--follow-symlinks", path_str(&fx.images())]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let followed = String::from_utf8(out.stdout).unwrap();
    assert!(followed.contains("1 special file skipped"), "{followed}");
    assert!(!followed.contains("symbolic link"), "{followed}");
    assert_eq!(count(&followed, "new"), 1, "{followed}"); // alias.png
    assert_eq!(count(&followed, "failed"), 2, "{followed}"); // the two loops
    let reasons: BTreeMap<String, String> = fx.status()["error_list"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["path"].as_str().unwrap().to_owned(),
                e["reason"].as_str().unwrap().to_owned(),
            )
        })
        .collect();
    assert_eq!(
        reasons,
        BTreeMap::from([
            (
                "loop".to_owned(),
                "symbolic link loop back to the root folder".to_owned()
            ),
            (
                "train/cat/up".to_owned(),
                "symbolic link loop back to train".to_owned()
            ),
        ])
    );
}
