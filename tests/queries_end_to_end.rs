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

/// Share of the listed pictures (of a `find` or `shift` answer) whose true scene shows
/// all `tags`.
fn precision(found: &Value, truth: &BTreeMap<String, TruthRow>, tags: &[&str]) -> f64 {
    let list = found["pictures"].as_array().unwrap();
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
        assert_eq!(found["pictures"].as_array().unwrap().len(), 10);
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
    let best = found["pictures"][0]["probability"].as_f64().unwrap();
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
    for f in untagged["pictures"].as_array().unwrap() {
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
        let answers = found["pictures"].as_array().unwrap();
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
            "--all",
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
    assert_eq!(
        dry["new_tags"],
        serde_json::json!([]),
        "accepted tags are all known"
    );
    let false_sidecar = folder.join(Path::new(&false_picture).with_extension("txt"));
    let original = false_sidecar.with_extension("txt.orig");
    assert!(original.is_file(), "the original sidecar is kept");
    let blank = |text: String| text.lines().filter(|l| l.trim().is_empty()).count();
    assert_eq!(
        blank(std::fs::read_to_string(&false_sidecar).unwrap()),
        blank(std::fs::read_to_string(&original).unwrap()),
        "the removed tag leaves no empty line"
    );
    // Accepted suggestions are marked as such in the sidecars, and the scan tells them apart.
    assert_eq!(done["tags_marked_accepted"], written, "{done}");
    let rescan = succeeded(&tagweave(folder, &["scan", ".", "--json"]));
    assert_eq!(rescan["untagged"], truth.len() - tagged - accepted.len());
    assert_eq!(rescan["accepted_suggestions"], written, "{rescan}");
    assert_eq!(
        rescan["tagged_only_by_suggestions"],
        accepted.len(),
        "{rescan}"
    );
    let (picture, tags) = accepted.iter().next().unwrap();
    let sidecar = std::fs::read_to_string(folder.join(picture).with_extension("txt")).unwrap();
    for tag in tags {
        assert!(
            sidecar.contains(&format!("{tag} # accepted suggestion")),
            "{sidecar}"
        );
    }
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
    assert_eq!(found["pictures"].as_array().unwrap().len(), 10);
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

// Tags as people type them: a slip gets the known tag it meant, and "night harbour" or
// "night,harbour" are two tags (as on the review page). Under --json the answer and the
// error are each one JSON object.
#[test]
fn find_reads_tags_as_typed_and_names_the_tag_a_slip_meant() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let two = succeeded(&tagweave(folder, &["find", "night", "harbour", "--json"]));
    assert_eq!(two["tags"], serde_json::json!(["night", "harbour"]));
    for typed in ["night harbour", "night,harbour", "Night, Harbour"] {
        let same = succeeded(&tagweave(folder, &["find", typed, "--json"]));
        assert_eq!(same, two, "{typed}");
    }
    let slip = tagweave(folder, &["find", "nigth"]);
    assert_eq!(slip.status.code(), Some(1));
    assert!(
        stderr_of(&slip).contains("`nigth` (did you mean `night`?)"),
        "{}",
        stderr_of(&slip)
    );
    let slip = tagweave(folder, &["find", "nigth", "harbour", "--json"]);
    assert_eq!(slip.status.code(), Some(1));
    let error = json(&slip);
    let message = error["error"].as_str().unwrap();
    assert!(message.contains("did you mean `night`?"), "{error}");
}

// One unreadable file does not cost the others their answers; each failure is named once,
// with advice that fits where the file is.
#[test]
fn suggest_answers_every_readable_picture_and_names_the_others_once() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let good = with_removed_tags(&truth)[0].file.clone();
    let temp = tempfile::tempdir().unwrap();
    let outside = put(temp.path(), "notes.pdf", b"%PDF-1.4 not a picture\n");
    let inside = put(folder, "notes-inside.pdf", b"%PDF-1.4 not a picture\n");
    let out = tagweave(
        folder,
        &[
            "suggest",
            &good,
            "missing.jpg",
            outside.to_str().unwrap(),
            "notes-inside.pdf",
            "--json",
        ],
    );
    std::fs::remove_file(&inside).unwrap();
    assert_eq!(out.status.code(), Some(3), "{}", stderr_of(&out));
    let answer = json(&out);
    let answered: Vec<&str> = answer["pictures"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["picture"].as_str().unwrap())
        .collect();
    assert_eq!(answered, [good.as_str()]);
    let failed: BTreeMap<&str, &str> = answer["failed"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| (f["picture"].as_str().unwrap(), f["error"].as_str().unwrap()))
        .collect();
    assert_eq!(failed.len(), 3, "{failed:?}");
    let missing = failed["missing.jpg"];
    assert_eq!(missing.matches("(os error 2)").count(), 1, "{missing}");
    let outside_error = failed[outside.to_str().unwrap()];
    assert!(
        outside_error.contains("not a picture format") && !outside_error.contains("collection"),
        "{outside_error}"
    );
    assert!(
        failed["notes-inside.pdf"].contains("move it out of the collection"),
        "{failed:?}"
    );
    assert_eq!(stderr_of(&out).matches("(os error 2)").count(), 1);
}

