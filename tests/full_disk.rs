//! A full disk: a store that cannot be written fails with a message that says the disk is
//! full, changes no sidecar, and works again once there is room; `apply` that cannot write
//! a sidecar leaves every original as it was.
//!
//! The full disk is a small tmpfs mounted for the test (`mount -t tmpfs -o size=…`), which
//! needs root or the mount capability; where mounting is not allowed the tests say
//! "skipped: …" and pass.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::*;

/// A tmpfs of a fixed size, unmounted when dropped.
struct SmallDisk {
    dir: PathBuf,
}

impl SmallDisk {
    /// Mounts a tmpfs of `mb` MB, or says why it cannot.
    fn mount(name: &str, mb: u32) -> Result<SmallDisk, String> {
        if !cfg!(target_os = "linux") {
            return Err("a size-capped tmpfs needs Linux".into());
        }
        let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR"))
            .join("full-disk")
            .join(format!("{name}-{}", std::process::id()));
        std::fs::create_dir_all(&dir).map_err(|e| format!("{}: {e}", dir.display()))?;
        let mounted = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={mb}m"), "tmpfs"])
            .arg(&dir)
            .output();
        match mounted {
            Ok(out) if out.status.success() => Ok(SmallDisk { dir }),
            Ok(out) => {
                let _ = std::fs::remove_dir(&dir);
                Err(format!(
                    "mounting a tmpfs is not allowed here ({}): {}",
                    out.status,
                    String::from_utf8_lossy(&out.stderr).trim()
                ))
            }
            Err(e) => {
                let _ = std::fs::remove_dir(&dir);
                Err(format!("cannot run mount: {e}"))
            }
        }
    }

    fn path(&self) -> &Path {
        &self.dir
    }

    /// Fills the disk with one file until about `free_kb` kB are left (none with 0);
    /// returns the file, to delete when room is wanted again.
    fn fill(&self, free_kb: u64) -> PathBuf {
        use std::io::Write;
        let filler = self.dir.join("filler");
        let mut file = std::fs::File::create(&filler).unwrap();
        let chunk = vec![0u8; 4096];
        let mut left = if free_kb == 0 {
            u64::MAX
        } else {
            available_kb(&self.dir).saturating_sub(free_kb) * 1024
        };
        while left > 0 {
            match file.write_all(&chunk) {
                Ok(()) => left = left.saturating_sub(chunk.len() as u64),
                Err(e) if e.kind() == std::io::ErrorKind::StorageFull => break,
                Err(e) => panic!("filling {}: {e}", self.dir.display()),
            }
        }
        let _ = file.sync_all();
        filler
    }
}

impl Drop for SmallDisk {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(&self.dir).status();
        let _ = std::fs::remove_dir(&self.dir);
    }
}

/// Free space of the file system holding `dir`, in kB (`df`'s own count).
fn available_kb(dir: &Path) -> u64 {
    let out = Command::new("df")
        .args(["-k", "--output=avail"])
        .arg(dir)
        .output()
        .expect("df runs");
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .nth(1)
        .and_then(|l| l.trim().parse().ok())
        .expect("df prints the free space")
}

/// Fails with the store's full-disk message, exit 1, no panic.
fn assert_says_disk_full(out: &std::process::Output, what: &str) {
    let text = format!("{}{}", stdout_of(out), stderr_of(out));
    assert_eq!(
        out.status.code(),
        Some(1),
        "{what}: {:?}\n{text}",
        out.status
    );
    assert!(!text.contains("panicked"), "{what}: {text}");
    assert!(
        text.contains("is full (no space left on the device)")
            && text.contains("free some space there"),
        "{what}: the message does not say the disk is full:\n{text}"
    );
}

/// A scan whose store fills its disk — at opening, among the items, among the features —
/// fails saying so, touches no sidecar, and once room is made the same store opens and a
/// scan completes it: the tags match a scan that had room all along.
#[test]
fn a_scan_that_fills_the_disk_says_so_and_completes_once_there_is_room() {
    let _serial = one_at_a_time();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path().join("photos");
    copy_demo_to(&root);
    let before = sidecar_snapshot(&root);

    // The reference: the same folder scanned with room (its store beside it).
    let reference = tagweave(&root, &["scan", ".", "--json"]);
    assert_eq!(
        reference.status.code(),
        Some(0),
        "{}",
        stderr_of(&reference)
    );
    let reference_tags = stdout_of(&tagweave(&root, &["tags", "--json"]));
    let store_kb = folder_kb(&root.join(".tagweave"));
    std::fs::remove_dir_all(root.join(".tagweave")).unwrap();

    // A disk of 8 MB filled to leave none to three quarters of the store's size runs out
    // at different moments of the scan.
    assert!(
        store_kb < 6 * 1024,
        "the demo's store ({store_kb} kB) fits the 8 MB disk"
    );
    for free_kb in [0, store_kb / 8, store_kb / 2, store_kb * 3 / 4] {
        let disk = match SmallDisk::mount("scan", 8) {
            Ok(disk) => disk,
            Err(why) => {
                eprintln!("skipped: {why}");
                return;
            }
        };
        let filler = disk.fill(free_kb);
        let store = disk.path().join("store");
        let store_arg = store.to_str().unwrap();
        let what = format!("scan with {free_kb} kB free");
        let out = tagweave(&root, &["scan", ".", "--store", store_arg, "--json"]);
        assert_says_disk_full(&out, &what);
        let out = tagweave(&root, &["scan", ".", "--store", store_arg]);
        assert_says_disk_full(&out, &format!("{what}, again (as text)"));
        assert_eq!(sidecar_snapshot(&root), before, "{what}: a sidecar changed");

        std::fs::remove_file(&filler).unwrap();
        let again = tagweave(&root, &["scan", ".", "--store", store_arg, "--json"]);
        assert_eq!(
            again.status.code(),
            Some(0),
            "{what}, then room made: {}",
            stderr_of(&again)
        );
        assert_eq!(json(&again)["items"], 400, "{what}, then room made");
        let settled = json(&tagweave(
            &root,
            &["scan", ".", "--store", store_arg, "--json"],
        ));
        assert_eq!(settled["unchanged"], 400, "{what}: {settled}");
        assert_eq!(
            settled["features"]["encoded"], 0,
            "{what}: the scan after room was made left features to encode: {settled}"
        );
        let tags = stdout_of(&tagweave(&root, &["tags", "--store", store_arg, "--json"]));
        assert_eq!(tags, reference_tags, "{what}: the completed store's tags");
        assert_eq!(sidecar_snapshot(&root), before, "{what}: a sidecar changed");
        eprintln!("{what}: refused with the full-disk message; completed once room was made");
    }
}

