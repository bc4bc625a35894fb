//! A command killed with SIGKILL at any moment leaves a store the next run completes, with
//! the same records and vectors as a run never interrupted, and no sidecar touched.
//!
//! `kill_at_random_moments` is the harness; each command gets one case below (`scan`,
//! `train`, `apply`): a `prepare` that builds the state the command starts from and a
//! `verify` that compares what the command wrote with the uninterrupted run's. `apply` is
//! the one command allowed to change sidecars: right after each kill, every sidecar must hold
//! either its old bytes or exactly the bytes of the uninterrupted run, never anything between.

mod common;
mod corpus;

use std::collections::BTreeMap;
use std::path::Path;
use std::process::{Command, Stdio};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

use common::*;
use tagweave_store::StoreError;

/// What happened over all kills, for the test output.
#[derive(Debug, Default)]
struct KillReport {
    /// Kills that met a running process.
    landed: usize,
    /// Attempts that found the run already done (then aimed again, up to 3 per slice).
    finished_first: usize,
    /// Where in the run each landed kill struck, by the store's state afterwards.
    states: BTreeMap<String, usize>,
    /// The first, reference run.
    reference_seconds: f64,
    total_seconds: f64,
    /// `tagweave scan . --json` of the reference once settled (for scan cases).
    settled: serde_json::Value,
}

/// Runs `tagweave command_args` (in the folder) once to completion on a folder made by
/// `prepare`: that is the reference and its duration. Then `kills` times: a fresh folder
/// from `prepare`, the command started and SIGKILLed after a seeded random delay (one
/// delay in each of `kills` equal slices of the reference duration, so kills spread over
/// the whole run), then
/// - the store opens (`tagweave tags --json` succeeds, or says to run `tagweave scan`
///   first when the kill came before the store existed),
/// - no sidecar changed (bytes and modification time) — or, for `apply`, every sidecar holds
///   its old bytes or the reference run's new bytes,
/// - the command run again completes (exit 0) and `verify(folder, reference)` agrees.
fn kill_at_random_moments(
    command_args: &[&str],
    prepare: &dyn Fn(&Path),
    verify: &dyn Fn(&Path, &Path),
    kills: usize,
    seed: u64,
) -> KillReport {
    kill_within(command_args, prepare, verify, kills, seed, None)
}

