//! `tagweave shard …` on the demo archive: parts described and coded apart, merged, make
//! the store a single `scan` + `train` of the same folder and seed make, bit for bit; bad
//! part files are refused whole, by name.

mod common;

use std::path::{Path, PathBuf};
use std::process::Output;

use common::*;
use tagweave_store::{CODES, EXTRACTOR_BLOB, FEATURES};

fn ok(cwd: &Path, args: &[&str]) -> Output {
    let output = tagweave(cwd, args);
    assert!(
        output.status.success(),
        "tagweave {args:?} failed:\n{}\n{}",
        stdout_of(&output),
        stderr_of(&output)
    );
    output
}

/// Everything a store holds that the two ways must agree on, floats as their bits.
#[derive(Debug, PartialEq)]
struct Snapshot {
    items: Vec<tagweave_collection::ItemRecord>,
    features: Vec<(String, Vec<u32>)>,
    codes: Vec<(String, Vec<u32>)>,
    extractor: Vec<u8>,
    /// The model as JSON, less the seconds training took.
    model: serde_json::Value,
}

fn snapshot(store_dir: &Path) -> Snapshot {
    let scratch = tempfile::tempdir().unwrap();
    copy_everything(store_dir, scratch.path());
    let store = tagweave_store::Store::open(scratch.path()).unwrap();
    let vectors = |kind: &str| -> Vec<(String, Vec<u32>)> {
        store
            .vectors_of_kind(kind)
            .map(|row| {
                let (id, values) = row.unwrap();
                (id, values.iter().map(|v| v.to_bits()).collect())
            })
            .collect()
    };
    let model = stored_model(&store);
    Snapshot {
        items: store.items().unwrap(),
        features: vectors(FEATURES),
        codes: vectors(CODES),
        extractor: store
            .blob_bytes(EXTRACTOR_BLOB)
            .unwrap()
            .expect("an extractor"),
        model,
    }
}

fn path(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The demo archive in `temp/photos`, and a single-machine store of it in `temp/single`.
fn demo_with_single_store(temp: &Path) -> (PathBuf, PathBuf) {
    let photos = temp.join("photos");
    copy_demo_to(&photos);
    let single = temp.join("single");
    ok(
        temp,
        &["scan", path(&photos), "--store", path(&single), "--json"],
    );
    ok(temp, &["train", "--store", path(&single), "--json"]);
    (photos, single)
}

/// learn, describe every part, merge: returns the part files.
fn describe_parts(temp: &Path, photos: &Path, parts: u32) -> (PathBuf, Vec<PathBuf>) {
    let extractor = temp.join("extractor.json");
    ok(
        temp,
        &["shard", "learn", path(photos), "--out", path(&extractor)],
    );
    let files: Vec<PathBuf> = (1..=parts)
        .map(|k| {
            let out = temp.join(format!("features-{k}.parquet"));
            ok(
                temp,
                &[
                    "shard",
                    "describe",
                    path(photos),
                    "--extractor",
                    path(&extractor),
                    "--part",
                    &format!("{k}/{parts}"),
                    "--out",
                    path(&out),
                ],
            );
            out
        })
        .collect();
    (extractor, files)
}

fn merge(temp: &Path, photos: &Path, files: &[PathBuf], extra: &[&str]) -> serde_json::Value {
    let mut args = vec!["shard", "merge", path(photos), "--json"];
    args.extend(extra);
    args.extend(files.iter().map(|f| path(f)));
    json(&ok(temp, &args))
}

fn column(report: &serde_json::Value, field: &str) -> Vec<u64> {
    report["files"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f[field].as_u64().unwrap())
        .collect()
}

#[test]
fn parts_merged_make_the_store_one_scan_and_train_make() {
    let temp = tempfile::tempdir().unwrap();
    let temp = temp.path();
    let (photos, single) = demo_with_single_store(temp);

    let (extractor, features) = describe_parts(temp, &photos, 2);
    let merged = merge(temp, &photos, &features, &["--extractor", path(&extractor)]);
    assert_eq!(merged["extractor_stored"], true);
    let rows = column(&merged, "rows");
    assert_eq!(rows.iter().sum::<u64>(), 400, "{merged}");
    assert!(
        rows.iter().all(|&r| r > 100),
        "both parts hold pictures: {rows:?}"
    );
    // the same parts again: nothing written
    let again = merge(temp, &photos, &features, &[]);
    assert_eq!(column(&again, "written"), vec![0, 0], "{again}");
    assert_eq!(column(&again, "unchanged"), rows);

    ok(temp, &["train", "--store", path(&photos), "--json"]);
    let model = temp.join("model.bin");
    ok(
        temp,
        &[
            "shard",
            "model",
            "--store",
            path(&photos),
            "--out",
            path(&model),
        ],
    );
    let codes: Vec<PathBuf> = features
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let out = temp.join(format!("codes-{}.parquet", i + 1));
            ok(
                temp,
                &[
                    "shard",
                    "code",
                    "--model",
                    path(&model),
                    "--features",
                    path(f),
                    "--out",
                    path(&out),
                ],
            );
            out
        })
        .collect();
    // `train` coded every picture already: each code of a part file is bit for bit the one
    // the store holds, so the merge counts them all as already there.
    let merged_codes = merge(temp, &photos, &codes, &[]);
    assert_eq!(column(&merged_codes, "unchanged"), rows, "{merged_codes}");
    assert_eq!(column(&merged_codes, "written"), vec![0, 0]);

    let single_store = snapshot(&single);
    let merged_store = snapshot(&photos.join(".tagweave"));
    assert_eq!(merged_store.items.len(), 400);
    assert_eq!(merged_store.features.len(), 400);
    assert_eq!(merged_store.codes.len(), 400);
    assert!(merged_store.items == single_store.items, "records differ");
    assert!(
        merged_store.extractor == single_store.extractor,
        "extractors differ"
    );
    assert!(
        merged_store.features == single_store.features,
        "features differ"
    );
    assert!(merged_store.model == single_store.model, "models differ");
    assert!(merged_store.codes == single_store.codes, "codes differ");

    // A plain scan of the folder afterwards finds the merged store complete.
    let scan = json(&ok(temp, &["scan", path(&photos), "--json"]));
    assert_eq!(scan["unchanged"], 400, "{scan}");
    assert_eq!(scan["features"]["encoded"], 0, "{scan}");
    assert_eq!(scan["coded"], 0, "{scan}");
}

