//! The slow work of a scan split into parts that share nothing, for many machines.
//!
//! 1. [`learn_extractor`] learns the feature extractor once, exactly as a first `scan` of
//!    the folder would (same pictures, same seeded subset), and gives its bytes for a file.
//! 2. [`describe_part`] describes the pictures of one part (`K/N`) with that extractor and
//!    writes their records and feature vectors to a Parquet file. A picture belongs to part
//!    `1 + (u64 of the first 8 bytes of BLAKE3(relative path), little-endian) mod N`, so it
//!    always lands in the same part, whichever machine lists the folder.
//! 3. After `train`, [`code_part`] codes one part's feature file with the model (a file
//!    written from the store) into a Parquet file of codes.
//! 4. [`merge`] takes such files into a store: every file is checked whole before anything
//!    of any of them is written, files made with another extractor or model are refused by
//!    name, and rows the store already holds exactly are left alone.
//!
//! The merged store is the one a single `scan` and `train` of the same folder and seed
//! make, record for record and bit for bit in every vector.

mod file;

use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::time::Instant;

use ndarray::Array2;
use rayon::prelude::*;
use serde::Serialize;
use tagweave_collection::{crawl, read_item, Candidate, CrawlOptions, ItemRecord, Skipped};
use tagweave_store::{Store, StoreError, CODES, EXTRACTOR_BLOB, FEATURES, MODEL_BLOB};
use tagweave_suggest::{TrainedModel, MODEL_FORMAT};
use tagweave_vision::FeatureExtractor;

use crate::features::describe;
use crate::{IndexError, ScanOptions, ScanProgress, BATCH};
use file::{Column, Layout, ShardReader, ShardWriter, Value};

/// Version of the shard files' layout (columns and metadata keys); files of another
/// version are refused.
pub const SHARD_FORMAT: u32 = 1;

/// Metadata keys of every shard file.
pub const KIND_KEY: &str = "tagweave.kind";
pub const FORMAT_KEY: &str = "tagweave.format";
pub const PART_KEY: &str = "tagweave.part";
/// BLAKE3 (hex) of the extractor file's bytes.
pub const EXTRACTOR_KEY: &str = "tagweave.extractor";
/// BLAKE3 (hex) of the model file's bytes (codes files only).
pub const MODEL_KEY: &str = "tagweave.model";

const FEATURES_KIND: &str = "features";
const CODES_KIND: &str = "codes";

/// Rows per Parquet row group, and per store write while merging.
const GROUP: usize = 4 * BATCH;

/// The columns of a features file. `record` is the item exactly as the store keeps it
/// (JSON); the columns before it repeat its fields for other tools.
const FEATURE_LAYOUT: Layout = &[
    ("rel_path", Column::Text),
    ("id", Column::Text),
    ("content_hash", Column::Text),
    ("size", Column::Int),
    ("mtime_ns", Column::Int),
    ("tags", Column::TextList),
    ("record", Column::Json),
    ("features", Column::FloatList),
];

/// The columns of a codes file.
const CODE_LAYOUT: Layout = &[
    ("rel_path", Column::Text),
    ("id", Column::Text),
    ("content_hash", Column::Text),
    ("code", Column::FloatList),
];

/// One part of `of` parts, numbered from 1.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Part {
    pub number: u32,
    pub of: u32,
}

impl FromStr for Part {
    type Err = IndexError;

    /// `K/N` with 1 ≤ K ≤ N.
    fn from_str(text: &str) -> Result<Part, IndexError> {
        let bad = || IndexError::BadPart(text.to_string());
        let (k, n) = text.split_once('/').ok_or_else(bad)?;
        let number: u32 = k.trim().parse().map_err(|_| bad())?;
        let of: u32 = n.trim().parse().map_err(|_| bad())?;
        if number == 0 || number > of {
            return Err(bad());
        }
        Ok(Part { number, of })
    }
}

impl std::fmt::Display for Part {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.number, self.of)
    }
}

