//! The commands: each translates its arguments into engine calls and hands
//! the result to a report.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{bail, Context, Result};
use serde::Serialize;
use vitrine_engine::calibrate::{calibrate, CalibrationOptions};
use vitrine_engine::catalog::Catalog;
use vitrine_engine::clusters::ClusterOptions;
use vitrine_engine::decisions::{self, Request};
use vitrine_engine::duplicates::LeakOptions;
use vitrine_engine::ingest::{
    fingerprint_of, index_roots, resolve_roots, IndexOptions, IndexReport,
};
use vitrine_engine::labels::LabelOptions;
use vitrine_engine::neighbours::NeighbourFilter;
use vitrine_engine::questions::NeighbourQuery;
use vitrine_engine::shards::{check_mergeable, embed_shard, from_store, ShardMerge};
use vitrine_engine::splits::SplitRule;
use vitrine_engine::walk::WalkOptions;
use vitrine_imaging::PreprocessSpec;
use vitrine_model::config::Pooling;
use vitrine_model::families::{import_checkpoint, FamilyHints, ImportSettings};
use vitrine_model::fetch::fetch_default_model;
use vitrine_parquet::{read_header, read_shard, write_shard};
use vitrine_store::Store;

use crate::args::{
    Cli, Command, DecideCommand, ExportFormat, ImportArgs, IndexArgs, LabelCommand, ModelCommand,
    NormalisationArg, PoolingArg, ServeArgs, ShardArgs, SimilarArgs, ThresholdArgs,
};
use crate::collection::{self, Collection};
use crate::output::{emit, Format, OutputArgs};
use crate::progress::StderrProgress;
use crate::reports::{
    CalibrationTable, ClusterTable, DecisionTable, DuplicateTable, LeakTable, NeighbourTable,
    StatusTable, SuggestionTable, SuspectTable,
};
use crate::session::{decode_options, embed_file, Session};
use crate::settings::Settings;

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
            let options = ctx.duplicate_options(&threshold)?;
            let report = collection::open(&ctx)?.duplicates(&options)?;
            emit(&DuplicateTable(report), &output)?;
        }
        Command::Leaks {
            splits,
            against,
            threshold,
            output,
        } => {
            let options = LeakOptions {
                evaluated_splits: splits,
                reference_split: against.or_else(|| ctx.settings.queries.reference_split.clone()),
                duplicates: ctx.duplicate_options(&threshold)?,
            };
            let report = collection::open(&ctx)?.leaks(&options)?;
            emit(&LeakTable(report), &output)?;
        }
        Command::Clusters { k, seed, output } => {
            let options = ClusterOptions {
                n_clusters: k,
                seed,
            };
            let report = collection::open(&ctx)?.clusters(&options)?;
            emit(&ClusterTable(report), &output)?;
        }
        Command::Labels(LabelCommand::Suggest {
            judge,
            coverage,
            output,
        }) => {
            let options = judge.options(coverage, LabelOptions::default().min_disagreement);
            let report = collection::open(&ctx)?.label_suggestions(&options)?;
            emit(&SuggestionTable(report), &output)?;
        }
        Command::Labels(LabelCommand::Suspects {
            judge,
            min_disagreement,
            output,
        }) => {
            let options = judge.options(None, min_disagreement);
            let report = collection::open(&ctx)?.label_suspects(&options)?;
            emit(&SuspectTable(report), &output)?;
        }
        Command::Decide(command) => decide(&ctx, command)?,
        Command::Export { format, output } => export(&ctx, format, output)?,
        Command::Shard(args) => shard(&ctx, &args)?,
        Command::Merge { files } => merge(&ctx, &files)?,
        Command::Serve(args) => serve(&ctx, &args)?,
        Command::Calibrate {
            sample,
            seed,
            output,
        } => calibrate_thresholds(&ctx, sample, seed, &output)?,
    }
    Ok(ExitCode::SUCCESS)
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

/// What `index` and `shard` read from their shared arguments and the
/// configuration.
fn index_options(ctx: &Session, args: &IndexArgs) -> Result<IndexOptions> {
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
    Ok(options)
}

