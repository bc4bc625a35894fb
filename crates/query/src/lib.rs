//! Questions people ask of a trained collection: which pictures fit these tags, which
//! tags fit this picture, what is like this picture but with one thing changed, and
//! which pictures carry tags that do not fit them.
//!
//! Everything here reads the store; nothing writes. Answers are suggestions for a
//! person to review, never facts.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use ndarray::{s, Array1, Array2, ArrayView2, Axis};
use rayon::prelude::*;
use serde::Serialize;
use tagweave_collection::{closest_tag, normalize_tag, ItemRecord};
use tagweave_store::{
    CodeIndex, HeldVectors, Items, KeptAnswers, SearchMode, Store, StoreError, VectorReader, CODES,
    EXTRACTOR_BLOB, FEATURES,
};
use tagweave_suggest::{KnnScorer, SuggestError, TagColumns, TrainedModel, MODEL_FORMAT};
use tagweave_vision::{FeatureExtractor, VisionError};

mod audit;
mod familiar;
mod to_tag;
pub use audit::{Audit, Dispute, DisputedTag, EvidenceMix};
pub use familiar::{Familiarity, USUAL_SHARE};
pub use to_tag::{pictures_to_tag, PictureToTag, ToTagList, ToTagReason};

#[derive(Debug, thiserror::Error)]
pub enum QueryError {
    #[error("this collection has no trained model yet; run `tagweave train` first")]
    NotTrained,
    #[error(
        "the model does not know the tag{} {}; `tagweave tags` lists the tags pictures carry \
         (the model learns tags carried by at least one tagged picture)",
        if unknown.len() == 1 { "" } else { "s" },
        unknown.iter().map(UnknownTag::to_string).collect::<Vec<_>>().join(", ")
    )]
    UnknownTags { unknown: Vec<UnknownTag> },
    #[error("give at least one tag")]
    NoTags,
    /// A picture file that could not be described; `problem` says why and what to do.
    #[error("{problem}")]
    Picture { path: PathBuf, problem: String },
    #[error(
        "{path} is not indexed; scan the folder first (`tagweave scan FOLDER`), or give a \
         picture file to judge on its own"
    )]
    NotIndexed { path: PathBuf },
    #[error(
        "{path} has no features yet (its scan was cut short); run `tagweave scan FOLDER` again"
    )]
    NotDescribed { path: String },
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Suggest(#[from] SuggestError),
}

pub type Result<T> = std::result::Result<T, QueryError>;

/// A typed tag the model does not know, and the known tag it is probably a slip for.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct UnknownTag {
    pub typed: String,
    pub did_you_mean: Option<String>,
}

impl std::fmt::Display for UnknownTag {
    fn fmt(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
        write!(f, "`{}`", self.typed)?;
        match &self.did_you_mean {
            Some(tag) => write!(f, " (did you mean `{tag}`?)"),
            None => Ok(()),
        }
    }
}

/// One tag with the model's probability that it fits a picture.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TagScore {
    pub tag: String,
    pub probability: f32,
    /// Whether the picture's sidecar already carries the tag.
    pub carried: bool,
}

/// One picture in a ranked answer.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Found {
    pub picture: String,
    pub similarity: f32,
    /// `find`: the suggester's probability that the picture fits every asked tag (a tag
    /// its sidecar carries counts as sure; the others are taken as independent).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub probability: Option<f32>,
    /// Whether the picture's sidecar carries every asked tag (`false`: inferred).
    pub carries: bool,
    pub tagged: bool,
}

/// Options of [`Queries::find`] and [`Queries::shift`].
#[derive(Debug, Clone, Copy)]
pub struct Ranking {
    pub limit: usize,
    pub untagged_only: bool,
    /// Exact search instead of the Hamming pre-filter, for checking.
    pub exact: bool,
}

impl Default for Ranking {
    fn default() -> Self {
        Ranking {
            limit: 10,
            untagged_only: false,
            exact: false,
        }
    }
}

/// Tagged pictures read from the store at once when the kNN part is built: a batch's
/// features as `f32` (1,024 × 3,700 values: 15 MB) before they are kept as bytes.
const READ_BATCH: usize = 1024;

/// Where a question reads a picture's features.
enum FeatureSource {
    /// From the open store, a picture at a time: memory follows what is asked, not the
    /// size of the collection (the commands).
    Store(VectorReader),
    /// Where each lies, by item row, with the files held open (the review page, which lets
    /// the store go while it runs): 16 bytes a picture in memory.
    Held(HeldVectors),
}

/// Every picture's code, searchable, and the item of each.
struct CodeSearch {
    codes: CodeIndex,
    /// Item row of each code-index row (the index is in id order, items in path order);
    /// built once, not per query: at a million pictures it is a million lookups.
    item_of_code: Vec<Option<usize>>,
}

/// The tagged pictures the kNN part leans on.
struct Neighbours {
    scorer: KnnScorer,
    /// For each item row, its row among the scorer's pictures (tagged ones only).
    row: Vec<Option<usize>>,
}

/// A trained store opened for questions.
pub struct Queries {
    root: PathBuf,
    trained: TrainedModel,
    /// Every indexed picture, by relative path (read one at a time when asked by the
    /// commands, held by the page).
    items: Items,
    features: FeatureSource,
    /// The code search, loaded when first asked (suggestions and the audit never need it).
    search: OnceLock<CodeSearch>,
    /// Reads the codes for `search` (the commands; the page loads the search at open).
    code_reader: Option<VectorReader>,
    /// The kNN part, gathered when first needed: the audit's shares always need it,
    /// suggestions only when the trained blend gives it weight.
    neighbours: OnceLock<Neighbours>,
    /// Answers for the kNN part where the blend gives it no weight.
    no_neighbours: KnnScorer,
    columns: TagColumns,
    extractor: Option<FeatureExtractor>,
    /// The tagged pictures to judge familiarity by (see [`Familiarity`]), once asked.
    memory: familiar::MemoryCache,
    /// Where that memory is kept between commands.
    kept_memory: KeptAnswers,
}