/// [`kill_at_random_moments`] with the kill delays spread over `window` instead of the
/// reference run's duration (to aim at the first milliseconds, say).
fn kill_within(
    command_args: &[&str],
    prepare: &dyn Fn(&Path),
    verify: &dyn Fn(&Path, &Path),
    kills: usize,
    seed: u64,
    window: Option<Duration>,
) -> KillReport {
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let reference = temp.path().join("reference");
    prepare(&reference);
    let clock = Instant::now();
    let out = tagweave(&reference, command_args);
    let duration = clock.elapsed();
    assert_eq!(
        out.status.code(),
        Some(0),
        "reference run: {}",
        stderr_of(&out)
    );
    let mut report = KillReport {
        reference_seconds: duration.as_secs_f64(),
        ..KillReport::default()
    };
    let total_items = open_store_copy(&reference).1.item_count().unwrap();
    let reference_sidecars = sidecar_snapshot(&reference);
    // Runs vary with the machine's load: a run seen to end before its kill moment gives a
    // new estimate of the duration, and that slice is aimed at again (at most 3 times).
    let mut estimate = duration;
    let mut state = seed;
    let (mut kill, mut attempt) = (0, 0);
    while kill < kills {
        attempt += 1;
        let unit = (corpus::splitmix64(&mut state) >> 11) as f64 / (1u64 << 53) as f64;
        let span = window.unwrap_or(estimate);
        let delay = span.mul_f64((kill as f64 + unit) / kills as f64);
        let folder = temp.path().join(format!("kill-{kill:02}-{attempt}"));
        prepare(&folder);
        let sidecars = sidecar_snapshot(&folder);
        let what = format!("kill {kill} at {:.0} ms", delay.as_secs_f64() * 1000.0);

        let mut child = Command::new(env!("CARGO_BIN_EXE_tagweave"))
            .args(command_args)
            .current_dir(&folder)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let spawned = Instant::now();
        // Polled rather than slept, so a run that ends first is timed.
        let finished_in = loop {
            if child.try_wait().unwrap().is_some() {
                break Some(spawned.elapsed());
            }
            let left = delay.saturating_sub(spawned.elapsed());
            if left.is_zero() {
                break None;
            }
            std::thread::sleep(left.min(Duration::from_millis(1)));
        };
        // A run can end between the last poll and the kill: then its exit status is success
        // and it counts as finished first.
        let finished_in = finished_in.or_else(|| {
            child.kill().unwrap(); // SIGKILL on Unix: no destructor, no flush runs
            let status = child.wait().unwrap();
            status.success().then(|| spawned.elapsed())
        });
        match finished_in {
            Some(took) => {
                eprintln!(
                    "  {what}: the run had finished, in {:.0} ms",
                    took.as_secs_f64() * 1000.0
                );
                report.finished_first += 1;
                estimate = took;
            }
            None => {
                report.landed += 1;
                let state = store_state(&folder, total_items);
                eprintln!("  {what}: killed while {state}");
                *report.states.entry(state).or_default() += 1;
            }
        }
        if finished_in.is_none() || attempt == 3 {
            (kill, attempt) = (kill + 1, 0);
        }

        let after_kill = sidecar_snapshot(&folder);
        if command_args.first() == Some(&"apply") {
            let new = relative_bytes(&reference, &reference_sidecars);
            let old = relative_bytes(&folder, &sidecars);
            for (rel, bytes) in relative_bytes(&folder, &after_kill) {
                assert!(
                    old.get(&rel) == Some(&bytes) || new.get(&rel) == Some(&bytes),
                    "{what}: {rel} is neither its old nor its new content"
                );
            }
            for rel in old.keys() {
                assert!(
                    after_kill.contains_key(&folder.join(rel)),
                    "{what}: {rel} vanished"
                );
            }
        } else {
            assert!(after_kill == sidecars, "{what}: no sidecar was touched");
        }
        let tags = tagweave(&folder, &["tags", "--json"]);
        if tags.status.code() != Some(0) {
            let message = stderr_of(&tags);
            assert!(
                message.contains("no tagweave store") && message.contains("tagweave scan"),
                "{what}: the store does not open and the message does not say how to go on: \
                 {message}"
            );
        }
        let rerun = tagweave(&folder, command_args);
        assert_eq!(
            rerun.status.code(),
            Some(0),
            "{what}: the rerun completes\n{}",
            stderr_of(&rerun)
        );
        if command_args.first() == Some(&"apply") {
            assert_eq!(
                relative_bytes(&folder, &sidecar_snapshot(&folder)),
                relative_bytes(&reference, &reference_sidecars),
                "{what}: after the rerun every sidecar is as the uninterrupted run left it"
            );
        } else {
            assert!(
                sidecar_snapshot(&folder) == sidecars,
                "{what}: no sidecar was touched"
            );
        }
        verify(&folder, &reference);
        std::fs::remove_dir_all(&folder).unwrap();
    }
    if command_args.first() == Some(&"scan") {
        report.settled = settled_summary(&reference);
    }
    report.total_seconds = started.elapsed().as_secs_f64();
    report
}

/// Where a killed run stopped, read from its store: no store, reading items, learning the
/// extractor, describing pictures, or past all of these.
fn store_state(folder: &Path, total_items: usize) -> String {
    let (_copy, store) = try_open_store_copy(folder);
    let store = match store {
        Ok(store) => store,
        Err(StoreError::NotAStore { .. }) => return "0 before the store existed".into(),
        Err(e) => panic!("the store of a killed run opens: {e}"),
    };
    let items = store.items().unwrap();
    let described = items
        .iter()
        .filter(|i| {
            store
                .vector(tagweave_store::FEATURES, &i.id)
                .unwrap()
                .is_some()
        })
        .count();
    let learned = store
        .blob::<serde_json::Value>(tagweave_store::EXTRACTOR_BLOB)
        .unwrap()
        .is_some();
    match (items.len(), learned, described) {
        (n, false, _) if n < total_items => "1 reading items".into(),
        (_, false, _) => "2 learning features".into(),
        (n, true, d) if d < n => "3 describing pictures".into(),
        _ => "4 after describing".into(),
    }
}

/// Everything a scan decides, from its store: item records (not file times, which differ
/// between copies), feature vectors bit for bit, and the learned extractor.
fn scan_result(folder: &Path) -> (Vec<String>, Vec<Vec<u32>>, serde_json::Value) {
    let (_copy, store) = open_store_copy(folder);
    let mut items = store.items().unwrap();
    items.sort_by(|a, b| a.id.cmp(&b.id));
    let records = items
        .iter()
        .map(|i| {
            let sidecars: Vec<String> = i
                .sidecars
                .iter()
                .map(|s| format!("{}:{:?}", s.rel_path, s.kind))
                .collect();
            format!(
                "{} {} {:?} {} {:?} {:?}",
                i.id, i.rel_path, i.format, i.content_hash, sidecars, i.tags
            )
        })
        .collect();
    let vectors = items
        .iter()
        .map(|i| {
            store
                .vector(tagweave_store::FEATURES, &i.id)
                .unwrap()
                .unwrap_or_else(|| panic!("{} has features", i.rel_path))
                .iter()
                .map(|v| v.to_bits())
                .collect()
        })
        .collect();
    let extractor = store
        .blob(tagweave_store::EXTRACTOR_BLOB)
        .unwrap()
        .expect("an extractor");
    (records, vectors, extractor)
}