fn index(ctx: &Session, args: &IndexArgs) -> Result<()> {
    let encoder = ctx.encoder()?;
    let options = index_options(ctx, args)?;
    // index_roots checks the roots again; checking them before the store is
    // created means a refused run leaves no new, empty store behind.
    resolve_roots(&args.roots, &options)?;
    let mut store = Store::create_or_open(&ctx.global.store, &fingerprint_of(&encoder))
        .map_err(|err| collection::opening_failed(&ctx.global.store, err))?;
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
    print_times(&report);
    if report.failed > 0 {
        println!("see `vitrine status --errors` for the files that failed");
    }
    if report.skipped_symlinks > 0 {
        println!("symbolic links are not followed; --follow-symlinks follows them");
    }
    Ok(())
}

fn print_times(report: &IndexReport) {
    println!(
        "time: decode and preprocess {:.1} s, forward passes {:.1} s, store {:.1} s",
        report.decode_seconds, report.forward_seconds, report.store_seconds
    );
}

fn shard(ctx: &Session, args: &ShardArgs) -> Result<()> {
    let part = args.part;
    let encoder = ctx.encoder()?;
    let options = index_options(ctx, &args.index)?;
    // Before the forward passes: a folder that cannot be made fails at once.
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("cannot create the folder {}", args.out.display()))?;
    let started = std::time::Instant::now();
    let (shard, report) = embed_shard(
        &encoder,
        &args.index.roots,
        &options,
        part,
        &StderrProgress::new(),
    )?;
    let output = args
        .out
        .join(format!("part-{}-of-{}.parquet", part.index, part.count));
    write_shard(&output, &shard)?;
    println!(
        "part {part}: {} images embedded, {} failed, {} non-image files skipped; written to {} in {:.1} s",
        shard.images.len(),
        shard.failures.len(),
        report.skipped_non_images,
        output.display(),
        started.elapsed().as_secs_f64()
    );
    print_times(&report);
    Ok(())
}

/// The shard files named, with each folder replaced by the `.parquet` files
/// directly inside it, by name (a writer's hidden temporary files left out).
fn shard_files(named: &[PathBuf]) -> Result<Vec<PathBuf>> {
    let mut files = Vec::new();
    for path in named {
        if !path.is_dir() {
            files.push(path.clone());
            continue;
        }
        let mut inside = Vec::new();
        for entry in std::fs::read_dir(path)
            .with_context(|| format!("cannot list the folder {}", path.display()))?
        {
            let file = entry?.path();
            let name = file.file_name().and_then(|n| n.to_str()).unwrap_or("");
            if name.ends_with(".parquet") && !name.starts_with('.') {
                inside.push(file);
            }
        }
        if inside.is_empty() {
            bail!("the folder {} holds no .parquet file", path.display());
        }
        inside.sort();
        files.extend(inside);
    }
    Ok(files)
}

fn merge(ctx: &Session, named: &[PathBuf]) -> Result<()> {
    let files = shard_files(named)?;
    // Every file is checked before the store is touched: a shard of another
    // model, or a file that is not a shard, leaves the store as it was.
    let mut headers = Vec::with_capacity(files.len());
    for file in &files {
        headers.push(read_header(file)?);
    }
    check_mergeable(
        headers
            .iter()
            .map(|h| (&h.fingerprint, h.part, h.roots.as_slice())),
    )
    .context("these files cannot be merged together")?;
    let mut store = Store::create_or_open(&ctx.global.store, &headers[0].fingerprint)
        .map_err(|err| collection::opening_failed(&ctx.global.store, err))?;
    let started = std::time::Instant::now();
    let mut merging = ShardMerge::new(&mut store, ctx.settings.index.commit_every)?;
    for file in &files {
        let shard = read_shard(file)?;
        merging
            .add(&shard, &StderrProgress::new())
            .with_context(|| format!("{} cannot be merged into this collection", file.display()))?;
    }
    let report = merging.finish()?;
    println!(
        "{report} in {:.1} s; {} images in the collection",
        started.elapsed().as_secs_f64(),
        store.len()
    );
    if !report.complete_partition {
        println!(
            "nothing was removed: only every part of one partition (all I of one N) says which \
             files are gone"
        );
    }
    if report.failed > 0 {
        println!("see `vitrine status --errors` for the files that failed");
    }
    Ok(())
}

fn status(ctx: &Session, list_errors: bool, output: &OutputArgs) -> Result<()> {
    let status = collection::open(ctx)?.status(list_errors)?;
    emit(&StatusTable(status), output)
}