/// A black-and-white line drawing: a trunk, branches and the outline of a crown.
fn line_drawing(path: &Path) {
    let mut picture = image::GrayImage::from_pixel(320, 240, image::Luma([255u8]));
    let mut line = |(x0, y0): (f32, f32), (x1, y1): (f32, f32)| {
        for step in 0..=400 {
            let t = step as f32 / 400.0;
            let (x, y) = (x0 + (x1 - x0) * t, y0 + (y1 - y0) * t);
            for (dx, dy) in [(0, 0), (1, 0), (0, 1)] {
                picture.put_pixel(x as u32 + dx, y as u32 + dy, image::Luma([0]));
            }
        }
    };
    line((160.0, 230.0), (160.0, 110.0));
    for i in 0..6 {
        let y = 110.0 - 14.0 * i as f32;
        line((160.0, y + 20.0), (110.0 + 6.0 * i as f32, y));
        line((160.0, y + 20.0), (210.0 - 6.0 * i as f32, y));
    }
    let crown = |step: usize| {
        let a = step as f32 / 36.0 * std::f32::consts::TAU;
        (160.0 + 60.0 * a.cos(), 80.0 + 60.0 * a.sin())
    };
    for step in 0..36 {
        line(crown(step), crown(step + 1));
    }
    picture.save(path).unwrap();
}

// A picture far from everything the model learned from is flagged, a copy of a picture it
// knows is not, nor are (but for the odd one) the collection's own untagged pictures.
// Measured 2026-12-04 at a05348f: the drawing's most similar tagged picture 0.222 against
// the tagged pictures' own 1 % point 0.265; 0 of the 41 untagged demo pictures flagged.
#[test]
fn a_picture_unlike_the_collection_is_flagged_and_its_tags_called_guesses() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let truth = truth_by_file();
    let temp = tempfile::tempdir().unwrap();
    let drawing = temp.path().join("drawing.png");
    line_drawing(&drawing);
    let known = temp.path().join("known.jpg");
    std::fs::copy(folder.join(&with_removed_tags(&truth)[0].file), &known).unwrap();
    let (drawing, known) = (drawing.to_str().unwrap(), known.to_str().unwrap());
    let answer = succeeded(&tagweave(folder, &["suggest", drawing, known, "--json"]));
    let pictures = answer["pictures"].as_array().unwrap();
    assert_eq!(pictures[0]["unlike_collection"], true, "{}", pictures[0]);
    assert_eq!(pictures[1]["unlike_collection"], false, "{}", pictures[1]);
    let usual = pictures[0]["usual_similarity"].as_f64().unwrap();
    assert!(pictures[0]["nearest_similarity"].as_f64().unwrap() < usual);
    assert!(pictures[1]["nearest_similarity"].as_f64().unwrap() > 0.99);
    let text = stdout_of(&tagweave(folder, &["suggest", drawing]));
    assert!(text.contains("unlike this collection"), "{text}");
    assert!(text.contains("guesses"), "{text}");

    let sheet = temp.path().join("s.csv");
    let untagged = succeeded(&tagweave(
        folder,
        &[
            "suggest",
            "--untagged",
            "--json",
            "--sheet",
            sheet.to_str().unwrap(),
        ],
    ));
    let listed = untagged["pictures"].as_array().unwrap();
    let flagged = listed
        .iter()
        .filter(|p| p["unlike_collection"] == true)
        .count();
    eprintln!(
        "unlike the collection: {flagged} of {} untagged pictures",
        listed.len()
    );
    assert!(
        flagged <= 2,
        "{flagged} of {} untagged pictures",
        listed.len()
    );
}

