//! Command-line arguments: the commands, their flags and their help.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};
use vitrine_engine::labels::{LabelMethod, LabelOptions};
use vitrine_engine::shards::ShardPart;

use crate::output::OutputArgs;

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
    /// Record what you decided about reported images. Decisions are kept in
    /// the store; your image files are never moved, changed or deleted.
    #[command(subcommand)]
    Decide(DecideCommand),
    /// Write the clean training list (dropped images left out, given splits
    /// and labels applied), the decision log, or every record and embedding
    /// as Parquet.
    Export {
        #[arg(long, value_enum)]
        format: ExportFormat,
        /// Write to this file instead of standard output.
        #[arg(long, value_name = "FILE")]
        output: Option<PathBuf>,
    },
    /// Embed part I of N of the images under the roots, without a store, into
    /// one Parquet file (for running the forward passes on many machines).
    Shard(ShardArgs),
    /// Build or update the collection from shard files, without a forward pass.
    Merge {
        /// Parquet files written by `shard` (or `export --format parquet`), or
        /// folders: every `.parquet` file directly inside them.
        #[arg(required = true, value_name = "FILE_OR_DIR")]
        files: Vec<PathBuf>,
    },
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
pub enum DecideCommand {
    /// Leave these images out of the training list (paths relative to their
    /// root, as reports print them; one decision per path, recorded in order,
    /// stopping at the first path that is refused).
    Drop {
        #[arg(required = true, value_name = "PATH")]
        paths: Vec<String>,
        #[command(flatten)]
        who: WhoArgs,
    },
    /// Keep these images (a group's keeper; a leak judged harmless).
    Keep {
        #[arg(required = true, value_name = "PATH")]
        paths: Vec<String>,
        #[command(flatten)]
        who: WhoArgs,
    },
    /// These two images are not copies: later reports leave the pair out.
    Distinct {
        first: String,
        second: String,
        #[command(flatten)]
        who: WhoArgs,
    },
    /// Give an image a label (accept a suggestion, correct a mislabel, or
    /// confirm the label it has).
    Label {
        path: String,
        label: String,
        #[command(flatten)]
        who: WhoArgs,
    },
    /// Turn down the label suggested for an image.
    Reject {
        path: String,
        #[command(flatten)]
        who: WhoArgs,
    },
    /// Put an image into another split of the training list.
    Split {
        path: String,
        split: String,
        #[command(flatten)]
        who: WhoArgs,
    },
    /// Take back a decision (default: the latest one still in effect).
    Undo {
        number: Option<u64>,
        #[command(flatten)]
        who: WhoArgs,
    },
    /// The decision log, with what was undone and what is stale.
    List {
        #[command(flatten)]
        output: OutputArgs,
    },
}

#[derive(Args, Debug)]
pub struct WhoArgs {
    /// Who decides (default: the user name from $USER).
    #[arg(long, value_name = "NAME")]
    pub by: Option<String>,
}

#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum ExportFormat {
    /// CSV `path,split,label`, the layout `index --manifest` reads.
    Manifest,
    /// The decision log as CSV.
    DecisionsCsv,
    /// The decision log as JSON Lines.
    DecisionsJsonl,
    /// Every image's record and embedding, and every failed file, in the
    /// Parquet layout of `shard` (needs --output).
    Parquet,
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
    pub method: MethodArg,
    /// Neighbour vote: labelled neighbours that vote.
    #[arg(short, long, default_value_t = LabelOptions::default().k)]
    pub k: usize,
    /// No suggestion below this confidence (classifier: calibrated
    /// probability of being right; neighbour vote: share of the vote).
    #[arg(long, default_value_t = LabelOptions::default().min_confidence)]
    pub min_confidence: f32,
    /// Seed of the classifier's folds.
    #[arg(long, default_value_t = LabelOptions::default().seed)]
    pub seed: u64,
}

