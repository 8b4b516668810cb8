//! Shared test fixtures: a small folder of generated images indexed into a
//! real sled store with the default model, a real server on an ephemeral
//! port, and a small HTTP client.

#![allow(dead_code)] // each test binary uses a different part

use std::path::{Path, PathBuf};
use std::sync::{Arc, OnceLock};
use std::time::Duration;

use actix_web::dev::ServerHandle;
use anyhow::{Context, Result};
use image::{Rgb, RgbImage};
use serde_json::Value;
use vitrine_engine::duplicates::DuplicateOptions;
use vitrine_engine::ingest::{fingerprint_of, index_roots, IndexOptions};
use vitrine_engine::progress::NoProgress;
use vitrine_model::encoder::Encoder;
use vitrine_model::fetch::{default_model_root, DEFAULT_WHEEL};
use vitrine_service::{Model, ServeSettings, Service, ServiceConfig};
use vitrine_store::{ImageId, Store};

pub const TOKEN: &str = "test-token-0123456789";
pub const LABELS: [&str; 3] = ["kettle", "lamp", "teapot"];

/// The default model, loaded once per test binary.
pub fn encoder() -> Arc<Encoder> {
    static ENCODER: OnceLock<Arc<Encoder>> = OnceLock::new();
    ENCODER
        .get_or_init(|| {
            let dir = default_model_root().join(DEFAULT_WHEEL.id);
            Arc::new(Encoder::load(&dir).unwrap_or_else(|e| {
                panic!(
                    "the default model is needed at {} (run `vitrine model fetch` or set VITRINE_MODEL_DIR): {e}",
                    dir.display()
                )
            }))
        })
        .clone()
}

/// A picture that depends on `seed` in colour and pattern (stripes, rings
/// or checks), so that images of one label resemble each other.
pub fn picture(label: usize, seed: u32, size: u32) -> RgbImage {
    let base: [[u8; 3]; 3] = [[200, 60, 40], [40, 160, 70], [50, 70, 190]];
    let colour = base[label % 3];
    let period = 6 + (seed % 5) * 3;
    let shift = seed * 7;
    RgbImage::from_fn(size, size, |x, y| {
        let (cx, cy) = (x as i64 - size as i64 / 2, y as i64 - size as i64 / 2);
        let on = match label % 3 {
            0 => ((x + shift) / period) & 1 == 0,
            1 => ((((cx * cx + cy * cy) as f64).sqrt() as u32 + shift) / period) & 1 == 0,
            _ => (((x + shift) / period) + (y / period)) & 1 == 0,
        };
        let shade = (seed * 13 % 60) as u8;
        if on {
            Rgb([
                colour[0].saturating_sub(shade),
                colour[1].saturating_sub(shade / 2),
                colour[2],
            ])
        } else {
            Rgb([235 - shade, 230 - shade / 2, 220])
        }
    })
}

pub fn png_bytes(image: &RgbImage) -> Vec<u8> {
    let mut bytes = Vec::new();
    image
        .write_to(
            &mut std::io::Cursor::new(&mut bytes),
            image::ImageFormat::Png,
        )
        .expect("encoding a PNG in memory");
    bytes
}

/// A collection on disk: its image folder and its store.
pub struct Fixture {
    _dir: tempfile::TempDir,
    pub root: PathBuf,
    pub store: PathBuf,
    /// Ids and L2-normalised embeddings read back from the store.
    pub ids: Vec<ImageId>,
    pub embeddings: Vec<Vec<f32>>,
    /// Relative paths by id.
    pub paths: Vec<(ImageId, String)>,
}

/// Writes the images: train and val folders with three labels, a val file
/// that is a byte copy of a train file (a leak), two unlabelled images and
/// one file that is not an image.
pub fn write_images(root: &Path) -> Result<()> {
    for (label_index, label) in LABELS.iter().enumerate() {
        for (split, count, offset) in [("train", 4, 0), ("val", 2, 10)] {
            let dir = root.join(split).join(label);
            std::fs::create_dir_all(&dir)?;
            for i in 0..count {
                picture(label_index, offset + i, 96).save(dir.join(format!("{label}-{i}.png")))?;
            }
        }
    }
    std::fs::copy(
        root.join("train/kettle/kettle-0.png"),
        root.join("val/kettle/kettle-copy.png"),
    )?;
    std::fs::create_dir_all(root.join("unsorted"))?;
    picture(0, 21, 96).save(root.join("unsorted/a.png"))?;
    picture(2, 22, 96).save(root.join("unsorted/b.png"))?;
    std::fs::write(root.join("train/lamp/broken.jpg"), b"this is not a picture")?;
    Ok(())
}