// With few tagged pictures the model cannot calibrate, and says so: its numbers are shown
// as scores (0.98), never as percentages.
#[test]
fn scores_of_a_model_that_could_not_calibrate_are_not_shown_as_percentages() {
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path();
    let demo = repo_root().join("demo-collection");
    let truth = demo_truth();
    let tagged = truth
        .iter()
        .filter(|r| r.sidecar == "txt" && !r.written_tags.is_empty());
    let untagged = truth.iter().filter(|r| r.written_tags.is_empty());
    for row in tagged.take(3).chain(untagged.take(3)) {
        let name = Path::new(&row.file).file_name().unwrap();
        std::fs::copy(demo.join(&row.file), folder.join(name)).unwrap();
        if row.sidecar == "txt" {
            let sidecar = Path::new(&row.file).with_extension("txt");
            std::fs::copy(
                demo.join(&sidecar),
                folder.join(sidecar.file_name().unwrap()),
            )
            .unwrap();
        }
    }
    succeeded(&tagweave(folder, &["scan", ".", "--json"]));
    let trained = tagweave(folder, &["train"]);
    assert!(
        stdout_of(&trained).contains("scores are not probabilities"),
        "{}",
        stdout_of(&trained)
    );
    let picture = Path::new(
        &truth
            .iter()
            .find(|r| r.written_tags.is_empty())
            .unwrap()
            .file,
    )
    .file_name()
    .unwrap()
    .to_str()
    .unwrap()
    .to_string();
    let text = stdout_of(&tagweave(folder, &["suggest", &picture]));
    let scores: Vec<&str> = text
        .lines()
        .skip(1)
        .filter(|l| l.starts_with("   "))
        .collect();
    assert_eq!(scores.len(), 5, "{text}");
    for line in &scores {
        assert!(!line.contains('%'), "{text}");
        let number = line.split_whitespace().next().unwrap();
        assert!(number.parse::<f64>().is_ok(), "{text}");
    }
    assert!(text.contains("scores, not probabilities"), "{text}");
    let answer = succeeded(&tagweave(folder, &["suggest", &picture, "--json"]));
    assert_eq!(answer["pictures"][0]["calibrated"], false);
    let found = stdout_of(&tagweave(folder, &["find", "sea"]));
    assert!(!found.contains('%'), "{found}");
}

