//! The whole job on the demo archive, run as a user would: scan, train, then find,
//! suggest, shift, audit and apply — each measured against the archive's TRUTH.csv,
//! which records what every generated scene really shows and which tags were removed
//! or falsified on purpose before the sidecars were written.
//!
//! The archive is scanned and trained once per run of this file ([`prepared`]); each test
//! then asks its own questions, so one failing check does not hide the others. Tests that
//! change the folder (apply, a picture added later) work on a copy of it.

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::process::Output;
use std::sync::OnceLock;

use common::*;
use serde_json::Value;

fn succeeded(out: &Output) -> Value {
    assert!(
        out.status.success(),
        "exit {:?}\nstdout:\n{}\nstderr:\n{}",
        out.status.code(),
        stdout_of(out),
        stderr_of(out)
    );
    json(out)
}

fn truth_by_file() -> BTreeMap<String, TruthRow> {
    demo_truth()
        .into_iter()
        .map(|r| (r.file.clone(), r))
        .collect()
}

fn carries_all(row: &TruthRow, tags: &[&str]) -> bool {
    tags.iter().all(|t| row.true_tags.iter().any(|x| x == t))
}

/// Share of the listed pictures whose true scene shows all `tags`.
fn precision(found: &Value, truth: &BTreeMap<String, TruthRow>, tags: &[&str]) -> f64 {
    let list = found.as_array().unwrap();
    let hits = list
        .iter()
        .filter(|f| carries_all(&truth[f["picture"].as_str().unwrap()], tags))
        .count();
    hits as f64 / list.len().max(1) as f64
}

/// The demo archive after `tagweave scan` and `tagweave train`, with what the binary said
/// when asked before the scan and before the training.
struct Prepared {
    folder: PathBuf,
    before_scan: Output,
    before_train: Output,
    /// `tagweave train --json`.
    train: Value,
}

fn scratch_root() -> PathBuf {
    PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("queries-end-to-end")
}

/// Scans and trains the demo archive with the real binary, once per test binary; a
/// failure is kept and reported by every test rather than retried by each.
fn prepared() -> &'static Prepared {
    static PREPARED: OnceLock<Result<Prepared, String>> = OnceLock::new();
    match PREPARED.get_or_init(prepare) {
        Ok(prepared) => prepared,
        Err(problem) => panic!("the trained demo archive could not be prepared: {problem}"),
    }
}

fn prepare() -> Result<Prepared, String> {
    let folder = scratch_root().join("archive");
    if folder.exists() {
        std::fs::remove_dir_all(&folder).map_err(|e| e.to_string())?;
    }
    copy_demo_to(&folder);
    let run = |args: &[&str]| -> Result<Output, String> {
        let out = tagweave(&folder, args);
        if out.status.success() {
            Ok(out)
        } else {
            Err(format!(
                "tagweave {args:?}: exit {:?}\nstdout:\n{}\nstderr:\n{}",
                out.status.code(),
                stdout_of(&out),
                stderr_of(&out)
            ))
        }
    };
    let before_scan = tagweave(&folder, &["find", "night"]);
    let scan = run(&["scan", ".", "--json"])?;
    serde_json::from_slice::<Value>(&scan.stdout).map_err(|e| format!("scan --json: {e}"))?;
    let before_train = tagweave(&folder, &["find", "night"]);
    let train = run(&["train", "--json"])?;
    let train = serde_json::from_slice(&train.stdout).map_err(|e| format!("train --json: {e}"))?;
    Ok(Prepared {
        folder,
        before_scan,
        before_train,
        train,
    })
}

/// A copy of the trained archive, store included, for a test that changes it.
fn prepared_copy() -> tempfile::TempDir {
    let prepared = prepared();
    let temp = tempfile::tempdir_in(scratch_root()).unwrap();
    copy_everything(&prepared.folder, temp.path());
    temp
}

fn tagged_count(truth: &BTreeMap<String, TruthRow>) -> usize {
    truth
        .values()
        .filter(|r| !r.written_tags.is_empty())
        .count()
}

/// The pictures of which tags were removed on purpose before the sidecars were written.
fn with_removed_tags(truth: &BTreeMap<String, TruthRow>) -> Vec<&TruthRow> {
    truth
        .values()
        .filter(|r| !r.removed_tags.is_empty())
        .collect()
}