impl Queries {
    /// Opens a trained store for questions that read features from it when asked: keep
    /// `store` open while asking.
    pub fn open(store: &Store) -> Result<Queries> {
        let reader = store.vector_reader(FEATURES)?;
        Queries::open_with(store, store.items_to_ask()?, FeatureSource::Store(reader))
    }

    /// Opens a trained store for questions asked after it is closed (the review page):
    /// where every picture's features lie is held, with their files open, and the
    /// features read as they were at open, whatever is written since.
    pub fn open_to_keep(store: &Store) -> Result<Queries> {
        let items = store.items_to_keep()?;
        let ids: Vec<&str> = items.all()?.iter().map(|item| item.id.as_str()).collect();
        let held = store.vector_reader(FEATURES)?.hold(&ids)?;
        Queries::open_with(store, items, FeatureSource::Held(held))
    }

    fn open_with(store: &Store, items: Items, features: FeatureSource) -> Result<Queries> {
        let trained = store
            .model(MODEL_FORMAT, |m: &TrainedModel| m.format)?
            .ok_or(QueryError::NotTrained)?;
        let keeps_features = matches!(features, FeatureSource::Held(_));
        // The page outlives the store and cannot know of changes made by others meanwhile:
        // it reads a kept memory but keeps none.
        let kept_memory = if keeps_features {
            store.kept_answers_to_read(familiar::KEPT_AS)
        } else {
            store.kept_answers(familiar::KEPT_AS)
        };
        let mut queries = Queries {
            root: store.collection_root().to_path_buf(),
            extractor: store.blob(EXTRACTOR_BLOB)?,
            items,
            features,
            search: OnceLock::new(),
            code_reader: Some(store.vector_reader(CODES)?),
            neighbours: OnceLock::new(),
            no_neighbours: trained.empty_neighbours(),
            columns: trained.columns(),
            trained,
            memory: familiar::MemoryCache::new(),
            kept_memory,
        };
        if keeps_features {
            // Outlives the store: load the code search now and keep no reader of it; the
            // page asks for shares at once, so gather the neighbours while it starts.
            queries.code_search()?;
            queries.code_reader = None;
            queries.neighbours()?;
            queries.memory()?;
        }
        Ok(queries)
    }

    /// Works out what a first question would otherwise wait for (the code search, the
    /// familiarity memory, where each picture's features lie), which keeps it beside the
    /// store for later commands: for a writer that just changed much (a scan, training).
    /// Codes are only ever read all at once (the code search), so their locations are not
    /// kept.
    pub fn prepare(&self) -> Result<()> {
        self.code_search()?;
        self.memory()?;
        if let FeatureSource::Store(features) = &self.features {
            features.keep_locations()?;
        }
        Ok(())
    }

    fn code_search(&self) -> Result<&CodeSearch> {
        if let Some(search) = self.search.get() {
            return Ok(search);
        }
        let reader = self.code_reader.as_ref().ok_or(QueryError::NotTrained)?;
        let codes = CodeIndex::load_from(reader, &self.trained.hash_thresholds)?;
        let item_of_code = self
            .items
            .rows_of_ids((0..codes.len()).map(|r| codes.id(r)))?;
        Ok(self.search.get_or_init(|| CodeSearch {
            codes,
            item_of_code,
        }))
    }

    /// The kNN part: every described picture carrying a tag the model knows, read a
    /// batch at a time when first asked.
    fn neighbours(&self) -> Result<&Neighbours> {
        if let Some(gathered) = self.neighbours.get() {
            return Ok(gathered);
        }
        let mut gathered = Neighbours {
            scorer: self.trained.empty_neighbours(),
            row: vec![None; self.items.len()],
        };
        let known: Vec<(usize, Vec<usize>)> = self
            .items
            .tagged_rows()?
            .par_iter()
            .map(|&r| Ok((r, self.columns.encode(&self.items.get(r)?.tags))))
            .collect::<Result<Vec<_>>>()?
            .into_iter()
            .filter(|(_, columns)| !columns.is_empty())
            .collect();
        let tagged: Vec<usize> = known.iter().map(|&(r, _)| r).collect();
        let columns_of: HashMap<usize, &Vec<usize>> = known.iter().map(|(r, c)| (*r, c)).collect();
        for batch in tagged.chunks(READ_BATCH) {
            let (described, x) = self.read_scaled(batch)?;
            let tags: Vec<Vec<usize>> = described.iter().map(|r| columns_of[r].clone()).collect();
            let first = gathered.scorer.train_len();
            for (j, &r) in described.iter().enumerate() {
                gathered.row[r] = Some(first + j);
            }
            gathered.scorer.add_train_pictures(x.view(), &tags);
        }
        Ok(self.neighbours.get_or_init(|| gathered))
    }

    /// The kNN part as suggestions use it, and for each of `rows` the picture it must
    /// not lean on (itself); empty when the blend gives the kNN part no weight.
    fn neighbours_for_suggestions(
        &self,
        rows: impl Iterator<Item = usize>,
    ) -> Result<(&KnnScorer, Vec<Option<usize>>)> {
        if !self.trained.suggester.leans_on_neighbours() {
            return Ok((&self.no_neighbours, rows.map(|_| None).collect()));
        }
        let neighbours = self.neighbours()?;
        Ok((
            &neighbours.scorer,
            rows.map(|r| neighbours.row[r]).collect(),
        ))
    }