fn refused(temp: &Path, args: &[&str]) -> String {
    let output = tagweave(temp, args);
    assert_eq!(
        output.status.code(),
        Some(1),
        "tagweave {args:?} should have failed:\n{}",
        stdout_of(&output)
    );
    stderr_of(&output)
}

#[test]
fn bad_part_files_are_refused_whole_by_name() {
    let temp = tempfile::tempdir().unwrap();
    let temp = temp.path();
    let photos = temp.join("photos");
    copy_demo_to(&photos);
    let (extractor, features) = describe_parts(temp, &photos, 2);
    let store = photos.join(".tagweave");

    // the second file cut short: neither is merged, nor the extractor stored
    let bytes = std::fs::read(&features[1]).unwrap();
    let cut = temp.join("cut.parquet");
    std::fs::write(&cut, &bytes[..bytes.len() / 2]).unwrap();
    let message = refused(
        temp,
        &[
            "shard",
            "merge",
            path(&photos),
            "--extractor",
            path(&extractor),
            path(&features[0]),
            path(&cut),
        ],
    );
    assert!(
        message.contains("cut.parquet") && message.contains("cut short"),
        "{message}"
    );
    let (_scratch, opened) = try_open_store_copy(&photos);
    if let Ok(opened) = opened {
        assert_eq!(opened.item_count().unwrap(), 0, "nothing half-merged");
        assert_eq!(opened.blob_bytes(EXTRACTOR_BLOB).unwrap(), None);
    }

    // features without the extractor they were made with, into a store that has none
    let message = refused(temp, &["shard", "merge", path(&photos), path(&features[0])]);
    assert!(
        message.contains("features-1.parquet") && message.contains("--extractor"),
        "{message}"
    );

    // a part described with another extractor (another seed) than the store's
    merge(temp, &photos, &features, &["--extractor", path(&extractor)]);
    let other = temp.join("other.json");
    ok(
        temp,
        &[
            "shard",
            "learn",
            path(&photos),
            "--out",
            path(&other),
            "--seed",
            "8",
        ],
    );
    let foreign = temp.join("foreign.parquet");
    ok(
        temp,
        &[
            "shard",
            "describe",
            path(&photos),
            "--extractor",
            path(&other),
            "--part",
            "1/2",
            "--out",
            path(&foreign),
        ],
    );
    let message = refused(temp, &["shard", "merge", path(&photos), path(&foreign)]);
    assert!(
        message.contains("foreign.parquet") && message.contains("another feature extractor"),
        "{message}"
    );

    // codes before any training
    let message = refused(
        temp,
        &[
            "shard",
            "model",
            "--store",
            path(&store),
            "--out",
            path(&temp.join("m.json")),
        ],
    );
    assert!(message.contains("tagweave train"), "{message}");

    // not a part, and a file that is no Parquet at all
    let message = refused(
        temp,
        &[
            "shard",
            "describe",
            path(&photos),
            "--extractor",
            path(&extractor),
            "--part",
            "3/2",
            "--out",
            path(&temp.join("x.parquet")),
        ],
    );
    assert!(message.contains("`3/2` is not a part"), "{message}");
    let message = refused(temp, &["shard", "merge", path(&photos), path(&extractor)]);
    assert!(message.contains("extractor.json"), "{message}");
}

// ---- On a real Dask cluster: a scheduler and two worker processes on 127.0.0.1 ----