#[test]
fn before_the_scan_and_before_training_queries_say_what_to_run() {
    let _serial = one_at_a_time();
    let prepared = prepared();
    let out = &prepared.before_scan;
    assert_eq!(out.status.code(), Some(1));
    assert!(
        stderr_of(out).contains("tagweave scan"),
        "{}",
        stderr_of(out)
    );
    let out = &prepared.before_train;
    assert!(
        stderr_of(out).contains("run `tagweave train` first"),
        "{}",
        stderr_of(out)
    );
}

#[test]
fn train_learns_from_every_tagged_picture_and_codes_all() {
    let _serial = one_at_a_time();
    let report = &prepared().train;
    let truth = truth_by_file();
    let tagged = tagged_count(&truth);
    assert_eq!(report["pictures"], tagged, "{report}");
    assert_eq!(report["untagged"], truth.len() - tagged, "{report}");
    assert_eq!(report["coded"], truth.len(), "every picture gets a code");
    assert!(report["hash_bits"].as_u64().unwrap() >= 16, "{report}");
    assert_eq!(report["calibrated"], true, "{report}");
    let curves = std::fs::read_to_string(report["curves"].as_str().unwrap()).unwrap();
    assert!(curves.starts_with("<svg") && curves.contains("<polyline"));
}

// find: pairs of tags, precision of the first ten against the true scenes.
// Measured 2026-12-03 (seed 7): mean 0.90 over these six pairs (0.75 when find ranked by
// code similarity alone, 7fdf279); a random
// ranking would score each pair's share of the archive, 0.01–0.12.
#[test]
fn find_ranks_pictures_showing_both_tags_first() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let pairs: [[&str; 2]; 6] = [
        ["night", "harbour"],
        ["day", "beach"],
        ["snow", "lighthouse"],
        ["fog", "boats"],
        ["dusk", "market"],
        ["rain", "cliffs"],
    ];
    let mut total = 0.0;
    for pair in pairs {
        let found = succeeded(&tagweave(
            folder,
            &["find", pair[0], pair[1], "--json", "--exact"],
        ));
        assert_eq!(found.as_array().unwrap().len(), 10);
        let prefiltered = succeeded(&tagweave(folder, &["find", pair[0], pair[1], "--json"]));
        assert_eq!(
            prefiltered, found,
            "the hash pre-filter keeps the exact top ten on 400 pictures"
        );
        total += precision(&found, &truth, &pair);
    }
    let mean_precision = total / pairs.len() as f64;
    eprintln!(
        "find: mean precision@10 over {} pairs {mean_precision:.3}",
        pairs.len()
    );
    assert!(mean_precision >= 0.6, "find precision@10 {mean_precision}");
}

// find says so when no picture is likely to fit. The nine tag pairs no demo picture has, by
// TRUTH.csv and by its sidecars (a sidecar carrying both would be listed first, as a person's
// record). Measured 2026-12-03: eight of nine answered "no picture is likely to fit"; spring
// and summer were not (84 % for an untagged picture: the model does not know seasons exclude
// each other).
#[test]
fn find_says_when_no_picture_is_likely_to_fit() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let impossible = [
        ["autumn", "spring"],
        ["autumn", "summer"],
        ["clear", "fog"],
        ["dusk", "night"],
        ["fog", "rain"],
        ["fog", "snow"],
        ["rain", "snow"],
        ["spring", "summer"],
        ["spring", "winter"],
    ];
    let mut answered_none = Vec::new();
    for [a, b] in impossible {
        let both = |tags: &[String]| tags.iter().any(|t| t == a) && tags.iter().any(|t| t == b);
        assert!(
            !truth
                .values()
                .any(|r| both(&r.true_tags) || both(&r.written_tags)),
            "no picture is {a} and {b}"
        );
        let out = stdout_of(&tagweave(folder, &["find", a, b]));
        if out.contains("no picture is likely to fit") {
            answered_none.push(format!("{a}+{b}"));
        }
    }
    eprintln!("find: no likely fit for {answered_none:?}");
    assert!(answered_none.len() >= 8, "{answered_none:?}");
    let found = succeeded(&tagweave(folder, &["find", "night", "harbour", "--json"]));
    let best = found[0]["probability"].as_f64().unwrap();
    assert!(best >= 0.5, "night harbour: best {best}");
    let some = stdout_of(&tagweave(folder, &["find", "night", "harbour"]));
    assert!(!some.contains("no picture is likely"), "{some}");
}