    /// The features of item rows, scaled for the model, of those that have features (the
    /// rows returned, in their order).
    fn read_scaled(&self, rows: &[usize]) -> Result<(Vec<usize>, Array2<f32>)> {
        let read: Vec<Option<Vec<f32>>> = rows
            .par_iter()
            .map(|&r| self.raw_features(r))
            .collect::<Result<_>>()?;
        let width = self.trained.feature_width();
        let described: Vec<usize> = rows
            .iter()
            .zip(&read)
            .filter(|(_, f)| f.is_some())
            .map(|(&r, _)| r)
            .collect();
        let mut raw = Array2::zeros((described.len(), width));
        for (mut row, values) in raw.outer_iter_mut().zip(read.into_iter().flatten()) {
            if values.len() != width {
                return Err(SuggestError::FeatureWidth {
                    got: values.len(),
                    expected: width,
                }
                .into());
            }
            row.assign(&ndarray::ArrayView1::from(&values));
        }
        Ok((described, self.trained.scale(raw.view())?))
    }

    /// The features of item rows, scaled for the model; an error names a picture without.
    fn scaled_rows(&self, rows: &[usize]) -> Result<Array2<f32>> {
        let (described, x) = self.read_scaled(rows)?;
        if described.len() < rows.len() {
            let missing = rows.iter().find(|r| !described.contains(r)).copied();
            let path = match missing {
                Some(r) => self.items.get(r)?.rel_path.clone(),
                None => String::new(),
            };
            return Err(QueryError::NotDescribed { path });
        }
        Ok(x)
    }

    /// Whether an indexed picture has features (a cut-short scan leaves some without).
    pub fn is_described(&self, row: usize) -> Result<bool> {
        Ok(match &self.features {
            FeatureSource::Store(reader) => reader.has(&self.items.get(row)?.id)?,
            FeatureSource::Held(held) => held.has(row),
        })
    }

    fn raw_features(&self, row: usize) -> Result<Option<Vec<f32>>> {
        let item = self.items.get(row)?;
        Ok(match &self.features {
            FeatureSource::Store(reader) => reader.get(&item.id)?,
            FeatureSource::Held(held) => held.get(row, &item.id)?,
        })
    }

    /// Every indexed picture, by relative path (rows of the answers).
    pub fn items(&self) -> &Items {
        &self.items
    }

    pub fn vocabulary(&self) -> &[String] {
        &self.trained.vocabulary
    }

    /// The row of a picture given as a path (relative to the current folder, absolute,
    /// or relative to the collection root), if it is indexed.
    pub fn row_of_path(&self, path: &Path) -> Result<Option<usize>> {
        let absolute = std::fs::canonicalize(path).ok();
        let root = std::fs::canonicalize(&self.root).ok();
        let rel = match (absolute, root) {
            (Some(a), Some(r)) => a.strip_prefix(&r).ok().map(Path::to_path_buf),
            _ => None,
        }
        .unwrap_or_else(|| path.to_path_buf());
        self.row_of_rel_path(&rel.to_string_lossy().replace('\\', "/"))
    }

    /// The row of a picture given by its path relative to the collection root.
    pub fn row_of_rel_path(&self, rel: &str) -> Result<Option<usize>> {
        Ok(self.items.row_of_rel_path(rel)?)
    }

    /// Tag probabilities for indexed pictures (rows). A picture that carries tags the
    /// model knows is judged from its pixels and those tags together (its carried tags
    /// then come back likely; callers leave them out); the kNN part never leans on the
    /// picture itself.
    /// Asked of many rows (every tagged picture of a million, on the page's walk), the
    /// features are read and judged `READ_BATCH` rows at a time: only the answers are held
    /// for all.
    pub fn suggest_rows(&self, rows: &[usize]) -> Result<Array2<f32>> {
        let mut out = Array2::zeros((rows.len(), self.columns.len()));
        for (b, batch) in rows.chunks(READ_BATCH).enumerate() {
            let x = self.scaled_rows(batch)?;
            out.slice_mut(s![b * READ_BATCH..b * READ_BATCH + batch.len(), ..])
                .assign(&self.suggest_scaled(batch, x.view())?);
        }
        Ok(out)
    }

    /// [`Self::suggest_rows`] and [`Self::neighbour_shares`] of the same rows, their
    /// features read once, a batch at a time.
    pub fn suggest_and_shares(&self, rows: &[usize]) -> Result<(Array2<f32>, Array2<f32>)> {
        let mut probabilities = Array2::zeros((rows.len(), self.columns.len()));
        let mut shares = Array2::zeros((rows.len(), self.columns.len()));
        self.suggest_and_shares_by_batch(rows, |at, p, s| {
            probabilities.slice_mut(s![at.clone(), ..]).assign(&p);
            shares.slice_mut(s![at, ..]).assign(&s);
            Ok(())
        })?;
        Ok((probabilities, shares))
    }

    /// [`Self::suggest_and_shares`] handed to `visit` a batch at a time with the
    /// positions in `rows` it covers, for callers that keep only part of each answer.
    pub fn suggest_and_shares_by_batch(
        &self,
        rows: &[usize],
        mut visit: impl FnMut(std::ops::Range<usize>, ArrayView2<f32>, ArrayView2<f32>) -> Result<()>,
    ) -> Result<()> {
        for (b, batch) in rows.chunks(READ_BATCH).enumerate() {
            let at = b * READ_BATCH..b * READ_BATCH + batch.len();
            let x = self.scaled_rows(batch)?;
            let probabilities = self.suggest_scaled(batch, x.view())?;
            let shares = self.shares_scaled(batch, x.view())?;
            visit(at, probabilities.view(), shares.view())?;
        }
        Ok(())
    }