pub fn index_options() -> IndexOptions {
    IndexOptions {
        batch_size: 8,
        commit_every: 8,
        ..IndexOptions::default()
    }
}

impl Fixture {
    pub fn new() -> Result<Self> {
        Self::with_extra_pictures(0)
    }

    /// The usual images plus `extra` more under `train/extra/`, each near
    /// others of its pattern, so that near-pair checks have work to do.
    pub fn with_extra_pictures(extra: u32) -> Result<Self> {
        let dir = tempfile::tempdir()?;
        let root = dir.path().join("images");
        let store_dir = dir.path().join("store");
        write_images(&root)?;
        if extra > 0 {
            let folder = root.join("train/extra");
            std::fs::create_dir_all(&folder)?;
            for i in 0..extra {
                picture(i as usize, 100 + i, 160).save(folder.join(format!("extra-{i}.png")))?;
            }
        }
        let encoder = encoder();
        let (ids, embeddings, paths) = {
            let mut store = Store::create_or_open(&store_dir, &fingerprint_of(&encoder))?;
            index_roots(
                &mut store,
                &encoder,
                std::slice::from_ref(&root),
                &index_options(),
                &NoProgress,
            )?;
            let (ids, flat) = store.all_embeddings()?;
            let dim = store.fingerprint().dim;
            let embeddings = flat.chunks(dim).map(<[f32]>::to_vec).collect();
            let mut paths = Vec::new();
            for entry in store.records() {
                let (id, record) = entry?;
                paths.push((id, record.rel_path));
            }
            (ids, embeddings, paths)
        };
        Ok(Self {
            root: root.canonicalize()?,
            store: store_dir,
            ids,
            embeddings,
            paths,
            _dir: dir,
        })
    }

    pub fn id_of(&self, rel_path: &str) -> ImageId {
        self.paths
            .iter()
            .find(|(_, p)| p == rel_path)
            .map(|(id, _)| *id)
            .unwrap_or_else(|| panic!("{rel_path} is not indexed"))
    }

    pub fn config(&self, settings: ServeSettings) -> ServiceConfig {
        ServiceConfig {
            settings,
            collections: vec![("shop".into(), self.store.clone())],
            model: Model::Loaded(encoder()),
            index: index_options(),
            duplicates: DuplicateOptions::default(),
            reference_split: Some("train".into()),
        }
    }
}

/// Settings for tests: ephemeral port, a token, small limits.
pub fn test_settings() -> ServeSettings {
    ServeSettings {
        port: 0,
        token: Some(TOKEN.into()),
        max_body_bytes: 1 << 20,
        max_upload_pixels: 1_000_000,
        max_k: 50,
        max_page_size: 100,
        workers: 4,
        // Background verification would compete with every test for the two
        // cores; the page tests run it, through the binary.
        precompute: false,
        ..ServeSettings::default()
    }
}