#[test]
fn find_lists_untagged_pictures_only_when_asked_and_refuses_unknown_tags() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let untagged = succeeded(&tagweave(
        folder,
        &["find", "night", "--untagged-only", "--json", "--limit", "5"],
    ));
    for f in untagged.as_array().unwrap() {
        assert!(truth[f["picture"].as_str().unwrap()]
            .written_tags
            .is_empty());
        assert_eq!(f["carries"], false);
    }
    let out = tagweave(folder, &["find", "volcano"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(stderr_of(&out).contains("volcano"), "{}", stderr_of(&out));
}

// shift: day harbour pictures moved from day toward night.
// Measured 2026-12-03: mean precision@10 of "night and harbour" 0.45 over the first eight
// starts (the nearest ten, reordered by their chance of being night and not day); night-and-harbour pictures are 25 of 400 (0.06).
#[test]
fn shift_moves_day_harbours_toward_night_harbours() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let starts: Vec<&String> = truth
        .values()
        .filter(|r| carries_all(r, &["day", "harbour"]))
        .map(|r| &r.file)
        .take(8)
        .collect();
    let mut shifted = 0.0;
    for start in &starts {
        let found = succeeded(&tagweave(
            folder,
            &[
                "shift", start, "--away", "day", "--toward", "night", "--json", "--exact",
            ],
        ));
        let answers = found.as_array().unwrap();
        assert!(answers.iter().all(|f| f["picture"] != start.as_str()));
        // Ordered by the chance of being night and not day; a picture whose sidecar says
        // "day" has none.
        let chances: Vec<f64> = answers
            .iter()
            .map(|f| f["probability"].as_f64().unwrap())
            .collect();
        assert!(chances.windows(2).all(|w| w[0] >= w[1]), "{chances:?}");
        for f in answers {
            let record = &truth[f["picture"].as_str().unwrap()];
            if record.written_tags.iter().any(|t| t == "day") {
                assert_eq!(f["probability"].as_f64(), Some(0.0), "{f}");
            }
        }
        shifted += precision(&found, &truth, &["night", "harbour"]);
    }
    let shifted = shifted / starts.len() as f64;
    eprintln!("shift day→night from day harbour pictures: precision@10 {shifted:.3}");
    assert!(shifted >= 0.2, "shift precision@10 {shifted}");
}

// suggest: tags removed from sidecars on purpose come back in the top five.
// Measured 2026-12-03: 31 of 35 (0.89), the picture's other tags as evidence; 32 of 35 from
// the picture alone at 7fdf279.
#[test]
fn suggest_brings_back_tags_removed_on_purpose() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let with_removed = with_removed_tags(&truth);
    let mut args = vec!["suggest", "--json"];
    args.extend(with_removed.iter().map(|r| r.file.as_str()));
    let answer = succeeded(&tagweave(folder, &args));
    let (mut back, mut removed) = (0, 0);
    for (row, a) in with_removed
        .iter()
        .zip(answer["pictures"].as_array().unwrap())
    {
        let got: BTreeSet<&str> = a["suggestions"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| s["tag"].as_str().unwrap())
            .collect();
        assert!(
            row.written_tags.iter().all(|t| !got.contains(t.as_str())),
            "carried tags are not suggested again"
        );
        // the tags taken as evidence are the picture's own (all or none of them: the
        // trained blend either weighs carried tags or, where they told it nothing, not)
        let carried: BTreeSet<&str> = strings_of(&a["carried"]);
        let evidence: BTreeSet<&str> = strings_of(&a["evidence"]);
        assert!(evidence.is_empty() || evidence == carried, "{a}");
        removed += row.removed_tags.len();
        back += row
            .removed_tags
            .iter()
            .filter(|t| got.contains(t.as_str()))
            .count();
    }
    let recall = back as f64 / removed as f64;
    eprintln!("suggest: {back} of {removed} removed tags in the top five ({recall:.3})");
    assert!(recall >= 0.8, "recall@5 of removed tags {recall}");
}

#[test]
fn suggest_describes_a_picture_from_outside_the_collection_on_the_fly() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let temp = tempfile::tempdir().unwrap();
    let outside = temp.path().join("outside.jpg");
    std::fs::copy(folder.join(&with_removed_tags(&truth)[0].file), &outside).unwrap();
    let answer = succeeded(&tagweave(
        folder,
        &["suggest", outside.to_str().unwrap(), "--json"],
    ));
    assert_eq!(answer["pictures"][0]["indexed"], false);
    assert_eq!(
        answer["pictures"][0]["suggestions"]
            .as_array()
            .unwrap()
            .len(),
        5
    );
}

