//! The session of one command: flags and configuration resolved into the
//! model, the store and the options the engine takes.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use anyhow::{bail, Context, Result};
use vitrine_engine::duplicates::DuplicateOptions;
use vitrine_engine::ingest::fingerprint_of;
use vitrine_engine::verify::{PairVerifier, VerifyOptions};
use vitrine_imaging::{decode_path, preprocess, DecodeOptions};
use vitrine_model::encoder::Encoder;
use vitrine_model::fetch::{default_model_root, resolve_model_path};
use vitrine_store::Store;

use crate::args::{GlobalArgs, ThresholdArgs};
use crate::progress::StderrProgress;
use crate::settings::Settings;

/// What every command starts from: the global flags and the configuration.
pub struct Session {
    pub global: GlobalArgs,
    pub settings: Settings,
}

impl Session {
    pub fn model_root(&self) -> PathBuf {
        self.global
            .model_dir
            .clone()
            .or_else(|| self.settings.model.dir.clone())
            .unwrap_or_else(default_model_root)
    }

    pub fn encoder(&self) -> Result<Encoder> {
        let root = self.model_root();
        let dir = match self
            .global
            .model
            .clone()
            .or_else(|| self.settings.model.path.clone())
        {
            Some(path) => resolve_model_path(&path, &root)
                .with_context(|| format!("while loading model {}", path.display()))?,
            None => {
                let dir = root.join(vitrine_model::fetch::DEFAULT_WHEEL.id);
                if !dir.join("model.json").exists() {
                    bail!(
                        "the default model is not in {}; run `vitrine model fetch` first",
                        root.display()
                    );
                }
                dir
            }
        };
        Encoder::load(&dir).with_context(|| format!("while loading model from {}", dir.display()))
    }

    pub fn open_store(&self) -> Result<Store> {
        Store::open(&self.global.store)
            .map_err(|err| crate::collection::opening_failed(&self.global.store, err))
    }

    pub fn duplicate_options(&self, threshold: &ThresholdArgs) -> Result<DuplicateOptions> {
        let near_duplicate_threshold = threshold
            .threshold
            .unwrap_or(self.settings.queries.near_duplicate_threshold);
        if !(-1.0..=1.0).contains(&near_duplicate_threshold) {
            bail!("--threshold must be a cosine similarity between -1 and 1");
        }
        let candidate_threshold = self.settings.queries.candidate_threshold;
        if !(-1.0..=1.0).contains(&candidate_threshold) {
            bail!("queries.candidate_threshold must be a cosine similarity between -1 and 1");
        }
        Ok(DuplicateOptions {
            near_duplicate_threshold,
            neighbours_per_image: self.settings.queries.neighbours_per_image,
            verify: self.settings.queries.verify && !threshold.no_verify,
            candidate_threshold,
        })
    }

    /// The finer near-duplicate check, showing its progress, when it is
    /// wanted and the collection's model is at hand; otherwise near pairs are
    /// judged on the threshold alone and the report says so.
    pub fn verifier(&self, store: &Store, options: &DuplicateOptions) -> Option<PairVerifier> {
        if !options.verify {
            return None;
        }
        match self.encoder() {
            Ok(encoder) if fingerprint_of(&encoder) == *store.fingerprint() => Some(
                PairVerifier::new(Arc::new(encoder), VerifyOptions::default())
                    .with_progress(StderrProgress::new()),
            ),
            Ok(_) => {
                eprintln!(
                    "note: the loaded model is not the collection's; near pairs are not verified"
                );
                None
            }
            Err(err) => {
                eprintln!("note: {err:#}; near pairs are not verified");
                None
            }
        }
    }
}

pub fn decode_options(settings: &Settings) -> DecodeOptions {
    DecodeOptions {
        max_pixels: settings.index.max_pixels,
        max_file_bytes: settings.index.max_file_bytes,
        target_shorter_side: None,
    }
}

/// Decodes, preprocesses and embeds one outside file.
pub fn embed_file(encoder: &Encoder, settings: &Settings, file: &Path) -> Result<Vec<f32>> {
    let spec = &encoder.spec().preprocess;
    let options = DecodeOptions {
        target_shorter_side: Some(spec.resize_shorter),
        ..decode_options(settings)
    };
    // The decoder's errors name the file already.
    let decoded = decode_path(file, &options)?;
    let prepared = preprocess(&decoded.rgb, spec)?;
    let mut embeddings = encoder.embed(&[&prepared])?;
    Ok(embeddings.remove(0))
}