    /// [`Self::suggest_rows`] given the rows' scaled features `x`.
    fn suggest_scaled(&self, rows: &[usize], x: ArrayView2<f32>) -> Result<Array2<f32>> {
        let carried: Vec<Vec<usize>> = rows
            .iter()
            .map(|&r| self.evidence_columns(r))
            .collect::<Result<_>>()?;
        self.suggest_given_columns(rows, x, &carried)
    }

    /// Tag probabilities for indexed pictures (rows, scaled features `x`), each given the
    /// tag columns `carried[i]` as evidence (none: from the picture alone).
    fn suggest_given_columns(
        &self,
        rows: &[usize],
        x: ArrayView2<f32>,
        carried: &[Vec<usize>],
    ) -> Result<Array2<f32>> {
        let (partly, alone): (Vec<usize>, Vec<usize>) =
            (0..rows.len()).partition(|&i| !carried[i].is_empty());
        let mut out = Array2::zeros((rows.len(), self.columns.len()));
        let suggester = &self.trained.suggester;
        for (positions, with_tags) in [(alone, false), (partly, true)] {
            if positions.is_empty() {
                continue;
            }
            let x = x.select(Axis(0), &positions);
            let (neighbours, exclude) =
                self.neighbours_for_suggestions(positions.iter().map(|&i| rows[i]))?;
            let p = if with_tags {
                let shown: Vec<Vec<usize>> =
                    positions.iter().map(|&i| carried[i].clone()).collect();
                suggester.suggest_given(x.view(), &shown, neighbours, &exclude)?
            } else {
                suggester.suggest(x.view(), neighbours, &exclude)?
            };
            for (&i, row) in positions.iter().zip(p.outer_iter()) {
                out.row_mut(i).assign(&row);
            }
        }
        Ok(out)
    }

    /// The tags of an indexed picture that the model takes as evidence when it
    /// suggests more: those it carries and the model knows. Empty when the trained
    /// blend gives carried tags no weight (its validation fold found them uninformative).
    pub fn evidence(&self, row: usize) -> Result<Vec<String>> {
        if !self.trained.suggester.completion_uses_tags() {
            return Ok(Vec::new());
        }
        Ok(self
            .evidence_columns(row)?
            .into_iter()
            .map(|c| self.trained.vocabulary[c].clone())
            .collect())
    }

    fn evidence_columns(&self, row: usize) -> Result<Vec<usize>> {
        Ok(self.columns_of_tags(&self.items.get(row)?.tags))
    }

    /// The model's columns of `tags` (those it knows), ascending, each once.
    fn columns_of_tags(&self, tags: &[String]) -> Vec<usize> {
        let mut columns: Vec<usize> = tags
            .iter()
            .filter_map(|t| self.columns.index_of(t))
            .collect();
        columns.sort_unstable();
        columns.dedup();
        columns
    }

    /// For indexed pictures (rows): the share of their most similar tagged pictures
    /// (never themselves) that carry each tag.
    pub fn neighbour_shares(&self, rows: &[usize]) -> Result<Array2<f32>> {
        let x = self.scaled_rows(rows)?;
        self.shares_scaled(rows, x.view())
    }

    fn shares_scaled(&self, rows: &[usize], x: ArrayView2<f32>) -> Result<Array2<f32>> {
        let neighbours = self.neighbours()?;
        let exclude: Vec<Option<usize>> = rows.iter().map(|&r| neighbours.row[r]).collect();
        Ok(neighbours.scorer.shares_excluding(x, &exclude)?)
    }

    /// Tag probabilities for a picture file outside the index, described on the fly
    /// with the collection's own feature extractor.
    pub fn suggest_file(&self, path: &Path) -> Result<Vec<f32>> {
        let x = self.scaled_file(path)?;
        let (neighbours, _) = self.neighbours_for_suggestions(std::iter::empty())?;
        let p = self.trained.suggester.suggest(x.view(), neighbours, &[])?;
        Ok(p.row(0).to_vec())
    }

    /// [`Self::suggest_file`] and how far the picture lies from the tagged pictures.
    pub fn judge_file(&self, path: &Path) -> Result<(Vec<f32>, Familiarity)> {
        let x = self.scaled_file(path)?;
        let (neighbours, _) = self.neighbours_for_suggestions(std::iter::empty())?;
        let p = self.trained.suggester.suggest(x.view(), neighbours, &[])?;
        let familiarity = self.familiarity_of_features(x.row(0))?;

        Ok((p.row(0).to_vec(), familiarity))
    }

    /// A picture file's features, scaled for the model (one row).
    fn scaled_file(&self, path: &Path) -> Result<Array2<f32>> {
        let extractor = self.extractor.as_ref().ok_or(QueryError::NotTrained)?;
        let raw = extractor
            .features(path)
            .map_err(|error| QueryError::Picture {
                path: path.to_path_buf(),
                problem: picture_problem(path, &error, self.is_inside(path)),
            })?;
        let raw = Array1::from(raw).insert_axis(Axis(0));
        Ok(self.trained.scale(raw.view())?)
    }

    /// Whether `path` lies inside the collection folder (it need not exist).
    fn is_inside(&self, path: &Path) -> bool {
        let absolute = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
        let folder = std::fs::canonicalize(absolute.parent().unwrap_or(Path::new(".")))
            .unwrap_or_else(|_| absolute.clone());
        let root = std::fs::canonicalize(&self.root).unwrap_or_else(|_| self.root.clone());
        folder.starts_with(root)
    }

    /// Whether every probability the model gives is calibrated, with or without tags as
    /// evidence (`find` and `shift` multiply both kinds).
    pub fn all_calibrated(&self) -> bool {
        let suggester = &self.trained.suggester;
        enough_to_calibrate(self.trained.history.pictures)
            && suggester.calibration.is_some()
            && suggester.completion.calibration.is_some()
    }

