//! Helpers shared by the end-to-end tests: run the real binary on real folders.

#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

pub fn tagweave(cwd: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_tagweave"))
        .args(args)
        .current_dir(cwd)
        .output()
        .expect("the tagweave binary runs")
}

/// The store's trained model as JSON, without its wall-clock time (the one thing two
/// identical trainings differ in), to compare runs.
pub fn stored_model(store: &tagweave_store::Store) -> serde_json::Value {
    let model = store
        .model(
            tagweave_suggest::MODEL_FORMAT,
            |m: &tagweave_suggest::TrainedModel| m.format,
        )
        .unwrap()
        .expect("a model");
    let mut model = serde_json::to_value(&model).unwrap();
    model["history"]
        .as_object_mut()
        .expect("the model keeps its history")
        .remove("seconds");
    model
}

pub fn json(output: &Output) -> serde_json::Value {
    serde_json::from_slice(&output.stdout).unwrap_or_else(|e| {
        panic!(
            "stdout is not JSON ({e}):\n{}\nstderr:\n{}",
            String::from_utf8_lossy(&output.stdout),
            String::from_utf8_lossy(&output.stderr)
        )
    })
}

pub fn repo_root() -> PathBuf {
    PathBuf::from(concat!(env!("CARGO_MANIFEST_DIR"), "/../.."))
}

/// The shared evaluation sets, or `None` (with a clear line) where this clone has none.
pub fn shared_eval(name: &str) -> Option<PathBuf> {
    let dir = repo_root().join("../shared/eval").join(name);
    if dir.is_dir() {
        Some(dir)
    } else {
        eprintln!("skipped: {} is absent in this clone", dir.display());
        None
    }
}

/// Copies a folder tree (files and folders only) so tests never write beside shared data.
pub fn copy_tree(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        let kind = entry.file_type().unwrap();
        if kind.is_dir() {
            if entry.file_name() != ".tagweave" {
                copy_tree(&entry.path(), &target);
            }
        } else if kind.is_file() {
            std::fs::copy(entry.path(), &target).unwrap();
        }
    }
}

/// Copies a folder with everything in it, its store included.
pub fn copy_everything(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            copy_everything(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), &target).unwrap();
        }
    }
}

/// One row of demo-collection/TRUTH.csv (its list fields are `;`-separated).
pub struct TruthRow {
    pub file: String,
    pub sidecar: String,
    pub true_tags: Vec<String>,
    pub written_tags: Vec<String>,
    pub removed_tags: Vec<String>,
    pub false_tags: Vec<String>,
}

