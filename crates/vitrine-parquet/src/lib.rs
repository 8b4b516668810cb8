//! Shards and exports as Parquet files: the layout that moves embeddings
//! between machines (`vitrine shard` → `vitrine merge`) and out to the user's
//! own tools (`vitrine export --format parquet`).
//!
//! One row per file, images first, then files that failed; each group sorted
//! by root and path. Columns (see the README for the same table):
//!
//! | column | type | null when |
//! |---|---|---|
//! | `root` | utf8 | never (the root folder the run was given) |
//! | `path` | utf8 | never (relative to `root`, `/`-separated) |
//! | `split`, `label` | utf8 | the image has none, or the file failed |
//! | `byte_size` | uint64 | the file failed |
//! | `modified_unix_ns` | int64 | the file failed |
//! | `width`, `height` | uint32 | the file failed |
//! | `content_hash`, `pixel_hash` | fixed_size_binary(32) | the file failed |
//! | `model` | utf8 | never (the model fingerprint as JSON) |
//! | `embedding` | fixed_size_list<float32>[dim] | the file failed |
//! | `error` | utf8 | the file was embedded |
//!
//! The file's key-value metadata holds `vitrine.format_version`,
//! `vitrine.model` (the fingerprint as JSON), `vitrine.roots` (a JSON list)
//! and, for a shard, `vitrine.shard` (`I/N`).

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::{
    FixedSizeBinaryBuilder, FixedSizeListBuilder, Float32Builder, Int64Builder, StringBuilder,
    UInt32Builder, UInt64Builder,
};
use arrow_array::{
    Array, ArrayRef, FixedSizeBinaryArray, FixedSizeListArray, Float32Array, Int64Array,
    RecordBatch, StringArray, UInt32Array, UInt64Array,
};
use arrow_schema::{DataType, Field, Schema};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use vitrine_engine::shards::{Shard, ShardFailure, ShardImage, ShardPart};
use vitrine_store::{ImageRecord, ModelFingerprint};

/// The layout's version; a reader refuses a newer one.
pub const FORMAT_VERSION: u32 = 1;

const KEY_FORMAT_VERSION: &str = "vitrine.format_version";
const KEY_MODEL: &str = "vitrine.model";
const KEY_ROOTS: &str = "vitrine.roots";
const KEY_SHARD: &str = "vitrine.shard";

/// Rows per record batch and per row group, so that a reader holds about
/// this many rows at a time (8,192 × 384 floats is 12 MB).
const ROWS_PER_BATCH: usize = 8192;

#[derive(Debug, thiserror::Error)]
pub enum ParquetFileError {
    #[error("cannot write {path}")]
    Write {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot read {path}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path} is not a Parquet file vitrine can read")]
    Parquet {
        path: PathBuf,
        source: parquet::errors::ParquetError,
    },
    #[error("cannot write the Parquet file {path}")]
    ParquetWrite {
        path: PathBuf,
        source: parquet::errors::ParquetError,
    },
    #[error("cannot build the rows of {path}")]
    BuildRows {
        path: PathBuf,
        source: arrow_schema::ArrowError,
    },
    #[error("cannot read the rows of {path}")]
    ReadRows {
        path: PathBuf,
        source: arrow_schema::ArrowError,
    },
    #[error("{path} names no file to write")]
    NoFileName { path: PathBuf },
    #[error("{path} is not a vitrine shard or export: {message}")]
    NotOurLayout { path: PathBuf, message: String },
    #[error("{path} has layout version {found}; this vitrine reads up to {FORMAT_VERSION}; use a newer vitrine")]
    NewerLayout { path: PathBuf, found: u32 },
    #[error("root {root} is not valid UTF-8 and cannot be written")]
    NonUtf8Root { root: PathBuf },
}

/// What a shard file says about itself, read from its footer alone.
#[derive(Clone, Debug, PartialEq)]
pub struct ShardHeader {
    pub fingerprint: ModelFingerprint,
    pub part: Option<ShardPart>,
    pub roots: Vec<PathBuf>,
    pub rows: u64,
}

fn schema(dim: usize) -> Schema {
    let hash = || DataType::FixedSizeBinary(32);
    Schema::new(vec![
        Field::new("root", DataType::Utf8, false),
        Field::new("path", DataType::Utf8, false),
        Field::new("split", DataType::Utf8, true),
        Field::new("label", DataType::Utf8, true),
        Field::new("byte_size", DataType::UInt64, true),
        Field::new("modified_unix_ns", DataType::Int64, true),
        Field::new("width", DataType::UInt32, true),
        Field::new("height", DataType::UInt32, true),
        Field::new("content_hash", hash(), true),
        Field::new("pixel_hash", hash(), true),
        Field::new("model", DataType::Utf8, false),
        Field::new(
            "embedding",
            DataType::FixedSizeList(
                Arc::new(Field::new("item", DataType::Float32, false)),
                dim as i32,
            ),
            true,
        ),
        Field::new("error", DataType::Utf8, true),
    ])
}