    /// Whether the probabilities given for a picture are calibrated on held-out pictures
    /// (else they are scores, ordered like probabilities but not ones). An indexed picture
    /// (`row`) carrying tags the model knows is judged by the blend for pictures with some
    /// tags, which has a calibration of its own.
    pub fn calibrated(&self, row: Option<usize>) -> bool {
        let suggester = &self.trained.suggester;
        if !enough_to_calibrate(self.trained.history.pictures) {
            return false;
        }
        match row {
            Some(r) if self.evidence_columns(r).is_ok_and(|c| !c.is_empty()) => {
                suggester.completion.calibration.is_some()
            }
            _ => suggester.calibration.is_some(),
        }
    }

    /// Probabilities as tag scores, best first; `carried` marks the picture's own tags.
    pub fn tag_scores(&self, probabilities: &[f32], carried: &[String]) -> Vec<TagScore> {
        tag_scores(&self.trained.vocabulary, probabilities, carried)
    }

    /// The tags a person typed, as the model's tags, in the order typed, each once. An
    /// argument is one tag when the model knows it as a whole ("Old Town" → old-town);
    /// otherwise each word between its commas and spaces is one ("night harbour" and
    /// "night,harbour" → night, harbour), as on the review page. Unknown tags are an error
    /// naming each, with the known tag it is probably a slip for.
    pub fn tags_asked(&self, typed: &[String]) -> Result<Vec<String>> {
        let known = |text: &str| normalize_tag(text).filter(|t| self.columns.index_of(t).is_some());
        let mut tags: Vec<String> = Vec::new();
        let mut unknown = Vec::new();
        for text in typed {
            let words: Vec<&str> = match known(text) {
                Some(_) => vec![text.as_str()],
                None => text
                    .split(|c: char| c == ',' || c.is_whitespace())
                    .filter(|w| normalize_tag(w).is_some())
                    .collect(),
            };
            for word in words {
                match known(word) {
                    Some(tag) if !tags.contains(&tag) => tags.push(tag),
                    Some(_) => {}
                    None => unknown.push(word.to_string()),
                }
            }
        }
        if !unknown.is_empty() {
            let by_use = self.tags_by_use()?;
            let unknown = unknown
                .into_iter()
                .map(|typed| UnknownTag {
                    did_you_mean: closest_tag(&typed, by_use.iter().map(String::as_str))
                        .map(str::to_string),
                    typed,
                })
                .collect();
            return Err(QueryError::UnknownTags { unknown });
        }
        if tags.is_empty() {
            return Err(QueryError::NoTags);
        }
        Ok(tags)
    }

    /// The model's tags, the most carried first (ties by tag).
    fn tags_by_use(&self) -> Result<Vec<String>> {
        let mut count: HashMap<&str, usize> = HashMap::new();
        let all = self.items.all()?;
        for tag in all.iter().flat_map(|i| &i.tags) {
            *count.entry(tag).or_default() += 1;
        }
        let mut tags = self.trained.vocabulary.clone();
        tags.sort_by(|a, b| {
            let uses = |t: &String| count.get(t.as_str()).copied().unwrap_or(0);
            uses(b).cmp(&uses(a)).then(a.cmp(b))
        });
        Ok(tags)
    }

    /// Typed tags ([`Self::tags_asked`]) as a 0/1 row in model columns.
    fn tag_row(&self, tags: &[String]) -> Result<Array2<f32>> {
        let mut row = Array2::zeros((1, self.columns.len()));
        for tag in self.tags_asked(tags)? {
            if let Some(c) = self.columns.index_of(&tag) {
                row[[0, c]] = 1.0;
            }
        }
        Ok(row)
    }

    /// Where the tags sit among picture codes: the mean of their centroids (each the
    /// mean code of the training pictures carrying the tag).
    pub fn code_of_tags(&self, tags: &[String]) -> Result<Vec<f32>> {
        let row = self.tag_row(tags)?;
        let chosen = row
            .row(0)
            .iter()
            .zip(&self.trained.tag_centroids)
            .filter(|(&v, _)| v > 0.0)
            .map(|(_, c)| c.as_slice())
            .collect::<Vec<_>>();
        Ok(mean_code(&chosen, self.trained.hash_thresholds.len()))
    }

    /// Pictures most likely to fit every tag: the code search picks candidates near
    /// the tags' code ([`FIND_CANDIDATES`] per answer), the suggester's probabilities
    /// rank them.
    pub fn find(&self, tags: &[String], ranking: Ranking) -> Result<Vec<Found>> {
        let query = self.code_of_tags(tags)?;
        let row = self.tag_row(tags)?;
        let asked: Vec<usize> = (0..row.ncols()).filter(|&c| row[[0, c]] > 0.0).collect();
        let wanted: Vec<String> = asked
            .iter()
            .map(|&c| self.trained.vocabulary[c].clone())
            .collect();
        let search = (ranking, FIND_CANDIDATES);
        self.ranked_by_chance(&query, search, None, &wanted, (&asked, &[]))
    }