/// `apply` on a collection whose disk is full: every sidecar it meant to change keeps its
/// bytes, no temporary or `.orig` file is left, no sidecar is made, the summary names the
/// lack of space; with room again the same sheet is written.
#[test]
fn apply_on_a_full_disk_leaves_every_sidecar_as_it_was() {
    let _serial = one_at_a_time();
    let disk = match SmallDisk::mount("apply", 16) {
        Ok(disk) => disk,
        Err(why) => {
            eprintln!("skipped: {why}");
            return;
        }
    };
    let root = disk.path().join("photos");
    copy_demo_to(&root);
    let elsewhere = tempfile::tempdir().unwrap();
    let store = elsewhere.path().join("store");
    let store_arg = store.to_str().unwrap();
    let scan = tagweave(&root, &["scan", ".", "--store", store_arg, "--json"]);
    assert_eq!(scan.status.code(), Some(0), "{}", stderr_of(&scan));

    // Accept a true tag the sidecar lacks, for pictures with a text or XMP sidecar and for
    // two without one (apply would make theirs).
    let truth = demo_truth();
    let missing = |r: &TruthRow| {
        r.true_tags
            .iter()
            .find(|t| !r.written_tags.contains(t))
            .cloned()
    };
    let mut rows: Vec<(String, String)> = Vec::new();
    let mut without_sidecar = 0;
    for kind in ["txt", "xmp", "none"] {
        let some: Vec<(String, String)> = truth
            .iter()
            .filter(|r| r.sidecar == kind)
            .filter_map(|r| {
                Some((
                    r.file.clone(),
                    missing(r).or(r.false_tags.first().cloned())?,
                ))
            })
            .take(if kind == "none" { 2 } else { 4 })
            .collect();
        assert!(
            !some.is_empty(),
            "the demo has pictures with sidecar kind {kind}"
        );
        if kind == "none" {
            without_sidecar = some.len();
        }
        rows.extend(some);
    }
    let mut sheet = String::from("picture,tag,probability,kind,accept\n");
    for (file, tag) in &rows {
        sheet.push_str(&format!("{file},{tag},0.9,suggested,y\n"));
    }
    let sheet_path = put(elsewhere.path(), "review.csv", sheet.as_bytes());
    let sheet_arg = sheet_path.to_str().unwrap();

    let before = sidecar_snapshot(&root);
    let files_before = all_files(&root);
    let filler = disk.fill(0);
    let out = tagweave(&root, &["apply", sheet_arg, "--store", store_arg, "--json"]);
    let text = format!("{}{}", stdout_of(&out), stderr_of(&out));
    assert!(!text.contains("panicked"), "{text}");
    assert_ne!(out.status.code(), Some(0), "apply on a full disk: {text}");
    let report = json(&out);
    assert_eq!(report["sidecars_written"], 0, "{report}");
    let refused = report["refused"]
        .as_array()
        .expect("a list of refusals")
        .clone();
    let already = report["already_present"].as_u64().unwrap() as usize;
    assert_eq!(refused.len() + already, rows.len(), "{report}");
    assert!(refused.len() >= 5, "{report}");
    assert!(
        refused
            .iter()
            .all(|r| r.to_string().contains("No space left on device")),
        "every refusal names the lack of space: {report}"
    );
    assert_eq!(sidecar_snapshot(&root), before, "a sidecar changed");
    assert_eq!(all_files(&root), files_before, "a file was left or made");

    std::fs::remove_file(&filler).unwrap();
    let out = tagweave(&root, &["apply", sheet_arg, "--store", store_arg, "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let report = json(&out);
    assert_eq!(report["tags_added"], refused.len(), "{report}");
    assert_eq!(report["sidecars_created"], without_sidecar, "{report}");
    eprintln!(
        "apply on a full disk: {} pictures refused for lack of space, every sidecar as it \
         was; written once room was made",
        refused.len()
    );
}

/// Every file under `root`, relative, sorted.
/// Kilobytes the files under `dir` take.
fn folder_kb(dir: &Path) -> u64 {
    all_files(dir)
        .iter()
        .map(|f| std::fs::metadata(dir.join(f)).map_or(0, |m| m.len()))
        .sum::<u64>()
        / 1024
}

fn all_files(root: &Path) -> Vec<PathBuf> {
    let mut found = Vec::new();
    let mut folders = vec![root.to_path_buf()];
    while let Some(folder) = folders.pop() {
        for entry in std::fs::read_dir(&folder).unwrap() {
            let entry = entry.unwrap();
            if entry.file_type().unwrap().is_dir() {
                folders.push(entry.path());
            } else {
                found.push(entry.path().strip_prefix(root).unwrap().to_path_buf());
            }
        }
    }
    found.sort();
    found
}