impl Part {
    /// Whether the picture at this relative path (`/`-separated) belongs to this part.
    pub fn holds(&self, rel_path: &str) -> bool {
        part_number(rel_path, self.of) == self.number
    }
}

/// The part (from 1) of `parts` that the picture at `rel_path` belongs to.
pub fn part_number(rel_path: &str, parts: u32) -> u32 {
    let hash = blake3::hash(rel_path.as_bytes());
    let mut first = [0u8; 8];
    first.copy_from_slice(&hash.as_bytes()[..8]);
    (u64::from_le_bytes(first) % u64::from(parts.max(1))) as u32 + 1
}

/// How shard files name the extractor or model they were made with: BLAKE3 of its bytes.
pub fn fingerprint(bytes: &[u8]) -> String {
    blake3::hash(bytes).to_hex().to_string()
}

/// What learning the extractor did.
#[derive(Debug, Clone, Serialize)]
pub struct LearnReport {
    /// Pictures read (the extractor learns from a seeded subset of them).
    pub pictures: usize,
    pub dimension: usize,
    pub fingerprint: String,
    pub seconds: f64,
    #[serde(skip)]
    pub skipped_files: Vec<Skipped>,
}

/// The crawl every part command makes: the store's default folder inside the collection is
/// never listed, as a plain `scan` into that folder would not list it.
fn list(root: &Path, follow_symlinks: bool) -> Result<tagweave_collection::Crawl, IndexError> {
    Ok(crawl(
        root,
        &CrawlOptions {
            follow_symlinks,
            skip_dirs: vec![root.join(tagweave_store::DEFAULT_DIR_NAME)],
        },
    )?)
}

/// Reads the records of `candidates` in parallel batches, in their order.
fn read_records(
    root: &Path,
    candidates: &[Candidate],
    progress: &(dyn Fn(ScanProgress) + Sync),
) -> (Vec<ItemRecord>, Vec<Skipped>) {
    let mut items = Vec::with_capacity(candidates.len());
    let mut skipped = Vec::new();
    for (index, chunk) in candidates.chunks(GROUP).enumerate() {
        let results: Vec<_> = chunk.par_iter().map(|c| read_item(root, c)).collect();
        for result in results {
            match result {
                Ok(read) => items.push(read.item),
                Err(skip) => skipped.push(skip),
            }
        }
        progress(ScanProgress::Read {
            done: (index * GROUP + chunk.len()),
            total: candidates.len(),
        });
    }
    (items, skipped)
}

/// Learns the feature extractor of the folder at `root` as a first `scan` would (every
/// picture whose record reads, in relative-path order, `options.features` and
/// `options.seed`), and returns the bytes of its file: what the store keeps as its blob.
pub fn learn_extractor(
    root: &Path,
    options: &ScanOptions,
    progress: &(dyn Fn(ScanProgress) + Sync),
) -> Result<(Vec<u8>, LearnReport), IndexError> {
    let started = Instant::now();
    let found = list(root, options.follow_symlinks)?;
    progress(ScanProgress::Crawled {
        pictures: found.candidates.len(),
        to_read: found.candidates.len(),
    });
    let (mut items, mut skipped_files) = read_records(root, &found.candidates, progress);
    skipped_files.extend(found.skipped);
    if items.is_empty() {
        return Err(IndexError::NoPictures(root.to_path_buf()));
    }
    items.sort_by(|a, b| a.rel_path.cmp(&b.rel_path));
    let paths: Vec<PathBuf> = items.iter().map(|i| root.join(&i.rel_path)).collect();
    let extractor =
        FeatureExtractor::learn(&paths, &options.features, options.seed, &|done, total| {
            progress(ScanProgress::Learning { done, total })
        })?;
    let bytes = serde_json::to_vec(&extractor).map_err(|e| IndexError::ShardFile {
        path: root.to_path_buf(),
        problem: e.to_string(),
    })?;
    Ok((
        bytes.clone(),
        LearnReport {
            pictures: items.len(),
            dimension: extractor.dimension(),
            fingerprint: fingerprint(&bytes),
            seconds: started.elapsed().as_secs_f64(),
            skipped_files,
        },
    ))
}