    /// For each picture (rows), the chance that it carries every tag column of `wanted`
    /// and none of `shunned`, by the chain rule: P(t1) · P(t2 | t1) · … · (1 − P(s1 | t…)),
    /// each tag judged with the picture's own tags and the wanted ones before it as
    /// evidence. A tag its sidecar carries counts as sure.
    fn chance_of(&self, rows: &[usize], wanted: &[usize], shunned: &[usize]) -> Result<Vec<f32>> {
        let mut chance = vec![1.0f32; rows.len()];
        let mut assumed: Vec<Vec<usize>> = rows
            .iter()
            .map(|&r| self.evidence_columns(r))
            .collect::<Result<_>>()?;
        let carried: Vec<Vec<String>> = rows
            .iter()
            .map(|&r| Ok(self.items.get(r)?.tags.clone()))
            .collect::<Result<_>>()?;
        let x = self.scaled_rows(rows)?;
        let steps = wanted.iter().map(|&c| (c, true));
        for (column, want) in steps.chain(shunned.iter().map(|&c| (c, false))) {
            let tag = std::slice::from_ref(&self.trained.vocabulary[column]);
            let p = self.suggest_given_columns(rows, x.view(), &assumed)?;
            for i in 0..rows.len() {
                let fits = fits_all(&[column], tag, &carried[i], &p.row(i).to_vec());
                chance[i] *= if want { fits } else { 1.0 - fits };
                if want && !assumed[i].contains(&column) {
                    assumed[i].push(column);
                    assumed[i].sort_unstable();
                }
            }
        }
        Ok(chance)
    }

    /// The pictures nearest code(picture) − code(away tags) + code(toward tags) (never
    /// the picture itself), ordered like `find` by the chance that they carry the toward
    /// tags and none of the away tags. "Carries" refers to the toward tags.
    pub fn shift(
        &self,
        row: usize,
        away: &[String],
        toward: &[String],
        ranking: Ranking,
    ) -> Result<Vec<Found>> {
        let start = self.code_of_row(row)?;
        let away_code = if away.is_empty() {
            vec![0.0; start.len()]
        } else {
            self.code_of_tags(away)?
        };
        let toward_code = if toward.is_empty() {
            vec![0.0; start.len()]
        } else {
            self.code_of_tags(toward)?
        };
        let query = shifted_code(&start, &away_code, &toward_code);
        let wanted = if toward.is_empty() {
            Vec::new()
        } else {
            self.tags_asked(toward)?
        };
        let columns_of = |tags: &[String]| -> Result<Vec<usize>> {
            if tags.is_empty() {
                return Ok(Vec::new());
            }
            let row = self.tag_row(tags)?;
            Ok((0..row.ncols()).filter(|&c| row[[0, c]] > 0.0).collect())
        };
        let away_columns = columns_of(away)?;
        let toward_columns = columns_of(toward)?;
        // The nearest pictures only, reordered: drawing from more of them and ranking by
        // the chance alone lost what makes the answer "like this picture" (precision@10
        // of the demo's day → night shift 0.438 against 0.450).
        let search = (ranking, 1);
        self.ranked_by_chance(
            &query,
            search,
            Some(row),
            &wanted,
            (&toward_columns, &away_columns),
        )
    }

    fn code_of_row(&self, row: usize) -> Result<Vec<f32>> {
        let code = self
            .trained
            .suggester
            .codes(self.scaled_rows(&[row])?.view())?;
        Ok(code.row(0).to_vec())
    }

    /// The pictures nearest `query` (`candidates` per answer asked for, `skip` left out),
    /// ranked by [`Self::chance_of`] the tag columns `(wanted, shunned)`; "carries" refers
    /// to the tags named `carries`.
    fn ranked_by_chance(
        &self,
        query: &[f32],
        (ranking, candidates): (Ranking, usize),
        skip: Option<usize>,
        carries: &[String],
        (wanted, shunned): (&[usize], &[usize]),
    ) -> Result<Vec<Found>> {
        let wide = Ranking {
            limit: ranking.limit.saturating_mul(candidates),
            ..ranking
        };
        let hits = self.nearest_rows(query, wide, skip)?;
        let item_of_code = &self.code_search()?.item_of_code;
        // Item rows with their similarity; a code row without an indexed picture is dropped.
        let hits: Vec<(usize, f32)> = hits
            .into_iter()
            .filter_map(|(r, similarity)| Some((item_of_code[r]?, similarity)))
            .collect();
        let rows: Vec<usize> = hits.iter().map(|&(r, _)| r).collect();
        let records = rows
            .iter()
            .map(|&r| self.items.get(r))
            .collect::<std::result::Result<Vec<_>, _>>()?;
        let mut found = answers(
            records
                .iter()
                .map(|item| item.as_ref())
                .zip(hits.iter().map(|h| h.1)),
            carries,
        );
        let chance = self.chance_of(&rows, wanted, shunned)?;
        for (f, c) in found.iter_mut().zip(chance) {
            f.probability = Some(c);
        }
        rank_by_probability(&mut found);
        found.truncate(ranking.limit);
        Ok(found)
    }

    /// (code row, similarity) of the nearest listable pictures.
    fn nearest_rows(
        &self,
        query: &[f32],
        ranking: Ranking,
        skip: Option<usize>,
    ) -> Result<Vec<(usize, f32)>> {
        let mode = if ranking.exact {
            SearchMode::Exact
        } else {
            SearchMode::default()
        };
        let search = self.code_search()?;
        let item_of_code = &search.item_of_code;
        let tagged = self.items.tagged_rows()?;
        let is_tagged = |i: usize| tagged.binary_search(&i).is_ok();
        let hits = search.codes.search_where(query, ranking.limit, mode, |r| {
            listable(item_of_code[r], skip, ranking.untagged_only, is_tagged)
        })?;
        Ok(hits
            .into_iter()
            .map(|hit| (hit.row, hit.similarity))
            .collect())
    }
}

/// Fewest tagged pictures a model must have learned from for its calibration to count:
/// the calibration is fitted on a held-out seventh of them, and on fewer than 10 held-out
/// pictures a stated 80 % says little about how often such a tag is right.
pub const MIN_TAGGED_TO_CALIBRATE: usize = 70;