// audit --json lists the flagged pictures only (--all: every one), and a disputed row of
// its sheet holds the tag's support, the number the queue ranks by.
#[test]
fn audit_lists_flagged_pictures_and_its_sheet_holds_the_support() {
    let _serial = one_at_a_time();
    let folder = &prepared().folder;
    let temp = tempfile::tempdir().unwrap();
    let sheet = temp.path().join("review.csv");
    let sheet_arg = sheet.to_str().unwrap();
    let audit = succeeded(&tagweave(
        folder,
        &["audit", "--json", "--limit", "100", "--sheet", sheet_arg],
    ));
    let queue = audit["queue"].as_array().unwrap();
    let flagged = audit["flagged"].as_u64().unwrap() as usize;
    assert!(
        flagged < audit["judged"].as_u64().unwrap() as usize,
        "{}",
        audit["judged"]
    );
    assert_eq!(queue.len(), flagged.min(100));
    assert!(queue
        .iter()
        .all(|d| !d["disputed"].as_array().unwrap().is_empty()));
    let rows = tagweave_writeback::read_sheet(&sheet).unwrap();
    let mut checked = 0;
    for d in queue {
        for t in d["disputed"].as_array().unwrap() {
            let row = rows
                .iter()
                .find(|r| {
                    r.picture == d["picture"].as_str().unwrap()
                        && r.tag == t["tag"].as_str().unwrap()
                        && r.kind == tagweave_writeback::RowKind::Disputed
                })
                .expect("every disputed tag has its row");
            let support = t["support"].as_f64().unwrap();
            let stated = f64::from(row.probability.unwrap());
            assert!((stated - support).abs() < 1e-3, "{t}: sheet says {stated}");
            checked += 1;
        }
    }
    assert!(checked > 0);
}

// apply says when a tag is new to the collection (a slip such as `clifs`), speaks of kept
// originals only when one was kept, and a dry run piped into a reader that quits (`| head`)
// ends quietly.
#[test]
fn apply_names_new_tags_and_speaks_of_originals_only_when_one_was_kept() {
    let _serial = one_at_a_time();
    let copy = prepared_copy();
    let folder = copy.path();
    let truth = truth_by_file();
    let header = "picture,tag,probability,kind,accept\n";
    let bare = truth.values().find(|r| r.sidecar == "none").unwrap();
    std::fs::write(
        folder.join("new.csv"),
        format!("{header}{},clifs,0.5,suggested,y\n", bare.file),
    )
    .unwrap();
    let dry = tagweave(folder, &["apply", "new.csv", "--dry-run"]);
    let said = stdout_of(&dry);
    assert!(
        said.contains("new tag `clifs`") && said.contains("did you mean `cliffs`?"),
        "{said}"
    );
    let quiet = tagweave_into_closed_pipe(folder, &["apply", "new.csv", "--dry-run"]);
    assert_eq!(quiet.status.code(), Some(0), "{}", stderr_of(&quiet));
    assert!(
        !stderr_of(&quiet).contains("panicked"),
        "{}",
        stderr_of(&quiet)
    );

    let done = tagweave(folder, &["apply", "new.csv"]);
    let said = stdout_of(&done);
    assert_eq!(done.status.code(), Some(0), "{said}{}", stderr_of(&done));
    assert!(said.contains("1 sidecars written (1 new)"), "{said}");
    assert!(
        !said.contains(".orig"),
        "nothing was kept, none said: {said}"
    );

    let with_text = truth
        .values()
        .find(|r| r.sidecar == "txt" && !r.written_tags.iter().any(|t| t == "cliffs"))
        .unwrap();
    std::fs::write(
        folder.join("known.csv"),
        format!("{header}{},cliffs,0.5,suggested,y\n", with_text.file),
    )
    .unwrap();
    let done = tagweave(folder, &["apply", "known.csv"]);
    let said = stdout_of(&done);
    let sidecar = Path::new(&with_text.file).with_extension("txt");
    let kept = format!("{}.orig", sidecar.file_name().unwrap().to_str().unwrap());
    assert!(said.contains(&format!("e.g. {kept}")), "{said}");
    assert!(folder.join(sidecar.with_file_name(&kept)).is_file());
    assert!(!said.contains("new tag `"), "{said}");
}

/// `to-tag --json` for six pictures, farthest first, into the sheet `t.csv`.
fn farthest_first_six(folder: &Path) -> Value {
    let way = ["--way", "unlike-tagged", "--sheet", "t.csv"];
    succeeded(&tagweave(
        folder,
        &[&["to-tag", "--json", "--count", "6"][..], &way].concat(),
    ))
}