fn similar(ctx: &Session, args: &SimilarArgs) -> Result<()> {
    let filter = NeighbourFilter {
        split: args.split.clone(),
        label: args.label.clone(),
        path_prefix: args.prefix.clone(),
    };
    let collection = collection::open(ctx)?;
    let of = match (&args.file, &args.id, &args.path) {
        (Some(file), _, _) => NeighbourQuery::Vector(outside_query(ctx, &*collection, file)?),
        (None, Some(id), _) => NeighbourQuery::Image(*id),
        (None, None, Some(path)) => NeighbourQuery::Path(path.clone()),
        (None, None, None) => bail!("give one of --id, --path or --file"),
    };
    let neighbours = collection.neighbours(of, args.k, &filter)?;
    emit(&NeighbourTable(neighbours), &args.output)
}

/// The embedding of a file from outside the collection, made by the
/// collection's own model.
fn outside_query(ctx: &Session, collection: &dyn Collection, file: &Path) -> Result<Vec<f32>> {
    let encoder = ctx.encoder()?;
    let stored = collection.model()?;
    let loaded = fingerprint_of(&encoder).to_string();
    if stored != loaded {
        bail!("the collection was made with {stored}, the loaded model is {loaded}");
    }
    embed_file(&encoder, &ctx.settings, file)
}

fn decide(ctx: &Session, command: DecideCommand) -> Result<()> {
    let collection = collection::open(ctx)?;
    let (requests, who) = match command {
        DecideCommand::List { output } => {
            return emit(&DecisionTable(collection.decisions()?), &output);
        }
        DecideCommand::Drop { paths, who } => (
            paths
                .into_iter()
                .map(|path| Request::Drop { path })
                .collect(),
            who,
        ),
        DecideCommand::Keep { paths, who } => (
            paths
                .into_iter()
                .map(|path| Request::Keep { path })
                .collect(),
            who,
        ),
        DecideCommand::Distinct { first, second, who } => {
            (vec![Request::Distinct { first, second }], who)
        }
        DecideCommand::Label { path, label, who } => (vec![Request::Label { path, label }], who),
        DecideCommand::Reject { path, who } => (vec![Request::RejectSuggestion { path }], who),
        DecideCommand::Split { path, split, who } => (vec![Request::Split { path, split }], who),
        DecideCommand::Undo { number, who } => {
            let decision = match number {
                Some(number) => number,
                None => decisions::last_undoable(&collection.decisions()?)
                    .context("there is no decision to undo")?,
            };
            (vec![Request::Undo { decision }], who)
        }
    };
    let by = match who.by {
        Some(by) => by,
        None => std::env::var("USER")
            .or_else(|_| std::env::var("USERNAME"))
            .context("no user name in $USER; say who decides with --by NAME")?,
    };
    for request in requests {
        let recorded = collection.decide(&by, request)?;
        let [name, subject, detail] = crate::reports::action_cells(&recorded.decision.action);
        println!("decision {}: {name} {subject} {detail}", recorded.number);
    }
    Ok(())
}

/// Every record and embedding of the store in the shard layout; read from the
/// store itself (a running service that holds it must be stopped first).
fn export_parquet(ctx: &Session, output: Option<PathBuf>) -> Result<()> {
    let path = output.context("--format parquet writes a file: give it with --output FILE")?;
    let store = ctx.open_store()?;
    let shard = from_store(&store)?;
    write_shard(&path, &shard)?;
    println!(
        "{} images and {} failed files written to {}",
        shard.images.len(),
        shard.failures.len(),
        path.display()
    );
    Ok(())
}

fn export(ctx: &Session, format: ExportFormat, output: Option<PathBuf>) -> Result<()> {
    // Opened by the formats that read through a collection (maybe a service's).
    let collection = || collection::open(ctx);
    let with_format = |format| OutputArgs {
        format,
        output: output.clone(),
    };
    match format {
        ExportFormat::Parquet => export_parquet(ctx, output.clone()),
        ExportFormat::Manifest => {
            let csv = collection()?.manifest_csv()?;
            match &output {
                Some(path) => std::fs::write(path, csv)
                    .with_context(|| format!("cannot write {}", path.display()))?,
                None => std::io::stdout().lock().write_all(&csv)?,
            }
            Ok(())
        }
        ExportFormat::DecisionsCsv => emit(
            &DecisionTable(collection()?.decisions()?),
            &with_format(Format::Csv),
        ),
        ExportFormat::DecisionsJsonl => emit(
            &DecisionTable(collection()?.decisions()?),
            &with_format(Format::Jsonl),
        ),
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