/// Whether a model trained on `tagged` pictures had enough of them to calibrate.
pub fn enough_to_calibrate(tagged: usize) -> bool {
    tagged >= MIN_TAGGED_TO_CALIBRATE
}

/// Why a picture file could not be described, and what to do: the advice to move a file
/// out of the collection is for files inside it only.
fn picture_problem(path: &Path, error: &VisionError, inside: bool) -> String {
    let name = path.display();
    match error {
        VisionError::Io { source, .. } => format!("cannot read {name}: {source}"),
        VisionError::UnknownFormat { .. } if inside => format!(
            "{name}: not a picture format tagweave reads (JPEG, PNG, GIF, BMP, TIFF, WebP, \
             or a camera RAW with a JPEG preview: DNG, CR2, NEF, ARW, ORF, RW2, PEF); \
             convert it or move it out of the collection"
        ),
        VisionError::UnknownFormat { .. } => format!(
            "{name}: not a picture format tagweave reads (JPEG, PNG, GIF, BMP, TIFF, WebP, \
             or a camera RAW with a JPEG preview: DNG, CR2, NEF, ARW, ORF, RW2, PEF); \
             convert it to one of these"
        ),
        other => other.to_string(),
    }
}

/// Candidates the code search hands `find` for each answer asked for.
pub const FIND_CANDIDATES: usize = 10;

/// The chance a picture fits every asked tag (columns `asked`, names `wanted`): 1 for a
/// tag its sidecar carries, the suggester's probability otherwise, multiplied.
fn fits_all(asked: &[usize], wanted: &[String], carried: &[String], probabilities: &[f32]) -> f32 {
    asked
        .iter()
        .zip(wanted)
        .map(|(&c, tag)| {
            if carried.contains(tag) {
                1.0
            } else {
                probabilities[c].clamp(0.0, 1.0)
            }
        })
        .product()
}

/// Most probable first; ties by similarity, then path.
fn rank_by_probability(found: &mut [Found]) {
    found.sort_by(|a, b| {
        b.probability
            .unwrap_or(0.0)
            .total_cmp(&a.probability.unwrap_or(0.0))
            .then(b.similarity.total_cmp(&a.similarity))
            .then(a.picture.cmp(&b.picture))
    });
}

/// The tags of `vocabulary` (model columns) with their probabilities, best first (ties by
/// tag); `carried` marks the picture's own tags.
fn tag_scores(vocabulary: &[String], probabilities: &[f32], carried: &[String]) -> Vec<TagScore> {
    let mut out: Vec<TagScore> = vocabulary
        .iter()
        .zip(probabilities)
        .map(|(tag, &p)| TagScore {
            tag: tag.clone(),
            probability: p,
            carried: carried.contains(tag),
        })
        .collect();
    out.sort_by(by_probability_then_tag);
    out
}

/// Most probable first; ties by tag.
fn by_probability_then_tag(a: &TagScore, b: &TagScore) -> std::cmp::Ordering {
    b.probability
        .total_cmp(&a.probability)
        .then(a.tag.cmp(&b.tag))
}

/// The mean of `codes`, each `dim` values long; zeros when there are none.
fn mean_code(codes: &[&[f32]], dim: usize) -> Vec<f32> {
    let mut code = vec![0.0f32; dim];
    for c in codes {
        code.iter_mut().zip(c.iter()).for_each(|(a, &b)| *a += b);
    }
    code.iter_mut()
        .for_each(|v| *v /= codes.len().max(1) as f32);
    code
}

/// `start − away + toward`, value by value (all three of one length).
fn shifted_code(start: &[f32], away: &[f32], toward: &[f32]) -> Vec<f32> {
    start
        .iter()
        .zip(away)
        .zip(toward)
        .map(|((s, a), t)| s - a + t)
        .collect()
}

/// Whether the picture of a code row may be answered: it is indexed (`item`), it is not
/// `skip`, and it is untagged when only untagged pictures are asked for.
fn listable(
    item: Option<usize>,
    skip: Option<usize>,
    untagged_only: bool,
    is_tagged: impl Fn(usize) -> bool,
) -> bool {
    item.is_some_and(|i| Some(i) != skip && (!untagged_only || !is_tagged(i)))
}