// `to-tag` on the demo archive: only untagged pictures, each farther-first pick no less
// similar to what is covered than the one before (the k-center greedy order: Gonzalez 1985),
// tags typed into its sheet reach the sidecar through `apply`, and the picture then leaves
// the list.
#[test]
fn to_tag_lists_untagged_pictures_and_its_sheet_takes_typed_tags() {
    let _serial = one_at_a_time();
    let copy = prepared_copy();
    let folder = copy.path();
    let truth = truth_by_file();
    let listed = farthest_first_six(folder);
    assert_eq!(listed["trained"], true);
    assert_eq!(listed["way"], "unlike-tagged");
    assert_eq!(listed["untagged"], 41);
    let pictures = listed["pictures"].as_array().unwrap();
    assert_eq!(pictures.len(), 6);
    let mut last = f64::NEG_INFINITY;
    for p in pictures {
        let file = p["picture"].as_str().unwrap();
        assert!(
            truth[file].written_tags.is_empty(),
            "{file} carries tags, yet was listed"
        );
        assert_eq!(p["why"], "unlike-tagged");
        let nearest = p["nearest_similarity"].as_f64().unwrap();
        assert!(
            nearest < tagweave_suggest::NEAR_DUPLICATE as f64,
            "{nearest}"
        );
        assert!(nearest >= last - 1e-6, "{nearest} after {last}");
        last = nearest;
    }

    let unsure = succeeded(&tagweave(
        folder,
        &[
            "to-tag",
            "--json",
            "--count",
            "3",
            "--way",
            "least-sure",
            "--sheet",
            "u.csv",
        ],
    ));
    assert_eq!(unsure["way"], "least-sure");
    let vocabulary = stdout_of(&tagweave(folder, &["tags"]));
    for p in unsure["pictures"].as_array().unwrap() {
        assert_eq!(p["why"], "model-unsure");
        for tag in p["likeliest"].as_array().unwrap() {
            assert!(vocabulary.contains(tag.as_str().unwrap()), "{tag}");
        }
    }

    // The person types two tags for the first picture and nothing for the others.
    let sheet = folder.join("t.csv");
    let text = std::fs::read_to_string(&sheet).unwrap();
    let first = pictures[0]["picture"].as_str().unwrap();
    let typed = text.replacen(
        &format!("{first},,,to-tag,"),
        &format!("{first},\"harbour, night\",,to-tag,"),
        1,
    );
    assert_ne!(
        typed, text,
        "the sheet lists {first} as a to-tag row:\n{text}"
    );
    std::fs::write(&sheet, typed).unwrap();
    succeeded(&tagweave(folder, &["apply", "t.csv", "--json"]));
    let sidecar = folder.join(first).with_extension("txt");
    let written = std::fs::read_to_string(&sidecar).unwrap();
    assert!(
        written.contains("harbour") && written.contains("night"),
        "{written}"
    );

    succeeded(&tagweave(folder, &["scan", ".", "--json"]));
    let again = farthest_first_six(folder);
    assert_eq!(again["untagged"], 40);
    let again: Vec<&str> = again["pictures"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["picture"].as_str().unwrap())
        .collect();
    assert!(!again.contains(&first), "{first} is tagged now: {again:?}");
}

// Before anything is tagged or trained, the list is the most varied pictures, said plainly.
#[test]
fn to_tag_works_before_any_tag_or_training() {
    let temp = tempfile::tempdir().unwrap();
    for (i, shade) in [(0u8, 20u8), (1, 120), (2, 240)] {
        image::RgbImage::from_fn(32, 24, |x, y| {
            image::Rgb([shade, (x * 7) as u8 ^ shade, (y * 9) as u8])
        })
        .save(temp.path().join(format!("p{i}.png")))
        .unwrap();
    }
    succeeded(&tagweave(temp.path(), &["scan", ".", "--json"]));
    let listed = succeeded(&tagweave(
        temp.path(),
        &["to-tag", "--json", "--count", "10"],
    ));
    assert_eq!(listed["trained"], false);
    assert_eq!(listed["way"], "unlike-tagged");
    assert_eq!(listed["pictures"].as_array().unwrap().len(), 3);
    assert_eq!(listed["pictures"][0]["nearest_similarity"], Value::Null);
    let text = stdout_of(&tagweave(temp.path(), &["to-tag", "--count", "1"]));
    assert!(text.contains("no trained model yet"), "{text}");
}