/// Sidecar bytes by path relative to `folder`.
fn relative_bytes(
    folder: &Path,
    snapshot: &BTreeMap<std::path::PathBuf, (Vec<u8>, std::time::SystemTime)>,
) -> BTreeMap<String, Vec<u8>> {
    snapshot
        .iter()
        .map(|(path, (bytes, _))| {
            let rel = path.strip_prefix(folder).unwrap().display().to_string();
            (rel, bytes.clone())
        })
        .collect()
}

/// The summary of a scan with nothing left to do, without its timing.
fn settled_summary(folder: &Path) -> serde_json::Value {
    let out = tagweave(folder, &["scan", ".", "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let mut summary = json(&out);
    summary.as_object_mut().unwrap().remove("seconds");
    summary
}

/// Checks a rerun against the uninterrupted run (whose results are read once).
fn scan_verifier() -> impl Fn(&Path, &Path) {
    let expected = OnceLock::new();
    move |folder, reference| {
        let (want_summary, want_result) =
            expected.get_or_init(|| (settled_summary(reference), scan_result(reference)));
        let summary = settled_summary(folder);
        assert_eq!(&summary, want_summary);
        assert!(
            &scan_result(folder) == want_result,
            "records, vectors or extractor differ"
        );
    }
}

#[test]
fn scan_killed_at_random_moments_is_completed_by_the_next_scan() {
    // TAGWEAVE_TEST_KILLS trades coverage for time (each kill costs about 1.5 scans).
    let kills = kills_from_env(20);
    let _serial = one_at_a_time();
    let verify = scan_verifier();
    let report = kill_at_random_moments(&["scan", "."], &copy_demo_to, &verify, kills, 0x5CA7);
    // source: demo-collection/TRUTH.csv (400 pictures, 41 with no written tags)
    let truth = demo_truth();
    let untagged = truth.iter().filter(|r| r.written_tags.is_empty()).count();
    assert_eq!(report.settled["items"], truth.len(), "{}", report.settled);
    assert_eq!(
        report.settled["tagged"],
        truth.len() - untagged,
        "{}",
        report.settled
    );
    eprintln!(
        "scan of the demo archive, reference run {:.2} s: {} SIGKILLs met a running scan, in \
         {kills} slices of the run ({} more attempts found the run already finished and were \
         aimed again); every store reopened, every rerun completed with the \
         reference's records, vectors and extractor, no sidecar touched. Killed while: {:?}. \
         {:.1} s in all.",
        report.reference_seconds,
        report.landed,
        report.finished_first,
        report.states,
        report.total_seconds
    );
    assert!(
        report.landed >= kills - 1,
        "every slice but at most one was hit: {report:?}"
    );
}

/// The first milliseconds, when the store folder is being created, are a window the
/// spread-out kills above rarely hit; a small folder and many early kills aim at it.
#[test]
fn scan_killed_while_creating_its_store_is_completed_by_the_next_scan() {
    let demo = repo_root().join("demo-collection");
    let pictures: Vec<_> = demo_truth()
        .into_iter()
        .filter(|r| r.sidecar == "txt")
        .take(6)
        .collect();
    let prepare = |folder: &Path| {
        for row in &pictures {
            let to = folder.join(&row.file);
            std::fs::create_dir_all(to.parent().unwrap()).unwrap();
            std::fs::copy(demo.join(&row.file), &to).unwrap();
            let stem = row.file.rsplit_once('.').unwrap().0;
            std::fs::copy(
                demo.join(format!("{stem}.txt")),
                folder.join(format!("{stem}.txt")),
            )
            .unwrap();
        }
    };
    let _serial = one_at_a_time();
    let started = Instant::now();
    let mut states: BTreeMap<String, usize> = BTreeMap::new();
    let mut landed = 0;
    // Eight kills spread over the first 10 ms, eight over the first 40 ms.
    for (i, window_ms) in [10u64, 40].into_iter().enumerate() {
        let report = kill_within(
            &["scan", "."],
            &prepare,
            &scan_verifier(),
            8,
            0xEA21 + i as u64,
            Some(Duration::from_millis(window_ms)),
        );
        landed += report.landed;
        for (state, n) in report.states {
            *states.entry(state).or_default() += n;
        }
    }
    eprintln!(
        "early kills (first 10 and 40 ms of a 6-picture scan): {landed} of 16 met a running \
         scan; all recovered. Killed while: {states:?}. {:.1} s",
        started.elapsed().as_secs_f64()
    );
}

/// A scanned (and, with `trained`, trained) copy of the demo archive, made once per test
/// binary; `prepare` functions copy it, store included.
fn demo_template(trained: bool) -> &'static Path {
    static SCANNED: OnceLock<tempfile::TempDir> = OnceLock::new();
    static TRAINED: OnceLock<tempfile::TempDir> = OnceLock::new();
    let cell = if trained { &TRAINED } else { &SCANNED };
    cell.get_or_init(|| {
        let dir = tempfile::tempdir().unwrap();
        copy_demo_to(dir.path());
        let out = tagweave(dir.path(), &["scan", ".", "--json"]);
        assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
        if trained {
            let out = tagweave(dir.path(), &["train", "--json"]);
            assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
        }
        dir
    })
    .path()
}

/// Every code and the stored model of a folder's store, to compare runs.
fn codes_and_model(folder: &Path) -> (Vec<(String, Vec<u32>)>, serde_json::Value) {
    let (_copy, store) = open_store_copy(folder);
    let codes = store
        .vectors_of_kind("code")
        .map(|row| {
            let (id, values) = row.unwrap();
            (id, values.iter().map(|v| v.to_bits()).collect())
        })
        .collect();
    let model = stored_model(&store);
    (codes, model)
}

/// TAGWEAVE_TEST_KILLS, when set, replaces every case's number of kills.
fn kills_from_env(default: usize) -> usize {
    std::env::var("TAGWEAVE_TEST_KILLS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

#[test]
fn train_killed_at_random_moments_is_completed_by_the_next_train() {
    let _serial = one_at_a_time();
    let template = demo_template(false);
    let prepare = |folder: &Path| copy_everything(template, folder);
    let expected = OnceLock::new();
    let verify = |folder: &Path, reference: &Path| {
        let want = expected.get_or_init(|| codes_and_model(reference));
        let got = codes_and_model(folder);
        assert_eq!(got.0.len(), 400, "every picture has a code again");
        assert!(
            &got == want,
            "codes or model differ from the uninterrupted run"
        );
    };
    let kills = kills_from_env(5);
    let report = kill_at_random_moments(&["train"], &prepare, &verify, kills, 0x7EA1);
    eprintln!(
        "train on the demo archive, reference run {:.2} s: {} SIGKILLs met a running train ({} found it finished); every store reopened, every rerun gave bit-identical codes and model, no sidecar touched. Killed while: {:?}. {:.1} s in all.",
        report.reference_seconds,
        report.landed,
        report.finished_first,
        report.states,
        report.total_seconds
    );
    assert!(report.landed + 1 >= kills, "{report:?}");
}

#[test]
fn apply_killed_at_random_moments_leaves_every_sidecar_old_or_new() {
    let _serial = one_at_a_time();
    let template = demo_template(false);
    // The sheet a reviewer might return: a new tag accepted for every picture (text and
    // XMP sidecars get an entry appended, pictures without one get a new text sidecar),
    // and one false tag removed.
    let truth = demo_truth();
    let mut sheet = String::from("picture,tag,probability,kind,accept\n");
    for row in &truth {
        sheet.push_str(&format!("{},checked-by-hand,0.9,suggested,y\n", row.file));
    }
    let falsified = truth
        .iter()
        .find(|r| r.sidecar == "xmp" && !r.false_tags.is_empty())
        .or_else(|| truth.iter().find(|r| !r.false_tags.is_empty()))
        .unwrap();
    sheet.push_str(&format!(
        "{},{},0.05,disputed,remove\n",
        falsified.file, falsified.false_tags[0]
    ));
    let prepare = |folder: &Path| {
        copy_everything(template, folder);
        std::fs::write(folder.join("review.csv"), &sheet).unwrap();
    };
    let verify = |folder: &Path, _reference: &Path| {
        // Applying again changes nothing: every accepted row is in place.
        let again = json(&tagweave(folder, &["apply", "review.csv", "--json"]));
        assert_eq!(again["pictures_changed"], 0, "{again}");
        assert_eq!(again["already_present"], truth.len(), "{again}");
    };
    let kills = kills_from_env(12);
    let report = kill_at_random_moments(
        &["apply", "review.csv", "--json"],
        &prepare,
        &verify,
        kills,
        0xA991,
    );
    eprintln!(
        "apply of a {}-row sheet to the demo archive, reference run {:.2} s: {} SIGKILLs met a running apply ({} found it finished); after every kill each sidecar held its old or its new bytes, every rerun ended with the reference's sidecars. {:.1} s in all.",
        truth.len() + 1,
        report.reference_seconds,
        report.landed,
        report.finished_first,
        report.total_seconds
    );
    assert!(report.landed + 2 >= kills, "{report:?}");
}