/// One row: an image or a failed file.
enum Row<'a> {
    Image(&'a ShardImage),
    Failure(&'a ShardFailure),
}

/// Writes `shard` to `path` atomically: the rows go to a temporary file in
/// the same folder, which is synced and then renamed over `path`, so a
/// killed writer leaves no partial file under the final name. The same shard
/// always gives the same bytes.
pub fn write_shard(path: &Path, shard: &Shard) -> Result<(), ParquetFileError> {
    let write_error = |source| ParquetFileError::Write {
        path: path.to_path_buf(),
        source,
    };
    let roots: Vec<&str> = shard
        .roots
        .iter()
        .map(|root| {
            root.to_str()
                .ok_or_else(|| ParquetFileError::NonUtf8Root { root: root.clone() })
        })
        .collect::<Result<_, _>>()?;
    let model = serde_json::to_string(&shard.fingerprint).expect("a fingerprint is plain data");
    let mut metadata = vec![
        KeyValue::new(KEY_FORMAT_VERSION.into(), FORMAT_VERSION.to_string()),
        KeyValue::new(KEY_MODEL.into(), model.clone()),
        KeyValue::new(
            KEY_ROOTS.into(),
            serde_json::to_string(&roots).expect("strings serialise"),
        ),
    ];
    if let Some(part) = shard.part {
        metadata.push(KeyValue::new(KEY_SHARD.into(), part.to_string()));
    }
    let properties = WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .set_key_value_metadata(Some(metadata))
        .set_created_by(format!("vitrine {}", env!("CARGO_PKG_VERSION")))
        .set_max_row_group_row_count(Some(ROWS_PER_BATCH))
        .build();

    let folder = match path.parent() {
        Some(parent) if !parent.as_os_str().is_empty() => parent.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let name = path
        .file_name()
        .ok_or_else(|| ParquetFileError::NoFileName {
            path: path.to_path_buf(),
        })?
        .to_string_lossy()
        .into_owned();
    // A random name, so that two attempts at one part (a retry while the
    // first is still running elsewhere) never write the same temporary
    // file; it is deleted if anything below fails.
    let temporary = tempfile::Builder::new()
        .prefix(&format!(".{name}."))
        .suffix(".partial")
        // Readable by the other machines' users, like any file vitrine writes.
        .permissions(std::os::unix::fs::PermissionsExt::from_mode(0o644))
        .tempfile_in(&folder)
        .map_err(write_error)?;
    let file = temporary.as_file().try_clone().map_err(write_error)?;
    let schema = Arc::new(schema(shard.fingerprint.dim));
    let parquet_error = |source| ParquetFileError::ParquetWrite {
        path: path.to_path_buf(),
        source,
    };
    let mut writer =
        ArrowWriter::try_new(file, schema.clone(), Some(properties)).map_err(parquet_error)?;
    let rows: Vec<Row> = shard
        .images
        .iter()
        .map(Row::Image)
        .chain(shard.failures.iter().map(Row::Failure))
        .collect();
    for chunk in rows.chunks(ROWS_PER_BATCH) {
        let batch = record_batch(&schema, chunk, &roots, &model, shard.fingerprint.dim).map_err(
            |source| ParquetFileError::BuildRows {
                path: path.to_path_buf(),
                source,
            },
        )?;
        writer.write(&batch).map_err(parquet_error)?;
    }
    let file = writer.into_inner().map_err(parquet_error)?;
    file.sync_all().map_err(write_error)?;
    drop(file);
    temporary
        .persist(path)
        .map_err(|failed| write_error(failed.error))?;
    // Makes the rename itself durable across a power loss. Some network file
    // systems can neither open nor sync a folder; the file is complete under
    // its final name either way, so that is not an error.
    let _ = File::open(&folder).and_then(|folder| folder.sync_all());
    Ok(())
}

fn record_batch(
    schema: &Arc<Schema>,
    rows: &[Row],
    roots: &[&str],
    model: &str,
    dim: usize,
) -> Result<RecordBatch, arrow_schema::ArrowError> {
    let n = rows.len();
    let mut root = StringBuilder::new();
    let mut path = StringBuilder::new();
    let mut split = StringBuilder::new();
    let mut label = StringBuilder::new();
    let mut byte_size = UInt64Builder::with_capacity(n);
    let mut modified = Int64Builder::with_capacity(n);
    let mut width = UInt32Builder::with_capacity(n);
    let mut height = UInt32Builder::with_capacity(n);
    let mut content_hash = FixedSizeBinaryBuilder::with_capacity(n, 32);
    let mut pixel_hash = FixedSizeBinaryBuilder::with_capacity(n, 32);
    let mut model_column = StringBuilder::new();
    let mut embedding =
        FixedSizeListBuilder::with_capacity(Float32Builder::with_capacity(n * dim), dim as i32, n)
            .with_field(Arc::new(Field::new("item", DataType::Float32, false)));
    let mut error = StringBuilder::new();
    let root_of = |index: u32| {
        roots.get(index as usize).copied().ok_or_else(|| {
            arrow_schema::ArrowError::InvalidArgumentError(format!(
                "a row names root {index}, but the shard lists {} roots",
                roots.len()
            ))
        })
    };
    for row in rows {
        model_column.append_value(model);
        match row {
            Row::Image(image) => {
                let record = &image.record;
                root.append_value(root_of(record.root)?);
                path.append_value(&record.rel_path);
                split.append_option(record.split.as_deref());
                label.append_option(record.label.as_deref());
                byte_size.append_value(record.byte_size);
                modified.append_value(record.modified_unix_ns);
                width.append_value(record.width);
                height.append_value(record.height);
                content_hash.append_value(record.content_hash)?;
                pixel_hash.append_value(record.pixel_hash)?;
                if image.embedding.len() != dim {
                    return Err(arrow_schema::ArrowError::InvalidArgumentError(format!(
                        "{} has an embedding of {} values, the model's have {dim}",
                        record.rel_path,
                        image.embedding.len()
                    )));
                }
                embedding.values().append_slice(&image.embedding);
                embedding.append(true);
                error.append_null();
            }
            Row::Failure(failure) => {
                root.append_value(root_of(failure.root)?);
                path.append_value(&failure.rel_path);
                split.append_null();
                label.append_null();
                byte_size.append_null();
                modified.append_null();
                width.append_null();
                height.append_null();
                content_hash.append_null();
                pixel_hash.append_null();
                // A null list entry still takes `dim` child slots.
                embedding.values().append_slice(&vec![0.0; dim]);
                embedding.append(false);
                error.append_value(&failure.reason);
            }
        }
    }
    let columns: Vec<ArrayRef> = vec![
        Arc::new(root.finish()),
        Arc::new(path.finish()),
        Arc::new(split.finish()),
        Arc::new(label.finish()),
        Arc::new(byte_size.finish()),
        Arc::new(modified.finish()),
        Arc::new(width.finish()),
        Arc::new(height.finish()),
        Arc::new(content_hash.finish()),
        Arc::new(pixel_hash.finish()),
        Arc::new(model_column.finish()),
        Arc::new(embedding.finish()),
        Arc::new(error.finish()),
    ];
    RecordBatch::try_new(schema.clone(), columns)
}

fn open_reader(path: &Path) -> Result<ParquetRecordBatchReaderBuilder<File>, ParquetFileError> {
    let file = File::open(path).map_err(|source| ParquetFileError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    ParquetRecordBatchReaderBuilder::try_new(file).map_err(|source| ParquetFileError::Parquet {
        path: path.to_path_buf(),
        source,
    })
}

/// Reads a shard's footer: its model, part, roots and row count.
pub fn read_header(path: &Path) -> Result<ShardHeader, ParquetFileError> {
    header_of(path, &open_reader(path)?)
}

fn header_of(
    path: &Path,
    reader: &ParquetRecordBatchReaderBuilder<File>,
) -> Result<ShardHeader, ParquetFileError> {
    let not_ours = |message: String| ParquetFileError::NotOurLayout {
        path: path.to_path_buf(),
        message,
    };
    let file_metadata = reader.metadata().file_metadata();
    let value = |key: &str| {
        file_metadata
            .key_value_metadata()
            .and_then(|pairs| pairs.iter().find(|pair| pair.key == key))
            .and_then(|pair| pair.value.clone())
            .ok_or_else(|| not_ours(format!("its metadata has no `{key}`")))
    };
    let version: u32 = value(KEY_FORMAT_VERSION)?
        .parse()
        .map_err(|_| not_ours(format!("`{KEY_FORMAT_VERSION}` is not a number")))?;
    if version > FORMAT_VERSION {
        return Err(ParquetFileError::NewerLayout {
            path: path.to_path_buf(),
            found: version,
        });
    }
    let fingerprint: ModelFingerprint = serde_json::from_str(&value(KEY_MODEL)?)
        .map_err(|e| not_ours(format!("`{KEY_MODEL}` is not a model fingerprint: {e}")))?;
    let roots: Vec<PathBuf> = serde_json::from_str(&value(KEY_ROOTS)?)
        .map_err(|e| not_ours(format!("`{KEY_ROOTS}` is not a list of folders: {e}")))?;
    let part = match value(KEY_SHARD) {
        Ok(text) => Some(
            text.parse::<ShardPart>()
                .map_err(|e| not_ours(e.to_string()))?,
        ),
        Err(_) => None,
    };
    let expected = schema(fingerprint.dim);
    let found = reader.schema();
    for field in expected.fields() {
        match found.field_with_name(field.name()) {
            Ok(column) if column.data_type() == field.data_type() => {}
            Ok(column) => {
                return Err(not_ours(format!(
                    "column `{}` is {}, not {}",
                    field.name(),
                    column.data_type(),
                    field.data_type()
                )))
            }
            Err(_) => return Err(not_ours(format!("it has no column `{}`", field.name()))),
        }
    }
    Ok(ShardHeader {
        fingerprint,
        part,
        roots,
        rows: file_metadata.num_rows() as u64,
    })
}

/// Reads a whole shard (or export).
pub fn read_shard(path: &Path) -> Result<Shard, ParquetFileError> {
    let builder = open_reader(path)?;
    let header = header_of(path, &builder)?;
    let reader = builder
        .with_batch_size(ROWS_PER_BATCH)
        .build()
        .map_err(|source| ParquetFileError::Parquet {
            path: path.to_path_buf(),
            source,
        })?;
    let mut shard = Shard {
        fingerprint: header.fingerprint.clone(),
        part: header.part,
        roots: header.roots.clone(),
        images: Vec::new(),
        failures: Vec::new(),
    };
    let model = serde_json::to_string(&header.fingerprint).expect("a fingerprint is plain data");
    let mut first_row = 0;
    for batch in reader {
        let batch = batch.map_err(|source| ParquetFileError::ReadRows {
            path: path.to_path_buf(),
            source,
        })?;
        read_rows(path, &batch, first_row, &header, &model, &mut shard)?;
        first_row += batch.num_rows();
    }
    Ok(shard)
}

fn column<'b, T: 'static>(
    path: &Path,
    batch: &'b RecordBatch,
    name: &str,
) -> Result<&'b T, ParquetFileError> {
    batch
        .column_by_name(name)
        .and_then(|column| column.as_any().downcast_ref::<T>())
        .ok_or_else(|| ParquetFileError::NotOurLayout {
            path: path.to_path_buf(),
            message: format!("column `{name}` is missing or of another type"),
        })
}

/// Appends the rows of `batch` (rows `first_row..` of the file) to `shard`.
fn read_rows(
    path: &Path,
    batch: &RecordBatch,
    first_row: usize,
    header: &ShardHeader,
    model: &str,
    shard: &mut Shard,
) -> Result<(), ParquetFileError> {
    let not_ours = |message: String| ParquetFileError::NotOurLayout {
        path: path.to_path_buf(),
        message,
    };
    let root = column::<StringArray>(path, batch, "root")?;
    let rel_path = column::<StringArray>(path, batch, "path")?;
    let split = column::<StringArray>(path, batch, "split")?;
    let label = column::<StringArray>(path, batch, "label")?;
    let byte_size = column::<UInt64Array>(path, batch, "byte_size")?;
    let modified = column::<Int64Array>(path, batch, "modified_unix_ns")?;
    let width = column::<UInt32Array>(path, batch, "width")?;
    let height = column::<UInt32Array>(path, batch, "height")?;
    let content_hash = column::<FixedSizeBinaryArray>(path, batch, "content_hash")?;
    let pixel_hash = column::<FixedSizeBinaryArray>(path, batch, "pixel_hash")?;
    let model_column = column::<StringArray>(path, batch, "model")?;
    let embedding = column::<FixedSizeListArray>(path, batch, "embedding")?;
    let values = embedding
        .values()
        .as_any()
        .downcast_ref::<Float32Array>()
        .ok_or_else(|| not_ours("`embedding` does not hold float32 values".into()))?;
    let error = column::<StringArray>(path, batch, "error")?;
    let dim = header.fingerprint.dim;
    let text = |array: &StringArray, row: usize| {
        (!array.is_null(row)).then(|| array.value(row).to_owned())
    };
    let hash = |array: &FixedSizeBinaryArray, row: usize, name: &str| {
        <[u8; 32]>::try_from(array.value(row))
            .map_err(|_| not_ours(format!("row {}: `{name}` is not 32 bytes", first_row + row)))
    };
    for row in 0..batch.num_rows() {
        let at = first_row + row;
        if model_column.value(row) != model {
            return Err(not_ours(format!(
                "row {at} was made by another model than the file's metadata names"
            )));
        }
        let root_index = header
            .roots
            .iter()
            .position(|known| known.to_str() == Some(root.value(row)))
            .ok_or_else(|| not_ours(format!("row {at} names a root the metadata does not list")))?
            as u32;
        let rel = rel_path.value(row).to_owned();
        if !error.is_null(row) {
            shard.failures.push(ShardFailure {
                root: root_index,
                rel_path: rel,
                reason: error.value(row).to_owned(),
            });
            continue;
        }
        let required = [
            ("byte_size", byte_size.is_null(row)),
            ("modified_unix_ns", modified.is_null(row)),
            ("width", width.is_null(row)),
            ("height", height.is_null(row)),
            ("content_hash", content_hash.is_null(row)),
            ("pixel_hash", pixel_hash.is_null(row)),
            ("embedding", embedding.is_null(row)),
        ];
        if let Some((name, _)) = required.iter().find(|(_, missing)| *missing) {
            return Err(not_ours(format!(
                "row {at} has neither `{name}` nor `error`"
            )));
        }
        let start = embedding.value_offset_at(row);
        shard.images.push(ShardImage {
            record: ImageRecord {
                root: root_index,
                rel_path: rel,
                byte_size: byte_size.value(row),
                modified_unix_ns: modified.value(row),
                content_hash: hash(content_hash, row, "content_hash")?,
                pixel_hash: hash(pixel_hash, row, "pixel_hash")?,
                width: width.value(row),
                height: height.value(row),
                split: text(split, row),
                label: text(label, row),
            },
            embedding: values.values()[start..start + dim].to_vec(),
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn example_shard() -> Shard {
        let image = |root: u32, path: &str, split: Option<&str>, seed: f32| ShardImage {
            record: ImageRecord {
                root,
                rel_path: path.into(),
                byte_size: 1234,
                modified_unix_ns: -5,
                content_hash: [seed as u8; 32],
                pixel_hash: [seed as u8 + 1; 32],
                width: 640,
                height: 480,
                split: split.map(str::to_owned),
                label: Some("cat".into()),
            },
            embedding: vec![seed, -seed, 0.5, f32::MIN_POSITIVE],
        };
        Shard {
            fingerprint: ModelFingerprint {
                model_id: "example".into(),
                weights_sha256: "ab".repeat(32),
                preprocess: "{\"size\":224}".into(),
                pooling: "cls".into(),
                dim: 4,
            },
            part: Some(ShardPart { index: 2, count: 3 }),
            roots: vec![PathBuf::from("/data/a"), PathBuf::from("/data/b")],
            images: vec![
                image(0, "train/x.jpg", Some("train"), 1.0),
                image(1, "y.png", None, 2.0),
            ],
            failures: vec![ShardFailure {
                root: 1,
                rel_path: "broken.jpg".into(),
                reason: "truncated".into(),
            }],
        }
    }

    #[test]
    fn a_shard_reads_back_as_written_and_the_same_shard_gives_the_same_bytes() {
        let dir = tempfile::tempdir().unwrap();
        let first = dir.path().join("first.parquet");
        let second = dir.path().join("second.parquet");
        let shard = example_shard();
        write_shard(&first, &shard).unwrap();
        write_shard(&second, &shard).unwrap();
        assert_eq!(read_shard(&first).unwrap(), shard);
        assert_eq!(
            std::fs::read(&first).unwrap(),
            std::fs::read(&second).unwrap()
        );
        let header = read_header(&first).unwrap();
        assert_eq!(header.rows, 3);
        assert_eq!(header.part, shard.part);
        // Only the two final files: no temporary file is left behind.
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 2);
    }

    #[test]
    fn a_parquet_file_of_another_layout_is_refused_naming_what_is_missing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("other.parquet");
        let schema = Arc::new(Schema::new(vec![Field::new("x", DataType::Int64, false)]));
        let batch = RecordBatch::try_new(
            schema.clone(),
            vec![Arc::new(Int64Array::from(vec![1, 2])) as ArrayRef],
        )
        .unwrap();
        let mut writer = ArrowWriter::try_new(File::create(&path).unwrap(), schema, None).unwrap();
        writer.write(&batch).unwrap();
        writer.close().unwrap();
        let message = read_shard(&path).unwrap_err().to_string();
        assert!(message.contains("vitrine.format_version"), "{message}");
    }
}