/// Search hits (the picture's item, similarity), in their order, as answers. An answer
/// "carries" when its picture's tags include every `wanted` tag (never when nothing is
/// wanted).
fn answers<'a>(
    hits: impl IntoIterator<Item = (&'a ItemRecord, f32)>,
    wanted: &[String],
) -> Vec<Found> {
    hits.into_iter()
        .map(|(item, similarity)| Found {
            picture: item.rel_path.clone(),
            similarity,
            probability: None,
            carries: !wanted.is_empty() && wanted.iter().all(|t| item.tags.contains(t)),
            tagged: !item.tags.is_empty(),
        })
        .collect()
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use tagweave_collection::{FileStamp, ImageFormat};

    pub(crate) fn strings(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    /// An indexed picture as the queries see it: only its path and tags matter.
    pub(crate) fn item(rel_path: &str, tags: &[&str]) -> ItemRecord {
        ItemRecord {
            id: tagweave_collection::item_id(rel_path),
            rel_path: rel_path.to_string(),
            format: ImageFormat::Jpeg,
            stamp: FileStamp {
                size: 1,
                mtime_ns: 1,
            },
            content_hash: String::new(),
            sidecars: vec![],
            tags: strings(tags),
            accepted: Vec::new(),
        }
    }

    // worked by hand: probabilities [0.2, 0.9, 0.2] over [boat, night, sea]: night first,
    // then the tie boat / sea in tag order; "sea" is carried.
    #[test]
    fn tag_scores_rank_by_probability_then_tag() {
        let scores = tag_scores(
            &strings(&["boat", "night", "sea"]),
            &[0.2, 0.9, 0.2],
            &strings(&["sea"]),
        );
        let got: Vec<(&str, f32, bool)> = scores
            .iter()
            .map(|s| (s.tag.as_str(), s.probability, s.carried))
            .collect();
        assert_eq!(
            got,
            [
                ("night", 0.9, false),
                ("boat", 0.2, false),
                ("sea", 0.2, true)
            ]
        );
    }

    // worked by hand: the mean of [1, 0, 2] and [3, 4, 0] is [2, 2, 1]; of nothing, zeros.
    #[test]
    fn the_code_of_tags_is_the_mean_of_their_centroids() {
        let (a, b) = ([1.0f32, 0.0, 2.0], [3.0f32, 4.0, 0.0]);
        assert_eq!(mean_code(&[&a, &b], 3), vec![2.0, 2.0, 1.0]);
        assert_eq!(mean_code(&[&a], 3), a.to_vec());
        assert_eq!(mean_code(&[], 2), vec![0.0, 0.0]);
    }

    // worked by hand: [0.5, 0.25, 1] − [0.25, 0, 0.5] + [0, 0.5, 0.25] = [0.25, 0.75, 0.75];
    // with nothing to move away from or toward (zeros), the start is unchanged.
    #[test]
    fn a_shift_subtracts_away_and_adds_toward() {
        let start = [0.5f32, 0.25, 1.0];
        assert_eq!(
            shifted_code(&start, &[0.25, 0.0, 0.5], &[0.0, 0.5, 0.25]),
            vec![0.25, 0.75, 0.75]
        );
        assert_eq!(shifted_code(&start, &[0.0; 3], &[0.0; 3]), start.to_vec());
    }

    // Hits come in the index's order (best first) and keep it.
    #[test]
    fn hits_become_answers_in_their_order() {
        let items = [
            item("a.jpg", &[]),
            item("b.jpg", &["night", "harbour"]),
            item("c.jpg", &["night"]),
        ];
        let wanted = strings(&["night", "harbour"]);
        let found = answers(
            [(&items[2], 0.9), (&items[1], 0.7), (&items[0], 0.5)],
            &wanted,
        );
        let got: Vec<(&str, f32, bool, bool)> = found
            .iter()
            .map(|f| (f.picture.as_str(), f.similarity, f.carries, f.tagged))
            .collect();
        assert_eq!(
            got,
            [
                ("c.jpg", 0.9, false, true),
                ("b.jpg", 0.7, true, true),
                ("a.jpg", 0.5, false, false),
            ]
        );
        // nothing wanted (a plain shift): nothing "carries"
        let plain = answers([(&items[1], 0.7)], &[]);
        assert!(!plain[0].carries);
    }

    #[test]
    fn only_indexed_pictures_other_than_the_start_are_listed() {
        // item 0 is untagged, item 1 tagged
        let is_tagged = |i: usize| i == 1;
        assert!(listable(Some(0), None, false, is_tagged));
        assert!(
            !listable(None, None, false, is_tagged),
            "no item for the code"
        );
        assert!(
            !listable(Some(1), Some(1), false, is_tagged),
            "the start itself"
        );
        assert!(listable(Some(1), Some(0), false, is_tagged));
        assert!(listable(Some(0), None, true, is_tagged), "untagged");
        assert!(
            !listable(Some(1), None, true, is_tagged),
            "tagged, untagged asked for"
        );
    }

    // Worked by hand: asked night (column 0) and harbour (column 2); the picture carries
    // harbour, so it counts 1; night at 0.6 → 0.6. Carrying neither: 0.6 · 0.5 = 0.3.
    #[test]
    fn fits_all_multiplies_and_trusts_carried_tags() {
        let wanted = strings(&["night", "harbour"]);
        let p = [0.6f32, 0.9, 0.5];
        assert!((fits_all(&[0, 2], &wanted, &strings(&["harbour"]), &p) - 0.6).abs() < 1e-6);
        assert!((fits_all(&[0, 2], &wanted, &[], &p) - 0.3).abs() < 1e-6);
        // a score outside [0, 1] (no calibration) never makes a product above 1
        assert_eq!(fits_all(&[0], &wanted[..1], &[], &[1.7]), 1.0);
    }

    #[test]
    fn advice_to_move_a_file_out_is_for_files_inside_the_collection() {
        let path = Path::new("notes.pdf");
        let unknown = VisionError::UnknownFormat {
            path: path.to_path_buf(),
        };
        let inside = picture_problem(path, &unknown, true);
        let outside = picture_problem(path, &unknown, false);
        assert!(inside.contains("move it out of the collection"), "{inside}");
        assert!(!outside.contains("collection"), "{outside}");
        assert!(
            outside.starts_with("notes.pdf: not a picture format"),
            "{outside}"
        );
        let missing = VisionError::Io {
            path: path.to_path_buf(),
            source: std::io::Error::new(std::io::ErrorKind::NotFound, "no such file"),
        };
        assert_eq!(
            picture_problem(path, &missing, false),
            "cannot read notes.pdf: no such file"
        );
    }

    #[test]
    fn find_ranks_by_probability_then_similarity() {
        let found = |picture: &str, similarity, probability| Found {
            picture: picture.into(),
            similarity,
            probability: Some(probability),
            carries: false,
            tagged: false,
        };
        let mut list = vec![
            found("a", 0.9, 0.2),
            found("b", 0.5, 0.8),
            found("c", 0.7, 0.8),
        ];
        rank_by_probability(&mut list);
        let order: Vec<&str> = list.iter().map(|f| f.picture.as_str()).collect();
        assert_eq!(order, ["c", "b", "a"]);
    }
}
