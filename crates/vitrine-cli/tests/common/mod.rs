//! What the end-to-end tests share: a temporary folder with a tiny
//! DINOv2-layout model (the transformers-made fixture of the model crate,
//! imported through the real binary), a store and images, and commands of the
//! real `vitrine` binary on them.

// Each test binary uses its own part of this module.
#![allow(dead_code)]

use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

use image::{ImageBuffer, Rgb};
use serde_json::Value;

pub const BIN: &str = env!("CARGO_BIN_EXE_vitrine");

pub struct Fixture {
    pub dir: tempfile::TempDir,
}

impl Fixture {
    pub fn new() -> Self {
        let fixture = Fixture {
            dir: tempfile::tempdir().unwrap(),
        };
        std::fs::write(fixture.dir.path().join("vitrine.toml"), "").unwrap();
        let checkpoint = Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("../vitrine-model/tests/fixtures/families/dinov2");
        let out = fixture.run(&[
            "model",
            "import",
            checkpoint.to_str().unwrap(),
            "--out",
            fixture.model_dir().to_str().unwrap(),
            "--id",
            "tiny-dinov2",
            "--crop",
            "32",
            "--resize",
            "36",
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        fixture
    }

    pub fn model_dir(&self) -> PathBuf {
        self.dir.path().join("model")
    }

    pub fn store(&self) -> PathBuf {
        self.dir.path().join("store")
    }

    pub fn images(&self) -> PathBuf {
        self.dir.path().join("images")
    }

    pub fn command(&self, args: &[&str]) -> Command {
        let mut command = Command::new(BIN);
        command
            .arg("--store")
            .arg(self.store())
            .arg("--model")
            .arg(self.model_dir())
            .args(args)
            .env("VITRINE_CONFIG", self.dir.path().join("vitrine.toml"));
        command
    }

    pub fn run(&self, args: &[&str]) -> Output {
        self.command(args).output().unwrap()
    }

    pub fn index(&self) -> String {
        let out = self.run(&["index", self.images().to_str().unwrap()]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8(out.stdout).unwrap()
    }

    pub fn status(&self) -> Value {
        let out = self.run(&["status", "--errors", "--format", "json"]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        serde_json::from_slice(&out.stdout).unwrap()
    }
}

/// A distinct picture for every seed: stripes, a disc and a colour ramp.
pub fn write_image(path: &Path, seed: u32) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    let (w, h) = (48 + seed % 17, 40 + seed % 13);
    let image = ImageBuffer::from_fn(w, h, |x, y| {
        let stripe = ((x * (1 + seed % 5) + y * (seed % 3)) / 4 % 2) as u8 * 90;
        let dx = x as i32 - (seed % w) as i32;
        let dy = y as i32 - (seed * 7 % h) as i32;
        let disc = if dx * dx + dy * dy < 120 { 120 } else { 0 };
        Rgb([
            stripe.wrapping_add((seed * 37) as u8),
            (disc as u8).wrapping_add((x * 3) as u8),
            (y * 5) as u8 ^ (seed * 11) as u8,
        ])
    });
    image.save(path).unwrap();
}

/// `vitrine serve` on an ephemeral loopback port; returns once it listens,
/// with its address.
pub fn start_service(fx: &Fixture) -> (Child, String) {
    let mut child = fx
        .command(&["serve", "--port", "0", "--bind", "127.0.0.1"])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    let listening = lines.next().expect("the service printed nothing").unwrap();
    let url = listening
        .strip_prefix("vitrine serves on ")
        .and_then(|url| url.strip_suffix('/'))
        .filter(|url| url.starts_with("http://127.0.0.1:"))
        .unwrap_or_else(|| panic!("unexpected first line: {listening}"))
        .to_owned();
    (child, url)
}

/// Stops the service gracefully (SIGTERM) and waits for it.
pub fn stop(mut service: Child) {
    let pid = service.id().to_string();
    assert!(Command::new("kill")
        .args(["-TERM", &pid])
        .status()
        .unwrap()
        .success());
    let started = Instant::now();
    while service.try_wait().unwrap().is_none() {
        assert!(
            started.elapsed() < Duration::from_secs(60),
            "the service did not stop"
        );
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// A report with image ids replaced by paths: ids are assigned in commit
/// order, which differs between a merge and an index run of the same files.
pub fn by_paths(report: &Value) -> Value {
    let mut paths = BTreeMap::new();
    collect_paths(report, &mut paths);
    let mut named = report.clone();
    rename_ids(&mut named, &paths);
    named
}

fn collect_paths(value: &Value, paths: &mut BTreeMap<u64, String>) {
    match value {
        Value::Object(map) => {
            if let (Some(id), Some(path)) = (map.get("id").and_then(Value::as_u64), map.get("path"))
            {
                paths.insert(id, path.as_str().unwrap().to_owned());
            }
            map.values().for_each(|v| collect_paths(v, paths));
        }
        Value::Array(items) => items.iter().for_each(|v| collect_paths(v, paths)),
        _ => {}
    }
}

fn rename_ids(value: &mut Value, paths: &BTreeMap<u64, String>) {
    match value {
        Value::Object(map) => {
            for key in ["id", "copy_of"] {
                if let Some(id) = map.get(key).and_then(Value::as_u64) {
                    map.insert(key.into(), Value::String(paths[&id].clone()));
                }
            }
            map.values_mut().for_each(|v| rename_ids(v, paths));
        }
        Value::Array(items) => items.iter_mut().for_each(|v| rename_ids(v, paths)),
        _ => {}
    }
}