pub fn demo_truth() -> Vec<TruthRow> {
    let text = std::fs::read_to_string(repo_root().join("demo-collection/TRUTH.csv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let list = |s: &str| -> Vec<String> {
        s.split(';')
            .filter(|t| !t.is_empty())
            .map(str::to_string)
            .collect()
    };
    lines
        .filter(|l| !l.is_empty())
        .map(|line| {
            let f: Vec<&str> = line.split(',').collect();
            TruthRow {
                file: f[col("file")].to_string(),
                sidecar: f[col("sidecar")].to_string(),
                true_tags: list(f[col("true_tags")]),
                written_tags: list(f[col("written_tags")]),
                removed_tags: list(f[col("removed_tags")]),
                false_tags: list(f[col("false_tags")]),
            }
        })
        .collect()
}

// ---- Reliability helpers (bad inputs, crash safety, concurrent use, store format) ----

/// Writes `bytes` at `root/rel`, creating folders as needed.
pub fn put(root: &Path, rel: &str, bytes: &[u8]) -> PathBuf {
    let path = root.join(rel);
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    std::fs::write(&path, bytes).unwrap();
    path
}

pub fn stdout_of(output: &Output) -> String {
    String::from_utf8_lossy(&output.stdout).into_owned()
}

pub fn stderr_of(output: &Output) -> String {
    String::from_utf8_lossy(&output.stderr).into_owned()
}

/// A fresh copy of the demo archive (without any store) in `folder`.
pub fn copy_demo_to(folder: &Path) {
    copy_tree(&repo_root().join("demo-collection"), folder);
}

/// True when file modes do not stop this process (root, or a file system without them):
/// tests of unreadable files cannot make one and must say so.
#[cfg(unix)]
pub fn permissions_are_ignored(scratch: &Path) -> bool {
    use std::os::unix::fs::PermissionsExt;
    let probe = put(scratch, "probe-unreadable", b"x");
    std::fs::set_permissions(&probe, std::fs::Permissions::from_mode(0o000)).unwrap();
    let readable = std::fs::read(&probe).is_ok();
    std::fs::set_permissions(&probe, std::fs::Permissions::from_mode(0o644)).unwrap();
    std::fs::remove_file(&probe).unwrap();
    readable
}

/// Every sidecar (`.txt`, `.xmp`) under `root` with its bytes and modification time, to
/// prove afterwards that nothing wrote to them.
pub fn sidecar_snapshot(
    root: &Path,
) -> std::collections::BTreeMap<PathBuf, (Vec<u8>, std::time::SystemTime)> {
    let mut found = std::collections::BTreeMap::new();
    let mut folders = vec![root.to_path_buf()];
    while let Some(folder) = folders.pop() {
        for entry in std::fs::read_dir(&folder).unwrap() {
            let entry = entry.unwrap();
            let path = entry.path();
            let kind = entry.file_type().unwrap();
            if kind.is_dir() && entry.file_name() != ".tagweave" {
                folders.push(path);
            } else if kind.is_file()
                && path
                    .extension()
                    .is_some_and(|e| e.eq_ignore_ascii_case("txt") || e.eq_ignore_ascii_case("xmp"))
            {
                let modified = entry.metadata().unwrap().modified().unwrap();
                found.insert(path.clone(), (std::fs::read(&path).unwrap(), modified));
            }
        }
    }
    found
}

/// Serialises the tests of one binary that run the binary and read stores in-process:
/// a child spawned by one test thread inherits, until it execs, whatever another thread has
/// open, a store's lock included. Stores are read through [`open_store_copy`] as well.
pub fn one_at_a_time() -> std::sync::MutexGuard<'static, ()> {
    static SERIAL: std::sync::Mutex<()> = std::sync::Mutex::new(());
    SERIAL
        .lock()
        .unwrap_or_else(|poisoned| poisoned.into_inner())
}

/// Opens a copy of `folder`'s store, so this process never holds the lock or the database
/// files of a store the binary is about to use (the copy goes when the guard drops).
pub fn open_store_copy(folder: &Path) -> (tempfile::TempDir, tagweave_store::Store) {
    let (scratch, store) = try_open_store_copy(folder);
    (scratch, store.unwrap_or_else(|e| panic!("{e}")))
}

/// [`open_store_copy`], with the error (no store yet, say) for the caller to judge.
pub fn try_open_store_copy(
    folder: &Path,
) -> (
    tempfile::TempDir,
    Result<tagweave_store::Store, tagweave_store::StoreError>,
) {
    let scratch = tempfile::tempdir().unwrap();
    let copy = scratch.path().join(".tagweave");
    let original = folder.join(".tagweave");
    if original.is_dir() {
        copy_everything(&original, &copy);
    }
    let store = tagweave_store::Store::open(&copy);
    (scratch, store)
}

/// Runs the binary with its standard output going into a pipe nobody reads any more (as
/// `tagweave … | head` once `head` has quit), and returns what it did.
pub fn tagweave_into_closed_pipe(cwd: &Path, args: &[&str]) -> Output {
    let (reader, writer) = std::io::pipe().expect("a pipe");
    drop(reader);
    Command::new(env!("CARGO_BIN_EXE_tagweave"))
        .args(args)
        .current_dir(cwd)
        .stdout(writer)
        .stderr(std::process::Stdio::piped())
        .output()
        .expect("the tagweave binary runs")
}