/// A scan cut short leaves a picture's record without its features: questions about it say
/// to scan again, and lists of pictures go on without it.
#[test]
fn a_picture_without_features_is_named_and_left_out_of_lists() {
    let _serial = one_at_a_time();
    let copy = prepared_copy();
    let folder = copy.path();
    let rel = "1950s/not-yet-described.jpg";
    {
        let store = tagweave_store::Store::open(&folder.join(".tagweave")).unwrap();
        let untagged = store
            .items()
            .unwrap()
            .into_iter()
            .find(|i| i.tags.is_empty())
            .expect("the demo has untagged pictures");
        std::fs::copy(folder.join(&untagged.rel_path), folder.join(rel)).unwrap();
        let record = tagweave_collection::ItemRecord {
            id: tagweave_collection::item_id(rel),
            rel_path: rel.to_string(),
            ..untagged
        };
        store.update_items(&[record], &[]).unwrap();
    }
    let asked = tagweave(folder, &["suggest", rel, "--json"]);
    let said = format!("{}{}", stdout_of(&asked), stderr_of(&asked));
    assert!(said.contains("has no features yet"), "{said}");
    assert!(said.contains("tagweave scan"), "{said}");
    let listed = succeeded(&tagweave(folder, &["suggest", "--untagged", "--json"]));
    let pictures = listed["pictures"].as_array().unwrap();
    assert!(!pictures.is_empty());
    assert!(pictures.iter().all(|p| p["picture"] != rel), "{listed}");
}

/// The review page holds every picture's features (it lets the store go); the commands
/// read them from the store when asked. Both must give the same answers.
#[test]
fn features_held_or_read_when_asked_give_the_same_answers() {
    let _serial = one_at_a_time();
    let store = tagweave_store::Store::open(&prepared().folder.join(".tagweave")).unwrap();
    let read = tagweave_query::Queries::open(&store).unwrap();
    let held = tagweave_query::Queries::open_to_keep(&store).unwrap();
    let rows: Vec<usize> = (0..read.items().len()).collect();
    assert_eq!(
        read.suggest_rows(&rows).unwrap(),
        held.suggest_rows(&rows).unwrap()
    );
    assert_eq!(
        read.neighbour_shares(&rows).unwrap(),
        held.neighbour_shares(&rows).unwrap()
    );
    // Read once for both, a batch at a time: the same answers, each row in its place
    // (asked alone, a row gets what it gets among all, up to float summation order).
    let (p, shares) = read.suggest_and_shares(&rows).unwrap();
    assert_eq!(p, read.suggest_rows(&rows).unwrap());
    assert_eq!(shares, read.neighbour_shares(&rows).unwrap());
    for r in (0..rows.len()).step_by(37) {
        let alone = read.suggest_rows(&[r]).unwrap();
        let gap = alone
            .row(0)
            .iter()
            .zip(p.row(r))
            .map(|(a, b)| (a - b).abs())
            .fold(0.0f32, f32::max);
        assert!(gap < 1e-4, "row {r} alone differs by {gap}");
    }
    // The familiarity memory, worked out once, is kept beside the store: a later opening
    // reads it and judges alike.
    let first = read.familiarity_of_rows(&rows).unwrap();
    assert!(store.dir().join("answers-familiar.bin").exists());
    let again = tagweave_query::Queries::open(&store).unwrap();
    assert_eq!(again.familiarity_of_rows(&rows).unwrap(), first);
    assert_eq!(held.familiarity_of_rows(&rows).unwrap(), first);
    let (a, b) = (read.audit().unwrap(), held.audit().unwrap());
    assert_eq!(a.queue.len(), b.queue.len());
    assert!(a
        .queue
        .iter()
        .zip(&b.queue)
        .all(|(x, y)| x.picture == y.picture));
}