impl LabelArgs {
    pub fn options(&self, coverage: Option<f64>, min_disagreement: f32) -> LabelOptions {
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
    pub source: PathBuf,
    /// The model directory to write.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// A short name recorded with every embedding.
    #[arg(long)]
    pub id: String,
    /// Attention heads, when the checkpoint has no config.json.
    #[arg(long)]
    pub heads: Option<usize>,
    /// Pooling recorded with the model.
    #[arg(long, value_enum, default_value_t = PoolingArg::Cls)]
    pub pooling: PoolingArg,
    /// Shorter side after resizing (default: 256/224 of the crop).
    #[arg(long)]
    pub resize: Option<u32>,
    /// Side of the centre crop fed to the model.
    #[arg(long, default_value_t = 224)]
    pub crop: u32,
    /// Per-channel mean and std: ImageNet's, or CLIP's.
    #[arg(long, value_enum, default_value_t = NormalisationArg::Imagenet)]
    pub normalisation: NormalisationArg,
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
    pub roots: Vec<PathBuf>,
    /// A CSV manifest `path,split,label` instead of the folder convention.
    #[arg(long, value_name = "CSV")]
    pub manifest: Option<PathBuf>,
    /// Follow symbolic links (loops are detected and reported).
    #[arg(long)]
    pub follow_symlinks: bool,
    /// Skip paths matching this glob (relative to the root; repeatable).
    #[arg(long = "ignore", value_name = "GLOB")]
    pub ignore: Vec<String>,
    /// Images per forward pass.
    #[arg(long)]
    pub batch_size: Option<usize>,
}

fn parse_part(text: &str) -> Result<ShardPart, String> {
    text.parse()
        .map_err(|err: vitrine_engine::EngineError| err.to_string())
}

#[derive(Args, Debug)]
pub struct ShardArgs {
    /// Which part: I/N, counted from 0 (0/4 is the first of four). Files are
    /// assigned by a hash of their path relative to the root.
    #[arg(long, value_name = "I/N", value_parser = parse_part)]
    pub part: ShardPart,
    /// The folder to write `part-I-of-N.parquet` into (atomically: a killed
    /// run leaves no file under that name).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    #[command(flatten)]
    pub index: IndexArgs,
}

#[derive(Args, Debug)]
pub struct SimilarArgs {
    /// An indexed image's id.
    #[arg(long, group = "query")]
    pub id: Option<u64>,
    /// An indexed image's path relative to its root.
    #[arg(long, group = "query")]
    pub path: Option<String>,
    /// An image file (indexed or not) to embed and look up.
    #[arg(long, group = "query")]
    pub file: Option<PathBuf>,
    /// How many neighbours.
    #[arg(short, long, default_value_t = 10)]
    pub k: usize,
    /// Only images of this split.
    #[arg(long)]
    pub split: Option<String>,
    /// Only images with this label.
    #[arg(long)]
    pub label: Option<String>,
    /// Only images whose relative path starts with this.
    #[arg(long)]
    pub prefix: Option<String>,
    #[command(flatten)]
    pub output: OutputArgs,
}

#[derive(Args, Debug)]
pub struct ThresholdArgs {
    /// Cosine similarity at or above which two images are near-duplicates.
    #[arg(long, value_name = "COSINE")]
    pub threshold: Option<f32>,
    /// Judge near pairs on the threshold alone, without re-reading both
    /// images for the finer check (faster; less precise).
    #[arg(long)]
    pub no_verify: bool,
}

#[derive(Args, Debug)]
pub struct ServeArgs {
    /// Port to listen on (default: [serve] port, else 8080).
    #[arg(long)]
    pub port: Option<u16>,
    /// Address to listen on (default 127.0.0.1; others need a token).
    #[arg(long)]
    pub bind: Option<String>,
    /// Another collection to serve, as NAME=DIR (repeatable).
    #[arg(long = "collection", value_name = "NAME=DIR")]
    pub collections: Vec<String>,
    /// Print the OpenAPI document of the API and exit.
    #[arg(long)]
    pub print_openapi: bool,
}