/// A server running on its own thread; stopped gracefully on drop.
pub struct RunningServer {
    pub base: String,
    handle: ServerHandle,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl RunningServer {
    pub fn start(config: ServiceConfig) -> Result<Self> {
        let (sender, receiver) = std::sync::mpsc::channel();
        let thread = std::thread::spawn(move || {
            actix_web::rt::System::new().block_on(async move {
                match Service::bind(config) {
                    Ok(service) => {
                        let _ = sender.send(Ok((service.addrs()[0], service.handle())));
                        if let Err(e) = service.run().await {
                            eprintln!("server stopped with an error: {e}");
                        }
                    }
                    Err(e) => {
                        let _ = sender.send(Err(e.to_string()));
                    }
                }
            })
        });
        let (addr, handle) = receiver
            .recv_timeout(Duration::from_secs(60))
            .context("the server did not start")?
            .map_err(anyhow::Error::msg)?;
        Ok(Self {
            base: format!("http://{addr}"),
            handle,
            thread: Some(thread),
        })
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }
}

impl Drop for RunningServer {
    fn drop(&mut self) {
        actix_web::rt::System::new().block_on(self.handle.stop(true));
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }
}

pub fn client() -> awc::Client {
    awc::Client::builder()
        .timeout(Duration::from_secs(120))
        .connector(awc::Connector::new().limit(64))
        .finish()
}

/// What a request sends.
pub enum Body {
    Empty,
    /// Raw bytes with a content type.
    Raw(String, Vec<u8>),
    Json(Value),
}

/// An answer: status, content type and body.
pub struct Answer {
    pub status: u16,
    pub content_type: String,
    pub bytes: Vec<u8>,
}

impl Answer {
    pub fn json(&self) -> Value {
        serde_json::from_slice(&self.bytes).unwrap_or(Value::Null)
    }

    /// The `error.code` of a JSON error body.
    pub fn error_code(&self) -> String {
        self.json()["error"]["code"]
            .as_str()
            .unwrap_or("(no JSON error body)")
            .to_owned()
    }
}

pub async fn send(request: awc::ClientRequest, body: Body) -> Result<Answer> {
    let sent = match body {
        Body::Empty => request.send().await,
        Body::Raw(content_type, bytes) => {
            request
                .insert_header(("Content-Type", content_type.as_str()))
                .send_body(bytes)
                .await
        }
        Body::Json(value) => request.send_json(&value).await,
    };
    let mut response = sent.map_err(|e| anyhow::anyhow!("request failed: {e}"))?;
    let content_type = response
        .headers()
        .get("content-type")
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
        .to_owned();
    let bytes = response
        .body()
        .limit(64 << 20)
        .await
        .map_err(|e| anyhow::anyhow!("reading the body failed: {e}"))?;
    Ok(Answer {
        status: response.status().as_u16(),
        content_type,
        bytes: bytes.to_vec(),
    })
}

/// A `multipart/form-data` body with one file field per entry.
pub fn multipart(files: &[(&str, &str, &[u8])]) -> (String, Vec<u8>) {
    let boundary = "vitrine-test-boundary-7f3a";
    let mut body = Vec::new();
    for (field, file_name, bytes) in files {
        body.extend_from_slice(
            format!(
                "--{boundary}\r\nContent-Disposition: form-data; name=\"{field}\"; filename=\"{file_name}\"\r\nContent-Type: application/octet-stream\r\n\r\n"
            )
            .as_bytes(),
        );
        body.extend_from_slice(bytes);
        body.extend_from_slice(b"\r\n");
    }
    body.extend_from_slice(format!("--{boundary}--\r\n").as_bytes());
    (format!("multipart/form-data; boundary={boundary}"), body)
}

/// Polls a job until it has finished; returns its final status.
pub async fn wait_for_job(client: &awc::Client, server: &RunningServer, id: u64) -> Result<Value> {
    for _ in 0..600 {
        let answer = send(
            client.get(server.url(&format!("/api/v1/collections/shop/jobs/{id}"))),
            Body::Empty,
        )
        .await?;
        let job = answer.json();
        if matches!(job["state"].as_str(), Some("succeeded" | "failed")) {
            return Ok(job);
        }
        actix_web::rt::time::sleep(Duration::from_millis(100)).await;
    }
    anyhow::bail!("job {id} did not finish within a minute")
}

/// Exact nearest neighbours by brute force over all embeddings: the
/// reference the index's answers are checked against.
pub fn brute_force(
    fixture: &Fixture,
    query: &[f32],
    exclude: Option<ImageId>,
    k: usize,
) -> Vec<(ImageId, f32)> {
    let mut scored: Vec<(ImageId, f32)> = fixture
        .ids
        .iter()
        .zip(&fixture.embeddings)
        .filter(|(id, _)| Some(**id) != exclude)
        .map(|(id, e)| (*id, e.iter().zip(query).map(|(a, b)| a * b).sum()))
        .collect();
    scored.sort_by(|a, b| b.1.total_cmp(&a.1));
    scored.truncate(k);
    scored
}