// audit: pictures given a false tag on purpose rank high.
// Measured 2026-12-03: ROC AUC 0.878 over the 359 tagged pictures (15 falsified), 8 of them
// in the first 10 (judged by similar pictures alone: 0.833 and 1).
#[test]
fn audit_ranks_pictures_with_a_false_tag_high() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let audit = succeeded(&tagweave(
        folder,
        &[
            "audit",
            "--json",
            "--limit",
            "100000",
            "--sheet",
            "review.csv",
        ],
    ));
    let queue: Vec<&str> = audit["queue"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| d["picture"].as_str().unwrap())
        .collect();
    assert_eq!(queue.len(), tagged_count(&truth));
    let falsified: Vec<bool> = queue
        .iter()
        .map(|p| !truth[*p].false_tags.is_empty())
        .collect();
    let auc = rank_auc(&falsified);
    let first_ten = falsified.iter().take(10).filter(|&&f| f).count();
    eprintln!("audit: ROC AUC of the falsified pictures {auc:.3}, {first_ten} in the first 10");
    assert!(auc >= 0.85, "audit AUC {auc}");
    assert!(
        first_ten >= 5,
        "{first_ten} falsified pictures in the first 10"
    );
    // The queue says how it weighed its evidence, chosen without the truth file.
    let mix = &audit["mix"];
    let weights = mix["neighbours"].as_f64().unwrap() + mix["other_tags"].as_f64().unwrap();
    assert!((weights - 1.0).abs() < 1e-6, "{mix}");
    assert!(mix["added_tag_auc"].as_f64().unwrap() > 0.5, "{mix}");
}

// A person's decisions are data: running `audit` again (after typing into its sheet) keeps
// them, and the sheet still applies.
#[test]
fn a_second_audit_keeps_the_decisions_typed_into_its_sheet() {
    let _serial = one_at_a_time();
    let copy = prepared_copy();
    let folder = copy.path();
    let first = succeeded(&tagweave(
        folder,
        &["audit", "--json", "--sheet", "review.csv"],
    ));
    assert_eq!(first["sheet"]["kept_decisions"], 0);
    let sheet = folder.join("review.csv");
    let mut rows = tagweave_writeback::read_sheet(&sheet).unwrap();
    let disputed = rows
        .iter()
        .position(|r| r.kind == tagweave_writeback::RowKind::Disputed)
        .expect("the demo's queue has a disputed tag");
    rows[disputed].decision = tagweave_writeback::Decision::Remove;
    let typed = rows[disputed].clone();
    tagweave_writeback::write_sheet(&sheet, &rows).unwrap();

    let second = succeeded(&tagweave(
        folder,
        &["audit", "--json", "--sheet", "review.csv"],
    ));
    assert_eq!(second["sheet"]["kept_decisions"], 1);
    let after = tagweave_writeback::read_sheet(&sheet).unwrap();
    assert!(after.contains(&typed), "the typed `remove` survived");
    assert_eq!(after.len(), rows.len());
    let text = stdout_of(&tagweave(folder, &["audit", "--sheet", "review.csv"]));
    assert!(
        text.contains("Decisions already typed into it were kept: 1."),
        "{text}"
    );
}

