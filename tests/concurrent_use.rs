//! Two tagweave processes on one store: the second is told which process holds it and
//! exits non-zero; the first finishes untouched.

mod common;

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use common::*;

fn start_scan(folder: &Path) -> Child {
    Command::new(env!("CARGO_BIN_EXE_tagweave"))
        .args(["scan", ".", "--json"])
        .current_dir(folder)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

/// Waits until `child` holds the store (its PID is in the lock file).
fn wait_until_holding(folder: &Path, child: &mut Child) {
    let lock = folder.join(".tagweave/lock");
    let started = Instant::now();
    while std::fs::read_to_string(&lock).ok().as_deref() != Some(&child.id().to_string()) {
        assert!(
            child.try_wait().unwrap().is_none(),
            "the first scan ended before it was seen holding the store"
        );
        assert!(started.elapsed() < Duration::from_secs(30), "no lock taken");
        std::thread::sleep(Duration::from_millis(2));
    }
}

fn assert_refused_naming(out: &std::process::Output, pid: u32, what: &str) {
    let message = stderr_of(out);
    assert_eq!(out.status.code(), Some(1), "{what}: {message}");
    assert!(
        message.contains(&format!(
            "is in use by another tagweave process (PID {pid}); wait for it to finish, or stop it"
        )),
        "{what}: {message}"
    );
}

/// The summary of a scan with nothing left to do, without its timing.
fn settled(folder: &Path) -> serde_json::Value {
    let out = tagweave(folder, &["scan", ".", "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let mut summary = json(&out);
    summary.as_object_mut().unwrap().remove("seconds");
    summary
}

#[test]
fn a_second_process_is_refused_while_a_scan_runs_and_nothing_is_damaged() {
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path().join("archive");
    copy_demo_to(&folder);
    let sidecars = sidecar_snapshot(&folder);

    let mut first = start_scan(&folder);
    wait_until_holding(&folder, &mut first);
    let pid = first.id();
    assert_refused_naming(&tagweave(&folder, &["scan", "."]), pid, "second scan");
    assert_refused_naming(&tagweave(&folder, &["tags", "--json"]), pid, "tags");
    // A rebuild must not delete the store from under the running scan.
    assert_refused_naming(
        &tagweave(&folder, &["scan", ".", "--rebuild"]),
        pid,
        "rebuild",
    );
    assert!(
        first.try_wait().unwrap().is_none(),
        "still running after the refusals: they were checked against a live holder"
    );

    let out = first.wait_with_output().unwrap();
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let report = json(&out);
    // source: demo-collection/TRUTH.csv (400 pictures, 41 with no written tags)
    let truth = demo_truth();
    let untagged = truth.iter().filter(|r| r.written_tags.is_empty()).count();
    assert_eq!(report["items"], truth.len(), "{report}");
    assert_eq!(report["tagged"], truth.len() - untagged, "{report}");
    assert_eq!(report["features"]["encoded"], truth.len(), "{report}");

    // Nothing to redo and nothing lost: the store reads back whole.
    let after = settled(&folder);
    assert_eq!(after["unchanged"], truth.len(), "{after}");
    assert_eq!(after["features"]["encoded"], 0, "{after}");
    assert_eq!(after["items"], report["items"], "{after}");
    assert_eq!(after["tags"], report["tags"], "{after}");
    let tags = tagweave(&folder, &["tags", "--json"]);
    assert_eq!(tags.status.code(), Some(0), "{}", stderr_of(&tags));
    assert_eq!(json(&tags)["items"], truth.len());
    assert!(sidecar_snapshot(&folder) == sidecars, "no sidecar touched");
    eprintln!(
        "concurrent use: scan/tags/rebuild refused with the holder's PID while a scan ran; \
         the scan finished intact; {:.1} s",
        started.elapsed().as_secs_f64()
    );
}

#[test]
fn two_scans_started_together_one_runs_and_one_is_told_who_runs() {
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path();
    let demo = repo_root().join("demo-collection");
    for row in demo_truth().iter().filter(|r| r.sidecar == "txt").take(12) {
        let name = row.file.rsplit('/').next().unwrap();
        std::fs::copy(demo.join(&row.file), folder.join(name)).unwrap();
    }
    for round in 0..5 {
        let _ = std::fs::remove_dir_all(folder.join(".tagweave"));
        let (a, b) = (start_scan(folder), start_scan(folder));
        let (a_pid, b_pid) = (a.id(), b.id());
        let (a, b) = (a.wait_with_output().unwrap(), b.wait_with_output().unwrap());
        let (winner, loser, winner_pid) = match (a.status.code(), b.status.code()) {
            (Some(0), Some(1)) => (a, b, a_pid),
            (Some(1), Some(0)) => (b, a, b_pid),
            codes => panic!(
                "round {round}: one scan runs, one is refused: {codes:?}\n{}\n{}",
                stderr_of(&a),
                stderr_of(&b)
            ),
        };
        assert_refused_naming(&loser, winner_pid, "the later of two");
        assert_eq!(json(&winner)["items"], 12);
    }
    assert_eq!(settled(folder)["unchanged"], 12);
    eprintln!(
        "simultaneous starts: 5 of 5 rounds, one ran, the other named its PID; {:.1} s",
        started.elapsed().as_secs_f64()
    );
}
