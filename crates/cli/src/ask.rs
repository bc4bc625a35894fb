//! `find`, `suggest`, `shift` and `audit`: questions to a trained collection.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use serde::Serialize;
use tagweave_query::{Dispute, EvidenceMix, Familiarity, Found, Queries, Ranking, TagScore};
use tagweave_store::Store;
use tagweave_writeback::{write_sheet_keeping_decisions, Decision, RowKind, SheetRow};

use crate::exit::Outcome;
use crate::{store_path, StoreArgs};

/// Default review-sheet names, written in the current folder unless `--sheet` says otherwise.
pub const SUGGESTIONS_SHEET: &str = "tagweave-suggestions.csv";
pub const AUDIT_SHEET: &str = "tagweave-review.csv";

#[derive(clap::Args)]
pub struct FindArgs {
    /// Tags the pictures should show (all of them).
    #[arg(required = true)]
    pub tags: Vec<String>,
    #[command(flatten)]
    pub common: RankArgs,
}

#[derive(clap::Args)]
pub struct ShiftArgs {
    /// The picture to start from.
    pub picture: PathBuf,
    /// Tags to move away from.
    #[arg(long, num_args = 1.., value_name = "TAG")]
    pub away: Vec<String>,
    /// Tags to move toward.
    #[arg(long, num_args = 1.., value_name = "TAG")]
    pub toward: Vec<String>,
    #[command(flatten)]
    pub common: RankArgs,
}