// apply: a person accepts right suggestions for untagged pictures and removes one false
// tag; the sidecars change accordingly, nothing else does.
#[test]
fn apply_writes_accepted_tags_and_removes_a_false_one_and_nothing_else() {
    let _serial = one_at_a_time();
    let copy = prepared_copy();
    let folder = copy.path();
    let truth = truth_by_file();
    let tagged = tagged_count(&truth);
    let sheet_path = folder.join("suggestions.csv");
    succeeded(&tagweave(
        folder,
        &[
            "suggest",
            "--untagged",
            "--json",
            "--sheet",
            "suggestions.csv",
        ],
    ));
    let sheet = std::fs::read_to_string(&sheet_path).unwrap();
    let mut filled = String::new();
    let mut accepted: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for (i, line) in sheet.lines().enumerate() {
        let cells: Vec<&str> = line.trim_start_matches('\u{feff}').split(',').collect();
        if i == 0 {
            filled.push_str(line.trim_start_matches('\u{feff}'));
        } else {
            let right = truth[cells[0]].true_tags.iter().any(|t| t == cells[1]);
            filled.push_str(&line[..line.len() - 1]);
            filled.push_str(if right { ",y" } else { ",n" });
            if right {
                accepted
                    .entry(cells[0].to_string())
                    .or_default()
                    .insert(cells[1].to_string());
            }
        }
        filled.push('\n');
    }
    let (false_picture, false_tag) = truth
        .values()
        .find(|r| r.sidecar == "txt" && !r.false_tags.is_empty())
        .map(|r| (r.file.clone(), r.false_tags[0].clone()))
        .unwrap();
    filled.push_str(&format!(
        "{false_picture},{false_tag},0.1,disputed,remove\n"
    ));
    std::fs::write(&sheet_path, &filled).unwrap();
    let before = sidecar_snapshot(folder);
    let dry = succeeded(&tagweave(
        folder,
        &["apply", "suggestions.csv", "--dry-run", "--json"],
    ));
    assert_eq!(sidecar_snapshot(folder), before, "a dry run writes nothing");
    let done = succeeded(&tagweave(folder, &["apply", "suggestions.csv", "--json"]));
    assert_eq!(done["pictures_changed"], dry["pictures_changed"]);
    assert_eq!(done["tags_removed"], 1, "{done}");
    let written: usize = accepted.values().map(BTreeSet::len).sum();
    assert_eq!(done["tags_added"], written, "{done}");
    let false_sidecar = folder.join(Path::new(&false_picture).with_extension("txt"));
    assert!(
        false_sidecar.with_extension("txt.orig").is_file(),
        "the original sidecar is kept"
    );
    let rescan = succeeded(&tagweave(folder, &["scan", ".", "--json"]));
    assert_eq!(rescan["untagged"], truth.len() - tagged - accepted.len());
    // every tag a person wrote is still there, plus the accepted ones, minus the removed one
    let tags_now = tags_by_picture(folder);
    for row in truth.values() {
        let mut want: BTreeSet<String> = row.written_tags.iter().cloned().collect();
        want.extend(accepted.get(&row.file).cloned().unwrap_or_default());
        if row.file == false_picture {
            want.remove(&false_tag);
        }
        assert_eq!(tags_now[&row.file], want, "{}", row.file);
    }
    // applying the same sheet again changes nothing
    let again = succeeded(&tagweave(folder, &["apply", "suggestions.csv", "--json"]));
    assert_eq!(again["pictures_changed"], 0, "{again}");
}

#[test]
fn a_picture_added_after_training_gets_its_code_at_the_next_scan() {
    let _serial = one_at_a_time();
    let copy = prepared_copy();
    let folder = copy.path();
    let truth = truth_by_file();
    std::fs::copy(
        folder.join(&with_removed_tags(&truth)[0].file),
        folder.join("1950s/added-later.jpg"),
    )
    .unwrap();
    let rescan = succeeded(&tagweave(folder, &["scan", ".", "--json"]));
    assert_eq!(rescan["coded"], 1, "{rescan}");
    let found = succeeded(&tagweave(
        folder,
        &[
            "shift",
            "1950s/added-later.jpg",
            "--toward",
            "night",
            "--json",
        ],
    ));
    assert_eq!(found.as_array().unwrap().len(), 10);
}

/// ROC AUC of a ranking (best first) against a 0/1 truth, by counting ordered pairs.
// source: definition of ROC AUC as the probability that a random positive ranks above
// a random negative (Hanley & McNeil 1982).
fn rank_auc(positive_in_rank_order: &[bool]) -> f64 {
    let mut negatives_below = 0usize;
    let mut pairs = 0usize;
    let negatives = positive_in_rank_order.iter().filter(|p| !**p).count();
    let mut negatives_seen = 0;
    for &p in positive_in_rank_order {
        if p {
            negatives_below += negatives - negatives_seen;
            pairs += negatives;
        } else {
            negatives_seen += 1;
        }
    }
    negatives_below as f64 / pairs.max(1) as f64
}

fn tags_by_picture(folder: &Path) -> BTreeMap<String, BTreeSet<String>> {
    let store = tagweave_store::Store::open(&folder.join(".tagweave")).unwrap();
    store
        .items()
        .unwrap()
        .into_iter()
        .map(|item| (item.rel_path, item.tags.into_iter().collect()))
        .collect()
}

fn strings_of(list: &Value) -> BTreeSet<&str> {
    list.as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect()
}