/// Reads a file that holds a learned thing, with its fingerprint.
fn read_learned<T: serde::de::DeserializeOwned>(
    path: &Path,
    what: &str,
) -> Result<(T, Vec<u8>), IndexError> {
    let bytes = std::fs::read(path).map_err(|source| IndexError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let value = serde_json::from_slice(&bytes).map_err(|e| IndexError::ShardFile {
        path: path.to_path_buf(),
        problem: format!("not {what} written by this tagweave ({e})"),
    })?;
    Ok((value, bytes))
}

/// What describing one part did.
#[derive(Debug, Clone, Serialize)]
pub struct DescribeReport {
    pub part: Part,
    /// Pictures in the folder, all parts together.
    pub pictures: usize,
    /// Of those, the pictures of this part.
    pub in_part: usize,
    /// Rows written: pictures of this part read and described.
    pub described: usize,
    pub dimension: usize,
    pub extractor: String,
    pub seconds: f64,
    /// Files of this part passed over (vanished since the listing, damaged, bad sidecar).
    #[serde(skip)]
    pub skipped_files: Vec<Skipped>,
}

/// Describes the pictures of `part` of the folder at `root` with the extractor in the file
/// `extractor_file` and writes them to the Parquet file `out`.
pub fn describe_part(
    root: &Path,
    extractor_file: &Path,
    part: Part,
    follow_symlinks: bool,
    out: &Path,
    progress: &(dyn Fn(ScanProgress) + Sync),
) -> Result<DescribeReport, IndexError> {
    let started = Instant::now();
    let (extractor, bytes) =
        read_learned::<FeatureExtractor>(extractor_file, "a feature extractor")?;
    let found = list(root, follow_symlinks)?;
    let mine: Vec<Candidate> = found
        .candidates
        .iter()
        .filter(|c| part.holds(&c.rel_path))
        .cloned()
        .collect();
    progress(ScanProgress::Crawled {
        pictures: found.candidates.len(),
        to_read: mine.len(),
    });
    // Files the walk could not judge belong to no part; the first part reports them.
    let walk_skips = if part.number == 1 {
        found.skipped
    } else {
        Vec::new()
    };
    let mut report = describe_candidates(
        root,
        &extractor,
        &fingerprint(&bytes),
        part,
        &mine,
        out,
        progress,
    )?;
    report.pictures = found.candidates.len();
    report.skipped_files.extend(walk_skips);
    report.seconds = started.elapsed().as_secs_f64();
    Ok(report)
}

/// Reads and describes `candidates` (one part's, listed earlier) into the file `out`. A
/// picture gone since the listing is reported among the skipped files, as in a scan.
fn describe_candidates(
    root: &Path,
    extractor: &FeatureExtractor,
    extractor_print: &str,
    part: Part,
    candidates: &[Candidate],
    out: &Path,
    progress: &(dyn Fn(ScanProgress) + Sync),
) -> Result<DescribeReport, IndexError> {
    let metadata = vec![
        (KIND_KEY.to_string(), FEATURES_KIND.to_string()),
        (FORMAT_KEY.to_string(), SHARD_FORMAT.to_string()),
        (PART_KEY.to_string(), part.to_string()),
        (EXTRACTOR_KEY.to_string(), extractor_print.to_string()),
    ];
    let mut writer = ShardWriter::create(out, "tagweave_features", FEATURE_LAYOUT, metadata)?;
    let mut skipped_files = Vec::new();
    let mut described = 0;
    for (index, chunk) in candidates.chunks(GROUP).enumerate() {
        let results: Vec<_> = chunk
            .par_iter()
            .map(|candidate| {
                let item = read_item(root, candidate).map_err(|skip| (String::new(), skip))?;
                describe(extractor, root, &item.item).map(|(_, row)| (item.item, row))
            })
            .collect();
        let mut rows = Vec::with_capacity(results.len());
        for result in results {
            match result {
                Ok((item, features)) => rows.push(feature_row(&item, features)?),
                Err((_, skip)) => skipped_files.push(skip),
            }
        }
        described += rows.len();
        writer.write_group(&rows)?;
        progress(ScanProgress::Encoding {
            done: index * GROUP + chunk.len(),
            total: candidates.len(),
        });
    }
    writer.finish()?;
    Ok(DescribeReport {
        part,
        pictures: candidates.len(),
        in_part: candidates.len(),
        described,
        dimension: extractor.dimension(),
        extractor: extractor_print.to_string(),
        seconds: 0.0,
        skipped_files,
    })
}

fn feature_row(item: &ItemRecord, features: Vec<f32>) -> Result<Vec<Value>, IndexError> {
    let record = serde_json::to_string(item).map_err(|e| IndexError::ShardFile {
        path: PathBuf::from(&item.rel_path),
        problem: e.to_string(),
    })?;
    Ok(vec![
        Value::Text(item.rel_path.clone()),
        Value::Text(item.id.clone()),
        Value::Text(item.content_hash.clone()),
        Value::Int(i64::try_from(item.stamp.size).unwrap_or(i64::MAX)),
        Value::Int(i64::try_from(item.stamp.mtime_ns).unwrap_or(i64::MAX)),
        Value::TextList(item.tags.clone()),
        Value::Text(record),
        Value::FloatList(features),
    ])
}

/// A features row read back: the record from its JSON, checked against the columns that
/// repeat it.
fn read_feature_row(path: &Path, row: Vec<Value>) -> Result<(ItemRecord, Vec<f32>), IndexError> {
    let bad = |problem: String| IndexError::ShardFile {
        path: path.to_path_buf(),
        problem,
    };
    let mut cells = row.into_iter();
    let mut next = || cells.next();
    let (
        Some(Value::Text(rel_path)),
        Some(Value::Text(id)),
        Some(Value::Text(content_hash)),
        Some(Value::Int(_)),
        Some(Value::Int(_)),
        Some(Value::TextList(tags)),
        Some(Value::Text(record)),
        Some(Value::FloatList(features)),
    ) = (
        next(),
        next(),
        next(),
        next(),
        next(),
        next(),
        next(),
        next(),
    )
    else {
        return Err(bad("a row of another shape".into()));
    };
    let item: ItemRecord = serde_json::from_str(&record)
        .map_err(|e| bad(format!("the record of {rel_path} cannot be read ({e})")))?;
    if item.rel_path != rel_path
        || item.id != id
        || item.content_hash != content_hash
        || item.tags != tags
    {
        return Err(bad(format!(
            "the record of {rel_path} disagrees with its own columns"
        )));
    }
    Ok((item, features))
}

/// A codes row read back: (id, content hash, code).
fn read_code_row(path: &Path, row: Vec<Value>) -> Result<(String, String, Vec<f32>), IndexError> {
    match <[Value; 4]>::try_from(row) {
        Ok([Value::Text(_), Value::Text(id), Value::Text(hash), Value::FloatList(code)]) => {
            Ok((id, hash, code))
        }
        _ => Err(IndexError::ShardFile {
            path: path.to_path_buf(),
            problem: "a row of another shape".into(),
        }),
    }
}

/// What coding one part did.
#[derive(Debug, Clone, Serialize)]
pub struct CodeReport {
    pub part: String,
    pub coded: usize,
    pub model: String,
    pub seconds: f64,
}

/// Opens a shard file of this tagweave's format and checks its columns against its kind
/// (the one `expected`, when given); returns the kind with the reader.
fn open_shard(
    path: &Path,
    expected: Option<&'static str>,
) -> Result<(&'static str, ShardReader), IndexError> {
    let reader = ShardReader::open(path)?;
    let found = reader.meta(FORMAT_KEY).unwrap_or("none").to_string();
    let kind = match reader.meta(KIND_KEY) {
        Some(FEATURES_KIND) => Some(FEATURES_KIND),
        Some(CODES_KIND) => Some(CODES_KIND),
        _ => None,
    };
    let wanted = expected.unwrap_or("features or codes");
    match kind {
        Some(kind) if found == SHARD_FORMAT.to_string() && expected.is_none_or(|e| e == kind) => {
            let reader = match kind {
                FEATURES_KIND => reader.expect("tagweave_features", FEATURE_LAYOUT)?,
                _ => reader.expect("tagweave_codes", CODE_LAYOUT)?,
            };
            Ok((kind, reader))
        }
        _ => Err(IndexError::ShardFile {
            path: path.to_path_buf(),
            problem: format!(
                "not a {wanted} file of shard format {SHARD_FORMAT} (it says kind {}, format \
                 {found}); make it again with this tagweave",
                reader.meta(KIND_KEY).unwrap_or("none")
            ),
        }),
    }
}

/// Codes the pictures of a features file with the model in the file `model_file` (written
/// by `tagweave shard model` after `train`) and writes them to the Parquet file `out`.
pub fn code_part(
    model_file: &Path,
    features_file: &Path,
    out: &Path,
) -> Result<CodeReport, IndexError> {
    let started = Instant::now();
    let bytes = std::fs::read(model_file).map_err(|source| IndexError::Io {
        path: model_file.to_path_buf(),
        source,
    })?;
    let model: TrainedModel =
        tagweave_store::decode_model(&bytes).map_err(|e| IndexError::ShardFile {
            path: model_file.to_path_buf(),
            problem: format!("not a trained model written by this tagweave ({e})"),
        })?;
    if model.format != MODEL_FORMAT {
        return Err(StoreError::ModelFormat {
            found: model.format,
            expected: MODEL_FORMAT,
        }
        .into());
    }
    let (_, reader) = open_shard(features_file, Some(FEATURES_KIND))?;
    let part = reader.meta(PART_KEY).unwrap_or("").to_string();
    let metadata = vec![
        (KIND_KEY.to_string(), CODES_KIND.to_string()),
        (FORMAT_KEY.to_string(), SHARD_FORMAT.to_string()),
        (PART_KEY.to_string(), part.clone()),
        (
            EXTRACTOR_KEY.to_string(),
            reader.meta(EXTRACTOR_KEY).unwrap_or("").to_string(),
        ),
        (MODEL_KEY.to_string(), fingerprint(&bytes)),
    ];
    let mut writer = ShardWriter::create(out, "tagweave_codes", CODE_LAYOUT, metadata)?;
    let mut coded = 0;
    reader.rows(GROUP, &mut |rows| {
        let mut read = Vec::with_capacity(rows.len());
        for row in rows {
            read.push(read_feature_row(features_file, row)?);
        }
        let width = read[0].1.len();
        // Coded from the features as the store keeps them (packed), as `train` codes them.
        let flat: Vec<f32> = read
            .iter()
            .flat_map(|(_, f)| tagweave_store::as_stored(FEATURES, f))
            .collect();
        let raw = Array2::from_shape_vec((read.len(), width), flat).map_err(|_| {
            IndexError::ShardFile {
                path: features_file.to_path_buf(),
                problem: "feature vectors of different lengths".into(),
            }
        })?;
        let codes = model.codes(raw.view())?;
        let rows: Vec<Vec<Value>> = read
            .iter()
            .zip(codes.outer_iter())
            .map(|((item, _), code)| {
                vec![
                    Value::Text(item.rel_path.clone()),
                    Value::Text(item.id.clone()),
                    Value::Text(item.content_hash.clone()),
                    Value::FloatList(code.to_vec()),
                ]
            })
            .collect();
        coded += rows.len();
        writer.write_group(&rows)
    })?;
    writer.finish()?;
    Ok(CodeReport {
        part,
        coded,
        model: fingerprint(&bytes),
        seconds: started.elapsed().as_secs_f64(),
    })
}

/// The store's trained model as the bytes of a file for `code_part`; `None` before the
/// first `train`.
pub fn model_file_bytes(store: &Store) -> Result<Option<Vec<u8>>, IndexError> {
    Ok(store.blob_bytes(MODEL_BLOB)?)
}

/// What merging did with one file.
#[derive(Debug, Clone, Serialize)]
pub struct MergedFile {
    pub path: PathBuf,
    /// "features" or "codes".
    pub kind: &'static str,
    pub part: String,
    pub rows: usize,
    /// Rows written (new, or different from what the store held).
    pub written: usize,
    /// Rows the store already held exactly: left alone.
    pub unchanged: usize,
    /// Codes of pictures the store does not hold, or holds with other bytes: not written.
    pub not_in_store: usize,
}

/// What a merge did.
#[derive(Debug, Clone, Serialize)]
pub struct MergeReport {
    pub files: Vec<MergedFile>,
    /// Whether the extractor file was stored (the store had none).
    pub extractor_stored: bool,
    pub seconds: f64,
}

/// Where a merge is, for the caller to render.
#[derive(Debug, Clone, Copy)]
pub enum MergeProgress {
    /// Files read through and checked, before anything is written.
    Checking { done: usize, total: usize },
    /// Files taken into the store.
    Merging { done: usize, total: usize },
}

/// Takes shard files (features and codes, in any order) into the store. Every file is read
/// whole and checked first; only when all are sound is anything written, features before
/// codes, in flushed batches. A store without a feature extractor takes the one in
/// `extractor_file`, which must be the one the features files were made with.
pub fn merge(
    store: &Store,
    files: &[PathBuf],
    extractor_file: Option<&Path>,
    progress: &mut dyn FnMut(MergeProgress),
) -> Result<MergeReport, IndexError> {
    let started = Instant::now();
    let mut opened = Vec::with_capacity(files.len());
    for path in files {
        let (kind, reader) = open_shard(path, None)?;
        opened.push((path.clone(), kind, reader));
    }
    opened.sort_by_key(|(_, kind, _)| *kind == CODES_KIND);

    // Which extractor and model the files must have been made with.
    let stored_extractor = store.blob_bytes(EXTRACTOR_BLOB)?;
    let given_extractor = extractor_file
        .map(|path| read_learned::<FeatureExtractor>(path, "a feature extractor"))
        .transpose()?;
    let extractor_bytes = stored_extractor
        .clone()
        .or_else(|| given_extractor.as_ref().map(|(_, b)| b.clone()));
    let dimension = match (&stored_extractor, &given_extractor) {
        (Some(bytes), _) => serde_json::from_slice::<FeatureExtractor>(bytes)
            .map_err(|e| StoreError::Corrupt {
                dir: store.dir().to_path_buf(),
                key: EXTRACTOR_BLOB.into(),
                detail: e.to_string(),
            })?
            .dimension(),
        (None, Some((extractor, _))) => extractor.dimension(),
        (None, None) => 0,
    };
    let model_print = store.blob_bytes(MODEL_BLOB)?.map(|b| fingerprint(&b));
    for (path, kind, reader) in &opened {
        let made_with = reader.meta(EXTRACTOR_KEY).unwrap_or("none").to_string();
        match (*kind, &extractor_bytes) {
            (FEATURES_KIND, None) => return Err(IndexError::NoExtractor { path: path.clone() }),
            (_, Some(bytes)) if fingerprint(bytes) != made_with => {
                return Err(IndexError::OtherExtractor {
                    path: path.clone(),
                    made_with,
                    expected: fingerprint(bytes),
                    source_name: if stored_extractor.is_some() {
                        format!("the store at {}", store.dir().display())
                    } else {
                        extractor_file
                            .map(|p| p.display().to_string())
                            .unwrap_or_default()
                    },
                })
            }
            _ => {}
        }
        if *kind == CODES_KIND {
            let made_with = reader.meta(MODEL_KEY).unwrap_or("none").to_string();
            match &model_print {
                None => return Err(IndexError::NoModel { path: path.clone() }),
                Some(expected) if *expected != made_with => {
                    return Err(IndexError::OtherModel {
                        path: path.clone(),
                        made_with,
                        expected: expected.clone(),
                    })
                }
                _ => {}
            }
        }
    }

    // Every file read through before anything is written.
    let total = opened.len();
    for (done, (path, kind, reader)) in opened.iter().enumerate() {
        reader.rows(GROUP, &mut |rows| {
            for row in rows {
                let length = if *kind == FEATURES_KIND {
                    let (item, features) = read_feature_row(path, row)?;
                    if features.len() != dimension {
                        return Err(IndexError::ShardFile {
                            path: path.clone(),
                            problem: format!(
                                "{} has {} feature values, the extractor makes {dimension}",
                                item.rel_path,
                                features.len()
                            ),
                        });
                    }
                    features.len()
                } else {
                    read_code_row(path, row)?.2.len()
                };
                if length == 0 {
                    return Err(IndexError::ShardFile {
                        path: path.clone(),
                        problem: "a row without values".into(),
                    });
                }
            }
            Ok(())
        })?;
        progress(MergeProgress::Checking {
            done: done + 1,
            total,
        });
    }

    let extractor_stored = stored_extractor.is_none() && given_extractor.is_some();
    if let (None, Some((_, bytes))) = (&stored_extractor, &given_extractor) {
        store.put_blob_bytes(EXTRACTOR_BLOB, bytes)?;
    }
    let mut merged = Vec::with_capacity(total);
    for (done, (path, kind, reader)) in opened.iter().enumerate() {
        let mut counts = MergedFile {
            path: path.clone(),
            kind,
            part: reader.meta(PART_KEY).unwrap_or("").to_string(),
            rows: 0,
            written: 0,
            unchanged: 0,
            not_in_store: 0,
        };
        reader.rows(GROUP, &mut |rows| {
            counts.rows += rows.len();
            if *kind == FEATURES_KIND {
                merge_features(store, path, rows, &mut counts)
            } else {
                merge_codes(store, path, rows, &mut counts)
            }
        })?;
        merged.push(counts);
        progress(MergeProgress::Merging {
            done: done + 1,
            total,
        });
    }
    Ok(MergeReport {
        files: merged,
        extractor_stored,
        seconds: started.elapsed().as_secs_f64(),
    })
}

fn merge_features(
    store: &Store,
    path: &Path,
    rows: Vec<Vec<Value>>,
    counts: &mut MergedFile,
) -> Result<(), IndexError> {
    let mut items = Vec::new();
    let mut vectors = Vec::new();
    let held_features = store.vector_reader(FEATURES)?;
    for row in rows {
        let (item, features) = read_feature_row(path, row)?;
        let held = store.item(&item.id)?;
        if held.as_ref() == Some(&item) && held_features.holds(&item.id, &features)? {
            counts.unchanged += 1;
            continue;
        }
        vectors.push((item.id.clone(), features));
        items.push(item);
    }
    counts.written += items.len();
    // Records first: a record whose bytes changed loses its old vectors with it, and a
    // crash before the vectors leaves a picture without features, which a rerun completes.
    store.update_items(&items, &[])?;
    store.put_vectors(FEATURES, &vectors)?;
    Ok(())
}

fn merge_codes(
    store: &Store,
    path: &Path,
    rows: Vec<Vec<Value>>,
    counts: &mut MergedFile,
) -> Result<(), IndexError> {
    let mut codes = Vec::new();
    let (features, held_codes) = (store.vector_reader(FEATURES)?, store.vector_reader(CODES)?);
    for row in rows {
        let (id, content_hash, code) = read_code_row(path, row)?;
        let held = store.item(&id)?;
        if held.is_none_or(|item| item.content_hash != content_hash) || features.get(&id)?.is_none()
        {
            counts.not_in_store += 1;
            continue;
        }
        if held_codes.holds(&id, &code)? {
            counts.unchanged += 1;
            continue;
        }
        codes.push((id, code));
    }
    counts.written += codes.len();
    store.put_vectors(CODES, &codes)?;
    Ok(())
}

#[cfg(test)]
mod tests;