#[derive(clap::Args)]
pub struct RankArgs {
    #[command(flatten)]
    pub store: StoreArgs,
    /// Only pictures nobody has tagged yet.
    #[arg(long)]
    pub untagged_only: bool,
    /// How many pictures to list.
    #[arg(long, default_value_t = 10)]
    pub limit: usize,
    /// Compare with every picture's code instead of pre-filtering by hash (slower; for checking).
    #[arg(long)]
    pub exact: bool,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

#[derive(clap::Args)]
pub struct SuggestArgs {
    /// Picture files (in the collection or not).
    #[arg(required_unless_present_any = ["untagged", "partly_tagged"])]
    pub pictures: Vec<PathBuf>,
    /// Suggest for every untagged picture of the collection and write a review sheet.
    #[arg(long)]
    pub untagged: bool,
    /// Suggest more tags for every picture that carries some already, using its tags
    /// as evidence, and write a review sheet (may be given with --untagged).
    #[arg(long)]
    pub partly_tagged: bool,
    /// Where the review sheet goes (with --untagged or --partly-tagged).
    #[arg(long, value_name = "CSV", default_value = SUGGESTIONS_SHEET)]
    pub sheet: PathBuf,
    /// Tags listed per picture.
    #[arg(long, default_value_t = 5)]
    pub limit: usize,
    #[command(flatten)]
    pub store: StoreArgs,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

#[derive(clap::Args)]
pub struct AuditArgs {
    #[command(flatten)]
    pub store: StoreArgs,
    /// Pictures shown (the review sheet holds every picture with a disputed tag).
    #[arg(long, default_value_t = 20)]
    pub limit: usize,
    /// Also list the tagged pictures with no doubtful tag, after the flagged ones (the
    /// whole ranking, e.g. to measure it).
    #[arg(long)]
    pub all: bool,
    /// Where the review sheet goes.
    #[arg(long, value_name = "CSV", default_value = AUDIT_SHEET)]
    pub sheet: PathBuf,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

fn open(store: &StoreArgs) -> anyhow::Result<(Store, Queries)> {
    let store = store_path::open_existing(store.store.as_deref())?;
    let queries = Queries::open(&store)?;
    Ok((store, queries))
}

impl RankArgs {
    fn ranking(&self) -> Ranking {
        Ranking {
            limit: self.limit,
            untagged_only: self.untagged_only,
            exact: self.exact,
        }
    }
}

/// Below this chance of fitting every asked tag, `find` says no picture is likely to.
const LIKELY: f32 = 0.5;

/// A model's number for a person: a percentage when it is a calibrated probability, else
/// the bare score (`0.98`), which ranks like a probability but is not one.
pub fn strength(value: f32, calibrated: bool) -> String {
    if calibrated {
        format!("{:.0} %", value * 100.0)
    } else {
        format!("{value:.2}")
    }
}

/// The answer of `find` or `shift`: `asked` goes into the JSON object beside the pictures.
fn print_found(
    found: &[Found],
    json: Option<serde_json::Value>,
    what: &str,
    calibrated: bool,
) -> anyhow::Result<()> {
    if let Some(mut asked) = json {
        asked["calibrated"] = calibrated.into();
        asked["pictures"] = serde_json::to_value(found)?;
        println!("{asked}");
        return Ok(());
    }
    if found.is_empty() {
        println!("no pictures");
        return Ok(());
    }
    let chance = found.iter().any(|f| f.probability.is_some());
    if chance && found.iter().all(|f| f.probability.unwrap_or(0.0) < LIKELY) {
        if calibrated {
            println!(
                "no picture is likely to fit all of these tags (none above {:.0} %); the closest:",
                LIKELY * 100.0
            );
        } else {
            println!("no picture scores above {LIKELY:.2} for all of these tags; the closest:");
        }
    }
    println!(
        "{:>4}  {:>10}  {:>7}  {:<9}  picture",
        "rank",
        "similarity",
        match (chance, calibrated) {
            (false, _) => "",
            (true, true) => "fits",
            (true, false) => "score",
        },
        what
    );
    for (i, f) in found.iter().enumerate() {
        let how = if f.carries {
            "carries"
        } else if f.tagged {
            "inferred"
        } else {
            "inferred*"
        };
        let fits = f
            .probability
            .map_or_else(String::new, |p| strength(p, calibrated));
        println!(
            "{:>4}  {:>10.3}  {:>7}  {:<9}  {}",
            i + 1,
            f.similarity,
            fits,
            how,
            f.picture
        );
    }
    if found.iter().any(|f| !f.carries && !f.tagged) {
        println!("  * untagged picture: the tags are the model's guess, not anybody's record");
    }
    if chance && !calibrated {
        print_scores_note();
    }
    Ok(())
}

/// Said under numbers that are scores, not probabilities.
fn print_scores_note() {
    println!(
        "  scores, not probabilities: too few tagged pictures were held out in training to \
         calibrate them; higher is likelier, but 0.9 does not mean 9 in 10"
    );
}

pub fn find(args: &FindArgs) -> anyhow::Result<Outcome> {
    let (_store, queries) = open(&args.common.store)?;
    let asked = queries.tags_asked(&args.tags)?;
    let found = queries.find(&asked, args.common.ranking())?;
    let json = args
        .common
        .json
        .then(|| serde_json::json!({ "tags": asked }));
    print_found(&found, json, "tags", queries.all_calibrated())?;
    Ok(Outcome::Done)
}

pub fn shift(args: &ShiftArgs) -> anyhow::Result<Outcome> {
    if args.away.is_empty() && args.toward.is_empty() {
        bail!("say what to change: --away TAG… and/or --toward TAG…");
    }
    let (_store, queries) = open(&args.common.store)?;
    let row = queries.row_of_path(&args.picture)?.ok_or_else(|| {
        tagweave_query::QueryError::NotIndexed {
            path: args.picture.clone(),
        }
    })?;
    let asked = |tags: &[String]| -> anyhow::Result<Vec<String>> {
        Ok(if tags.is_empty() {
            Vec::new()
        } else {
            queries.tags_asked(tags)?
        })
    };
    let (away, toward) = (asked(&args.away)?, asked(&args.toward)?);
    let found = queries.shift(row, &away, &toward, args.common.ranking())?;
    let start = queries.items().get(row)?.rel_path.clone();
    let json = args.common.json.then(|| {
        serde_json::json!({
            "start": start,
            "away": away,
            "toward": toward,
        })
    });
    print_found(&found, json, "toward", queries.all_calibrated())?;
    Ok(Outcome::Done)
}

#[derive(Serialize)]
struct PictureSuggestions {
    picture: String,
    indexed: bool,
    carried: Vec<String>,
    /// Carried tags the model took as evidence (those it knows).
    evidence: Vec<String>,
    /// Whether `probability` of the suggestions is calibrated on held-out pictures; when
    /// not, it is a score in [0, 1] that ranks like a probability but is not one.
    calibrated: bool,
    /// How near the picture lies to the pictures the model learned from.
    #[serde(flatten)]
    familiarity: Familiarity,
    suggestions: Vec<TagScore>,
}

/// A picture given on the command line that could not be judged.
#[derive(Serialize)]
struct Unjudged {
    picture: String,
    error: String,
}

pub fn suggest(args: &SuggestArgs) -> anyhow::Result<Outcome> {
    let (store, queries) = open(&args.store)?;
    let mut answers = Vec::new();
    let mut listed = Vec::new();
    // Listing asks for every item; one picture asks for its own record only.
    let every_item = if args.untagged || args.partly_tagged {
        queries.items().all()?
    } else {
        &[]
    };
    for (i, item) in every_item.iter().enumerate() {
        let tagged = !item.tags.is_empty();
        if ((args.untagged && !tagged) || (args.partly_tagged && tagged))
            && queries.is_described(i)?
        {
            listed.push(i);
        }
    }
    let probabilities = queries.suggest_rows(&listed)?;
    let familiarity = queries.familiarity_of_rows(&listed)?;
    for (r, &i) in listed.iter().enumerate() {
        answers.push(answer(
            &queries,
            every_item[i].rel_path.clone(),
            Some(i),
            (&probabilities.row(r).to_vec(), familiarity[r]),
            args.limit,
        )?);
    }
    // One picture that cannot be read does not cost the others their answers.
    let mut failed = Vec::new();
    for path in &args.pictures {
        let picture = path.display().to_string();
        match judge(&queries, path) {
            Ok((row, probabilities, familiarity)) => answers.push(answer(
                &queries,
                picture,
                row,
                (&probabilities, familiarity),
                args.limit,
            )?),
            Err(error) => failed.push(Unjudged {
                picture,
                error: crate::output::describe(&error),
            }),
        }
    }
    let sheet = if args.untagged || args.partly_tagged {
        let rows: Vec<SheetRow> = answers
            .iter()
            .take(listed.len())
            .flat_map(|a| {
                a.suggestions.iter().map(|s| SheetRow {
                    picture: a.picture.clone(),
                    tag: s.tag.clone(),
                    probability: Some(s.probability),
                    kind: RowKind::Suggested,
                    decision: Decision::Undecided,
                })
            })
            .collect();
        let sheet = write_sheet_out(&args.sheet, &rows)?;
        Some(sheet)
    } else {
        None
    };
    if args.json {
        let mut value = serde_json::json!({ "pictures": answers });
        if let Some(sheet) = &sheet {
            value["sheet"] = serde_json::to_value(sheet)?;
        }
        if !failed.is_empty() {
            value["failed"] = serde_json::to_value(&failed)?;
        }
        println!("{value}");
    } else {
        for a in &answers {
            print_answer(a);
        }
        if answers.iter().any(|a| !a.calibrated) {
            print_scores_note();
        }
        if let Some(written) = &sheet {
            print_sheet_note(&store, written);
        }
    }
    for f in &failed {
        eprintln!("tagweave: {}", f.error);
    }
    Ok(if failed.is_empty() {
        Outcome::Done
    } else {
        Outcome::DoneWithSkips
    })
}

/// Tag probabilities and familiarity of a picture given on the command line: from the
/// index when it is there (its row), else described from the file.
fn judge(queries: &Queries, path: &Path) -> anyhow::Result<(Option<usize>, Vec<f32>, Familiarity)> {
    Ok(match queries.row_of_path(path)? {
        Some(row) => (
            Some(row),
            queries.suggest_rows(&[row])?.row(0).to_vec(),
            queries.familiarity_of_rows(&[row])?[0],
        ),
        None => {
            let (probabilities, familiarity) = queries.judge_file(path)?;
            (None, probabilities, familiarity)
        }
    })
}

fn print_answer(a: &PictureSuggestions) {
    println!(
        "{}{}",
        a.picture,
        if a.indexed {
            ""
        } else {
            "  (not in the index)"
        }
    );
    if a.familiarity.unlike_collection {
        println!(
            "  unlike this collection: its nearest tagged picture is further away (similarity \
             {:.3}) than for {:.0} % of the tagged pictures ({:.3} or more); the tags below are \
             guesses",
            a.familiarity.nearest_similarity,
            tagweave_query::USUAL_SHARE * 100.0,
            a.familiarity.usual_similarity.unwrap_or(0.0)
        );
    }
    if !a.carried.is_empty() {
        println!("  carries   {}", a.carried.join(", "));
        if a.evidence.is_empty() {
            println!(
                "  judged from the picture alone (the model learned nothing from these \
                 tags about the others, or does not know them)"
            );
        } else {
            println!(
                "  judged from the picture and its tags {}",
                a.evidence.join(", ")
            );
        }
    }
    for s in &a.suggestions {
        println!("  {:>5}  {}", strength(s.probability, a.calibrated), s.tag);
    }
}

/// One picture's answer: its carried tags, those taken as evidence, and the best
/// `limit` tags it does not carry yet.
fn answer(
    queries: &Queries,
    picture: String,
    row: Option<usize>,
    (probabilities, familiarity): (&[f32], Familiarity),
    limit: usize,
) -> anyhow::Result<PictureSuggestions> {
    let (carried, evidence) = match row {
        Some(r) => (queries.items().get(r)?.tags.clone(), queries.evidence(r)?),
        None => (Vec::new(), Vec::new()),
    };
    Ok(PictureSuggestions {
        picture,
        indexed: row.is_some(),
        evidence,
        calibrated: queries.calibrated(row),
        familiarity,
        suggestions: queries
            .tag_scores(probabilities, &carried)
            .into_iter()
            .filter(|s| !s.carried)
            .take(limit)
            .collect(),
        carried,
    })
}

/// How the queue weighed its evidence, in words.
fn describe_mix(mix: &EvidenceMix) -> String {
    let tested = mix.added_tag_auc.map_or_else(String::new, |auc| {
        format!(
            "; with these weights a tag added at random ranks above the real ones {:.0} % of \
             the time",
            auc * 100.0
        )
    });
    format!(
        "(doubt weighed {:.0} % on similar pictures, {:.0} % on the picture's other tags{tested})",
        mix.neighbours * 100.0,
        mix.other_tags * 100.0
    )
}

/// A review sheet as written: where, how many rows, how many of a person's decisions
/// already in it were kept.
#[derive(Serialize)]
pub(crate) struct WrittenSheet {
    pub(crate) path: PathBuf,
    pub(crate) rows: usize,
    pub(crate) kept_decisions: usize,
}

/// Writes the review sheet, keeping every decision already typed into one at that path.
pub(crate) fn write_sheet_out(path: &Path, rows: &[SheetRow]) -> anyhow::Result<WrittenSheet> {
    let written = write_sheet_keeping_decisions(path, rows)
        .with_context(|| format!("cannot write the review sheet {}", path.display()))?;
    Ok(WrittenSheet {
        path: path.to_path_buf(),
        rows: written.rows,
        kept_decisions: written.kept_decisions,
    })
}

fn print_sheet_note(store: &Store, sheet: &WrittenSheet) {
    let path = &sheet.path;
    println!();
    println!(
        "Review sheet: {} ({} rows). Fill the `accept` column with y or n (for a disputed \
         tag: remove, to take it off), then run `tagweave apply {}`.",
        path.display(),
        sheet.rows,
        path.display()
    );
    if sheet.kept_decisions > 0 {
        println!(
            "Decisions already typed into it were kept: {}.",
            sheet.kept_decisions
        );
    }
    println!(
        "Nothing is written to {} until you do.",
        store.collection_root().display()
    );
}

pub fn audit(args: &AuditArgs) -> anyhow::Result<Outcome> {
    let (store, queries) = open(&args.store)?;
    let audit = queries.audit()?;
    let disputes: &[Dispute] = &audit.queue;
    let flagged: Vec<&Dispute> = disputes.iter().filter(|d| !d.disputed.is_empty()).collect();
    let mut rows = Vec::new();
    for d in &flagged {
        for t in &d.disputed {
            rows.push(SheetRow {
                picture: d.picture.clone(),
                tag: t.tag.clone(),
                probability: Some(t.support),
                kind: RowKind::Disputed,
                decision: Decision::Undecided,
            });
        }
        for s in &d.proposed {
            rows.push(SheetRow {
                picture: d.picture.clone(),
                tag: s.tag.clone(),
                probability: Some(s.probability),
                kind: RowKind::Suggested,
                decision: Decision::Undecided,
            });
        }
    }
    let sheet = write_sheet_out(&args.sheet, &rows)?;
    let listed: Vec<&Dispute> = if args.all {
        disputes.iter().collect()
    } else {
        flagged.clone()
    };
    if args.json {
        let shown: Vec<&Dispute> = listed.iter().copied().take(args.limit).collect();
        println!(
            "{}",
            serde_json::json!({
                "judged": disputes.len(),
                "flagged": flagged.len(),
                "mix": audit.mix,
                "queue": shown,
                "sheet": sheet,
            })
        );
        return Ok(Outcome::Done);
    }
    println!(
        "{} of {} tagged pictures carry a tag that few similar pictures, or few pictures with \
         the same other tags, carry; worst first:",
        flagged.len(),
        disputes.len()
    );
    println!("{}", describe_mix(&audit.mix));
    let calibrated = queries.all_calibrated();
    for (i, d) in listed.iter().take(args.limit).enumerate() {
        let disputed: Vec<String> = d
            .disputed
            .iter()
            .map(|t| {
                format!(
                    "{} (on {:.0} % of similar pictures, {:.0} % of pictures with its other tags)",
                    t.tag,
                    t.neighbours_carrying * 100.0,
                    t.with_its_other_tags * 100.0
                )
            })
            .collect();
        let proposed: Vec<String> = d
            .proposed
            .iter()
            .map(|t| format!("{} ({})", t.tag, strength(t.probability, calibrated)))
            .collect();
        println!("{:>4}. {}", i + 1, d.picture);
        if disputed.is_empty() {
            println!("      no doubtful tag");
        } else {
            println!("      doubtful  {}", disputed.join(", "));
        }
        if !proposed.is_empty() {
            println!("      proposed  {}", proposed.join(", "));
        }
    }
    print_sheet_note(&store, &sheet);
    Ok(Outcome::Done)
}