/// The Python with Dask distributed that `.ci/run` installs (`TAGWEAVE_CLUSTER_PYTHON`), or
/// `None` with the reason printed.
fn cluster_python() -> Option<PathBuf> {
    let Some(python) = std::env::var_os("TAGWEAVE_CLUSTER_PYTHON").map(PathBuf::from) else {
        eprintln!(
            "skipped: TAGWEAVE_CLUSTER_PYTHON is not set (.ci/run installs Dask and sets it)"
        );
        return None;
    };
    let probe = std::process::Command::new(&python)
        .args(["-c", "import distributed"])
        .output();
    match probe {
        Ok(output) if output.status.success() => Some(python),
        _ => {
            eprintln!("skipped: {} cannot import distributed", python.display());
            None
        }
    }
}

/// Child processes killed (SIGKILL) and reaped when dropped, whatever the test did.
struct Processes(Vec<std::process::Child>);

impl Drop for Processes {
    fn drop(&mut self) {
        for child in &mut self.0 {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

#[test]
fn a_dask_cluster_with_a_worker_killed_mid_run_makes_the_same_store() {
    use std::process::{Command, Stdio};
    use std::time::{Duration, Instant};

    let Some(python) = cluster_python() else {
        return;
    };
    let dask = python.with_file_name("dask");
    let temp = tempfile::tempdir().unwrap();
    let temp = temp.path();
    let (photos, single) = demo_with_single_store(temp);
    let work = temp.join("work");
    std::fs::create_dir(&work).unwrap();

    let address = format!("tcp://127.0.0.1:{}", free_port());
    let port = address.rsplit(':').next().unwrap().to_string();
    let quiet = |command: &mut Command| {
        command.stdout(Stdio::null()).stderr(Stdio::null());
    };
    let mut scheduler = Command::new(&dask);
    scheduler.args([
        "scheduler",
        "--host",
        "127.0.0.1",
        "--port",
        &port,
        "--no-dashboard",
    ]);
    quiet(&mut scheduler);
    let mut cluster = Processes(vec![scheduler.spawn().unwrap()]);
    for _ in 0..2 {
        let mut worker = Command::new(&dask);
        worker
            .args([
                "worker",
                &address,
                "--nthreads",
                "1",
                "--no-nanny",
                "--host",
                "127.0.0.1",
            ])
            .args(["--no-dashboard"])
            .env("RAYON_NUM_THREADS", "1");
        quiet(&mut worker);
        cluster.0.push(worker.spawn().unwrap());
    }
    let driver_script = repo_root().join("tools/cluster/tagweave_cluster.py");
    let mut driver = Command::new(&python);
    driver
        .arg(&driver_script)
        .arg(&photos)
        .args([
            "--work",
            path(&work),
            "--parts",
            "2",
            "--scheduler",
            &address,
        ])
        .args([
            "--workers",
            "2",
            "--train",
            "--tagweave",
            env!("CARGO_BIN_EXE_tagweave"),
        ])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    let started = Instant::now();
    let driver = driver.spawn().unwrap();
    let mut driver = Processes(vec![driver]);

    // Both workers describe a part at once; as soon as one part file is being written,
    // the first worker dies without a word.
    let deadline = started + Duration::from_secs(240);
    let mut killed = false;
    loop {
        if let Some(status) = driver.0[0].try_wait().unwrap() {
            assert!(
                killed,
                "the run ended ({status}) before a worker could be killed"
            );
            break;
        }
        assert!(Instant::now() < deadline, "the cluster run took over 240 s");
        if !killed {
            let writing = std::fs::read_dir(&work).unwrap().any(|entry| {
                let name = entry.unwrap().file_name();
                let name = name.to_string_lossy();
                name.starts_with(".features-") && name.ends_with(".partial")
            });
            if writing {
                cluster.0[1].kill().unwrap();
                cluster.0[1].wait().unwrap();
                killed = true;
                eprintln!(
                    "killed a worker {:.1} s into the run",
                    started.elapsed().as_secs_f64()
                );
            }
        }
        std::thread::sleep(Duration::from_millis(5));
    }
    let child = driver.0.remove(0);
    let output = child.wait_with_output().unwrap();
    assert!(
        output.status.success(),
        "the driver failed:\n{}\n{}",
        stdout_of(&output),
        stderr_of(&output)
    );
    eprintln!(
        "cluster run: {:.1} s\n{}",
        started.elapsed().as_secs_f64(),
        stderr_of(&output)
    );
    let report: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let described: u64 = report["describe"]
        .as_array()
        .unwrap()
        .iter()
        .map(|part| part["described"].as_u64().unwrap())
        .sum();
    assert_eq!(described, 400);
    drop(cluster);

    let single_store = snapshot(&single);
    let merged_store = snapshot(&photos.join(".tagweave"));
    assert_eq!(merged_store.codes.len(), 400);
    assert!(merged_store.items == single_store.items, "records differ");
    assert!(
        merged_store.features == single_store.features,
        "features differ"
    );
    assert!(merged_store.model == single_store.model, "models differ");
    assert!(merged_store.codes == single_store.codes, "codes differ");
}
