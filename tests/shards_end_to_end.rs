//! `tagweave shard …` on the demo archive: parts described and coded apart, merged, make
//! the store a single `scan` + `train` of the same folder and seed make, bit for bit; bad
//! part files are refused whole, by name.

mod common;

use std::path::{Path, PathBuf};
use std::process::Output;

use common::*;
use tagweave_store::{CODES, EXTRACTOR_BLOB, FEATURES, MODEL_BLOB};

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
    let mut model: serde_json::Value =
        serde_json::from_slice(&store.blob_bytes(MODEL_BLOB).unwrap().expect("a model")).unwrap();
    model["history"]
        .as_object_mut()
        .expect("the model keeps its history")
        .remove("seconds");
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
    let model = temp.join("model.json");
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
        assert_eq!(opened.item_count(), 0, "nothing half-merged");
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
