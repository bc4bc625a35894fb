use super::*;
use tagweave_collection::{FileStamp, ImageFormat};

fn item(rel_path: &str, tags: &[&str]) -> ItemRecord {
    ItemRecord {
        id: tagweave_collection::item_id(rel_path),
        rel_path: rel_path.to_string(),
        format: ImageFormat::Png,
        stamp: FileStamp {
            size: 10,
            mtime_ns: 1,
        },
        content_hash: "00".into(),
        sidecars: vec![],
        tags: tags.iter().map(|t| t.to_string()).collect(),
        accepted: Vec::new(),
    }
}

fn collection() -> (tempfile::TempDir, PathBuf) {
    let temp = tempfile::tempdir().unwrap();
    let dir = temp.path().join(DEFAULT_DIR_NAME);
    (temp, dir)
}

#[test]
fn items_survive_reopening_and_removal_drops_vectors() {
    let (temp, dir) = collection();
    {
        let store = Store::open_or_create(&dir, temp.path()).unwrap();
        let a = item("a.png", &["harbour", "night"]);
        let b = item("sub/b.png", &["harbour"]);
        store.update_items(&[a.clone(), b.clone()], &[]).unwrap();
        store
            .put_vectors("features", &[(a.id.clone(), vec![1.0, -2.5])])
            .unwrap();
        assert_eq!(store.item(&a.id).unwrap(), Some(a));
    }
    let store = Store::open(&dir).unwrap();
    assert_eq!(store.item_count().unwrap(), 2);
    let a_id = tagweave_collection::item_id("a.png");
    assert_eq!(
        store.vector("features", &a_id).unwrap(),
        Some(vec![1.0, -2.5])
    );
    let vocabulary = store.vocabulary().unwrap();
    assert_eq!(vocabulary.entries()[0], ("harbour".to_string(), 2));
    store
        .update_items(&[], std::slice::from_ref(&a_id))
        .unwrap();
    assert_eq!(store.item_count().unwrap(), 1);
    assert_eq!(store.vector("features", &a_id).unwrap(), None);
}

#[test]
fn default_location_follows_the_collection_when_it_moves() {
    let (temp, dir) = collection();
    drop(Store::open_or_create(&dir, temp.path()).unwrap());
    let moved = temp.path().with_extension("moved");
    std::fs::rename(temp.path(), &moved).unwrap();
    let store = Store::open(&moved.join(DEFAULT_DIR_NAME)).unwrap();
    assert_eq!(store.collection_root(), moved.canonicalize().unwrap());
    drop(store);
    std::fs::rename(&moved, temp.path()).unwrap();
}

#[test]
fn a_second_opener_is_told_the_store_is_in_use_with_the_pid() {
    let (temp, dir) = collection();
    let _first = Store::open_or_create(&dir, temp.path()).unwrap();
    match Store::open(&dir) {
        Err(StoreError::InUse { pid, .. }) => assert_eq!(pid, Some(std::process::id())),
        Err(other) => panic!("expected in-use error, got {other}"),
        Ok(_) => panic!("expected in-use error, got a second store"),
    }
}

#[test]
fn a_patient_opener_waits_for_a_brief_holder_and_no_longer() {
    let (temp, dir) = collection();
    drop(Store::open_or_create(&dir, temp.path()).unwrap());
    let patience = std::time::Duration::from_secs(20);
    // A holder that keeps the store (a scan) is reported at once, however patient the asker.
    let keeping = Store::open(&dir).unwrap();
    let started = std::time::Instant::now();
    let refused = Store::open_patiently(&dir, patience);
    assert!(matches!(refused, Err(StoreError::InUse { .. })));
    assert!(started.elapsed() < std::time::Duration::from_secs(5));
    // The page's brief hold waits for it, though, and is itself waited for.
    let release = std::thread::spawn(move || {
        std::thread::sleep(std::time::Duration::from_millis(300));
        drop(keeping);
    });
    let brief = Store::open_briefly(&dir, patience).unwrap();
    release.join().unwrap();
    let short = Store::open_patiently(&dir, std::time::Duration::from_millis(100));
    assert!(matches!(short, Err(StoreError::InUse { .. })));
    let release = std::thread::spawn(move || {
        std::thread::sleep(std::time::Duration::from_millis(300));
        drop(brief);
    });
    let waited = Store::open_patiently(&dir, patience);
    release.join().unwrap();
    assert!(waited.is_ok(), "{:?}", waited.err());
}

#[test]
fn another_format_version_asks_for_a_rebuild() {
    let (temp, dir) = collection();
    {
        let store = Store::open_or_create(&dir, temp.path()).unwrap();
        store
            .db()
            .unwrap()
            .meta
            .insert(META_FORMAT, &0u32.to_be_bytes())
            .unwrap();
        store.flush().unwrap();
    }
    // As a store made before the facts file was kept, or whose facts say another format:
    // the database decides.
    std::fs::write(facts::path_in(&dir), facts::encode(0, "..")).unwrap();
    let message = match Store::open(&dir) {
        Err(error @ StoreError::FormatMismatch { .. }) => error.to_string(),
        Err(other) => panic!("expected a format mismatch, got {other}"),
        Ok(_) => panic!("expected a format mismatch"),
    };
    assert!(message.contains("--rebuild"), "{message}");
}

#[test]
fn locate_finds_the_nearest_store_above() {
    let (temp, dir) = collection();
    drop(Store::open_or_create(&dir, temp.path()).unwrap());
    let deep = temp.path().join("a/b/c");
    std::fs::create_dir_all(&deep).unwrap();
    assert_eq!(Store::locate(&deep), Some(dir.clone()));
    let elsewhere = tempfile::tempdir().unwrap();
    assert_eq!(Store::locate(elsewhere.path()), None);
}

#[test]
fn opening_a_missing_store_says_how_to_make_one() {
    let (_temp, dir) = collection();
    let error = Store::open(&dir).err().expect("no store there");
    assert!(error.to_string().contains("tagweave scan"), "{error}");
}

#[test]
fn remove_refuses_folders_that_are_not_stores() {
    let temp = tempfile::tempdir().unwrap();
    std::fs::write(temp.path().join("precious.txt"), "keep").unwrap();
    assert!(Store::remove(temp.path()).is_err());
    assert!(temp.path().join("precious.txt").exists());
}

#[test]
fn blobs_round_trip_and_clear() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    store.put_blob("dictionary", &vec![1u8, 2, 3]).unwrap();
    assert_eq!(
        store.blob::<Vec<u8>>("dictionary").unwrap(),
        Some(vec![1, 2, 3])
    );
    store.remove_blob("dictionary").unwrap();
    assert_eq!(store.blob::<Vec<u8>>("dictionary").unwrap(), None);
    store
        .put_vectors("features", &[("x".into(), vec![0.5])])
        .unwrap();
    store.clear_vectors("features").unwrap();
    assert_eq!(store.vector("features", "x").unwrap(), None);
}

#[test]
fn vectors_of_a_picture_whose_bytes_changed_are_dropped() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let mut a = item("a.png", &["x"]);
    let b = item("b.png", &["y"]);
    store.update_items(&[a.clone(), b.clone()], &[]).unwrap();
    store
        .put_vectors(
            "features",
            &[(a.id.clone(), vec![1.0]), (b.id.clone(), vec![2.0])],
        )
        .unwrap();
    a.tags.push("z".into());
    store.update_items(&[a.clone(), b.clone()], &[]).unwrap();
    assert_eq!(
        store.vector("features", &a.id).unwrap(),
        Some(vec![1.0]),
        "same bytes keep features"
    );
    a.content_hash = "11".into();
    store.update_items(&[a.clone()], &[]).unwrap();
    assert_eq!(store.vector("features", &a.id).unwrap(), None);
    assert_eq!(store.vector("features", &b.id).unwrap(), Some(vec![2.0]));
}

#[test]
fn a_creation_cut_short_before_its_first_flush_is_finished_not_refused() {
    // As a process killed right after sled made its files leaves it: a database with the
    // store's trees but no format version (found by SIGKILLing `tagweave scan` early).
    let (temp, dir) = collection();
    std::fs::create_dir_all(&dir).unwrap();
    {
        let db = sled::open(dir.join("db")).unwrap();
        for tree in ["meta", "items", "blobs", "vectors"] {
            db.open_tree(tree).unwrap();
        }
        db.flush().unwrap();
    }
    let error = Store::open(&dir).err().expect("nothing to read yet");
    assert!(
        matches!(error, StoreError::NotAStore { .. }),
        "told to scan, not to rebuild an unknown format: {error}"
    );
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    store.update_items(&[item("a.png", &["x"])], &[]).unwrap();
    drop(store);
    assert_eq!(Store::open(&dir).unwrap().item_count().unwrap(), 1);
}

#[test]
fn a_store_without_a_version_but_with_data_is_still_refused() {
    let (temp, dir) = collection();
    {
        let store = Store::open_or_create(&dir, temp.path()).unwrap();
        store.update_items(&[item("a.png", &["x"])], &[]).unwrap();
        store.db().unwrap().meta.remove(META_FORMAT).unwrap();
        store.flush().unwrap();
    }
    std::fs::remove_file(facts::path_in(&dir)).unwrap();
    for result in [
        Store::open(&dir).map(drop),
        Store::open_or_create(&dir, temp.path()).map(drop),
    ] {
        assert!(
            matches!(result, Err(StoreError::FormatMismatch { found: None, .. })),
            "{:?}",
            result.err()
        );
    }
}

#[test]
fn a_holder_that_has_not_written_its_pid_yet_is_still_named() {
    // Two scans started together: the loser may look before the winner wrote its PID.
    use std::io::Write;
    let (_temp, dir) = collection();
    std::fs::create_dir_all(&dir).unwrap();
    let holder = std::fs::OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(true)
        .open(dir.join("lock"))
        .unwrap();
    holder.try_lock().unwrap();
    let mut late = holder.try_clone().unwrap();
    let writer = std::thread::spawn(move || {
        std::thread::sleep(std::time::Duration::from_millis(20));
        write!(late, "4242").unwrap();
    });
    match StoreLock::acquire(&dir) {
        Err(StoreError::InUse { pid, .. }) => assert_eq!(pid, Some(4242)),
        Err(other) => panic!("expected in-use, got {other}"),
        Ok(_) => panic!("a held lock was taken twice"),
    }
    writer.join().unwrap();
}

/// A model type of the caller's, as far as the store is concerned.
#[derive(serde::Serialize, serde::Deserialize, Debug, PartialEq, Clone)]
struct Model {
    format: u32,
    weights: Vec<f32>,
}

#[test]
fn the_model_is_read_only_in_the_format_asked_for() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let format_of = |m: &Model| m.format;
    assert!(
        store.model(2, format_of).unwrap().is_none(),
        "before training"
    );
    let model = Model {
        format: 2,
        weights: vec![0.5, -1.0],
    };
    store.put_blob(MODEL_BLOB, &model).unwrap();
    assert_eq!(
        store.model(2, format_of).unwrap(),
        Some(model.clone()),
        "JSON"
    );
    store.put_model(&model).unwrap();
    assert!(store
        .blob_bytes(MODEL_BLOB)
        .unwrap()
        .unwrap()
        .starts_with(BINARY_MODEL));
    assert_eq!(store.model(2, format_of).unwrap(), Some(model), "binary");
    // in binary, of another format: "train again"
    store
        .put_model(&Model {
            format: 5,
            weights: vec![1.0],
        })
        .unwrap();
    assert!(matches!(
        store.model(2, format_of),
        Err(StoreError::ModelFormat {
            found: 5,
            expected: 2
        })
    ));
    // binary that does not decode, of the asked format: damage
    let mut garbled = BINARY_MODEL.to_vec();
    garbled.extend_from_slice(&[2, 0xff]);
    store.put_blob_bytes(MODEL_BLOB, &garbled).unwrap();
    assert!(matches!(
        store.model(2, format_of),
        Err(StoreError::Corrupt { .. })
    ));
    // readable but of another format, or of another shape with another format number:
    // "train again", not damage
    for (blob, found) in [
        (serde_json::json!({"format": 1, "weights": [0.5]}), 1),
        (serde_json::json!({"format": 3, "layers": 4}), 3),
    ] {
        store.put_blob(MODEL_BLOB, &blob).unwrap();
        match store.model(2, format_of) {
            Err(StoreError::ModelFormat {
                found: f,
                expected: 2,
            }) => assert_eq!(f, found),
            other => panic!("expected a format mismatch, got {other:?}"),
        }
    }
    // of the right format number but the wrong shape: damage
    store
        .put_blob(MODEL_BLOB, &serde_json::json!({"format": 2, "layers": 4}))
        .unwrap();
    assert!(matches!(
        store.model(2, format_of),
        Err(StoreError::Corrupt { .. })
    ));
}

#[test]
fn blob_bytes_come_back_exactly_as_put() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    assert_eq!(store.blob_bytes(MODEL_BLOB).unwrap(), None);
    // Not what serde_json would write for the value (spaces, a long float): kept as given.
    let bytes = br#"{ "format": 2, "weights": [0.50000000000000001, -1.0] }"#;
    store.put_blob_bytes(MODEL_BLOB, bytes).unwrap();
    assert_eq!(
        store.blob_bytes(MODEL_BLOB).unwrap().as_deref(),
        Some(&bytes[..])
    );
    let model: Model = store.blob(MODEL_BLOB).unwrap().unwrap();
    assert_eq!(model.weights, vec![0.5, -1.0]);
    // and put_blob's bytes are serde_json's
    store.put_blob(MODEL_BLOB, &model).unwrap();
    assert_eq!(
        store.blob_bytes(MODEL_BLOB).unwrap(),
        Some(serde_json::to_vec(&model).unwrap())
    );
}

#[test]
fn as_stored_is_what_the_store_gives_back() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let features: Vec<f32> = (0..70).map(|i| (i as f32 * 0.37).sin()).collect();
    let code: Vec<f32> = (0..16).map(|i| i as f32 / 15.0).collect();
    store
        .put_vectors(FEATURES, &[("a".into(), features.clone())])
        .unwrap();
    store
        .put_vectors(CODES, &[("a".into(), code.clone())])
        .unwrap();
    assert_eq!(
        store.vector(FEATURES, "a").unwrap().unwrap(),
        as_stored(FEATURES, &features)
    );
    assert_eq!(
        store.vector(CODES, "a").unwrap().unwrap(),
        as_stored(CODES, &code)
    );
    let held = store.vector_reader(FEATURES).unwrap();
    assert!(held.holds("a", &features).unwrap());
    assert!(held.holds("a", &as_stored(FEATURES, &features)).unwrap());
    let mut other = features.clone();
    other[3] += 0.5;
    assert!(!held.holds("a", &other).unwrap());
    assert!(!held.holds("b", &features).unwrap());
}

fn features_of(store: &Store, ids: &[&str]) -> Vec<Option<Vec<f32>>> {
    ids.iter()
        .map(|id| store.vector("features", id).unwrap())
        .collect()
}

#[test]
fn compaction_keeps_every_live_vector_and_drops_the_garbage() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let a = item("a.png", &[]);
    let b = item("b.png", &[]);
    store.update_items(&[a.clone(), b.clone()], &[]).unwrap();
    // Whole numbers, the same in a block, read back exactly from 8-bit blocks.
    for round in 0..5 {
        let value = round as f32;
        store
            .put_vectors(
                "features",
                &[
                    (a.id.clone(), vec![value; 40]),
                    (b.id.clone(), vec![-value; 40]),
                ],
            )
            .unwrap();
    }
    store
        .update_items(&[], std::slice::from_ref(&b.id))
        .unwrap();
    let before = features_of(&store, &[&a.id, &b.id]);
    let files = store.vector_files("features").unwrap();
    let on_disk = files.bytes_on_disk().unwrap();
    let live = files
        .compact(&store.vector_tree("features").unwrap())
        .unwrap();
    assert_eq!(
        live,
        store.live_bytes("features").unwrap(),
        "the count kept tracks"
    );
    assert!(live * 5 <= on_disk, "{live} live of {on_disk}");
    assert_eq!(
        files.bytes_on_disk().unwrap(),
        live,
        "only live bytes remain"
    );
    assert_eq!(features_of(&store, &[&a.id, &b.id]), before);
    assert_eq!(before[0].as_ref().map(|v| v[0]), Some(4.0));
    assert_eq!(before[1], None);
    assert_eq!(files.generations().unwrap(), [1], "older files deleted");
}

#[test]
fn bytes_a_crash_left_unreferenced_are_ignored_and_a_half_done_compaction_finishes() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    store
        .put_vectors("features", &[("a".into(), vec![1.0; 8])])
        .unwrap();
    let files = store.vector_files("features").unwrap();
    // A crash in the middle of an append: bytes on the file, none in the index.
    {
        let mut file = std::fs::OpenOptions::new()
            .append(true)
            .open(files.path_of(0))
            .unwrap();
        std::io::Write::write_all(&mut file, &[0xAB; 13]).unwrap();
    }
    store
        .put_vectors("features", &[("b".into(), vec![2.0; 8])])
        .unwrap();
    // A crash part-way through a compaction: a newer file holding a copy of `a`, the index
    // moved for `a` only.
    let tree = store.vector_tree("features").unwrap();
    let reader = store.vector_reader("features").unwrap();
    let copy = reader.get_packed("a").unwrap().unwrap();
    let moved = files.append_to(1, [copy.bytes()]).unwrap();
    tree.insert("a", &moved[0].to_bytes()).unwrap();
    assert_eq!(files.generations().unwrap(), [0, 1]);
    // Appends go to the newest file; every entry reads whole.
    store
        .put_vectors("features", &[("c".into(), vec![3.0; 8])])
        .unwrap();
    let expect = vec![Some(vec![1.0; 8]), Some(vec![2.0; 8]), Some(vec![3.0; 8])];
    assert_eq!(features_of(&store, &["a", "b", "c"]), expect);
    assert_eq!(reader.get("b").unwrap(), Some(vec![2.0; 8]));
    files.compact(&tree).unwrap();
    assert_eq!(files.generations().unwrap(), [2]);
    assert_eq!(features_of(&store, &["a", "b", "c"]), expect);
    assert_eq!(
        reader.get("c").unwrap(),
        Some(vec![3.0; 8]),
        "a reader made before the compaction follows it"
    );
}

#[test]
fn a_missing_vector_file_is_named_as_damage_to_rebuild() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    store
        .put_vectors("features", &[("a".into(), vec![1.0; 8])])
        .unwrap();
    std::fs::remove_file(store.vector_files("features").unwrap().path_of(0)).unwrap();
    let error = store.vector("features", "a").unwrap_err();
    assert!(matches!(error, StoreError::Corrupt { .. }), "{error}");
    assert!(error.to_string().contains("--rebuild"), "{error}");
}

#[test]
fn readers_beside_a_writer_never_see_a_half_written_vector() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    store
        .put_vectors("code", &[("x".into(), vec![0.0; 64])])
        .unwrap();
    let rounds = 60;
    std::thread::scope(|scope| {
        scope.spawn(|| {
            for round in 1..=rounds {
                // Codes are kept as one byte a value: 1/255 steps read back exactly.
                let value = round as f32 / 255.0;
                store
                    .put_vectors("code", &[("x".into(), vec![value; 64])])
                    .unwrap();
            }
        });
        for _ in 0..2 {
            scope.spawn(|| {
                let reader = store.vector_reader("code").unwrap();
                for _ in 0..rounds * 4 {
                    let values = reader.get("x").unwrap().unwrap();
                    assert_eq!(values.len(), 64);
                    assert!(values.iter().all(|&v| v == values[0]), "{values:?}");
                }
            });
        }
    });
    assert_eq!(
        store.vector("code", "x").unwrap(),
        Some(vec![rounds as f32 / 255.0; 64])
    );
}

#[test]
fn the_item_list_is_written_by_a_reader_and_never_outlives_a_change() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let mut a = item("a.png", &["harbour"]);
    let b = item("b.png", &["night"]);
    store.update_items(&[a.clone(), b.clone()], &[]).unwrap();
    let list = item_list::path_in(&dir);
    assert!(!list.exists(), "written by readers only");
    let from_database = store.items().unwrap();
    assert!(list.exists());
    assert_eq!(
        store.items().unwrap(),
        from_database,
        "the list reads the same"
    );
    assert_eq!(item_list::count(&list), Some(2));
    assert_eq!(store.item_count().unwrap(), 2);

    a.tags.push("boats".into());
    store.update_items(std::slice::from_ref(&a), &[]).unwrap();
    assert!(!list.exists(), "a change deletes the list first");
    let changed = store.items().unwrap();
    assert!(changed.contains(&a) && changed.contains(&b));
    drop(store);

    // A list cut short (a crash while writing it, before the rename) is ignored.
    let bytes = std::fs::read(&list).unwrap();
    std::fs::write(&list, &bytes[..bytes.len() - 3]).unwrap();
    let store = Store::open(&dir).unwrap();
    assert_eq!(store.items().unwrap(), changed);
    assert_eq!(
        std::fs::read(&list).unwrap(),
        bytes,
        "and written whole again"
    );
    // A list whose record does not decode is read past: the database answers.
    let mut garbled = bytes.clone();
    let first_record = 40 + 4; // after the header and the record's length
    garbled[first_record] = b'}';
    std::fs::write(&list, &garbled).unwrap();
    assert_eq!(store.items().unwrap(), changed);
    assert_eq!(std::fs::read(&list).unwrap(), bytes);
}

#[test]
fn held_vectors_read_as_taken_after_compaction_clearing_and_closing() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    store
        .put_vectors(
            "features",
            &[("a".into(), vec![1.0; 8]), ("b".into(), vec![2.0; 8])],
        )
        .unwrap();
    let reader = store.vector_reader("features").unwrap();
    let held = reader.hold(&["b", "none", "a"]).unwrap();
    assert!(held.has(0) && !held.has(1) && held.has(2));
    // Overwritten, compacted, then cleared and written anew: the held ones do not change.
    store
        .put_vectors("features", &[("a".into(), vec![5.0; 8])])
        .unwrap();
    let files = store.vector_files("features").unwrap();
    files
        .compact(&store.vector_tree("features").unwrap())
        .unwrap();
    store.clear_vectors("features").unwrap();
    store
        .put_vectors("features", &[("a".into(), vec![7.0; 8])])
        .unwrap();
    assert_eq!(
        files.generations().unwrap(),
        [2],
        "generations are never reused"
    );
    drop(reader);
    drop(store);
    assert_eq!(held.get(0, "b").unwrap(), Some(vec![2.0; 8]));
    assert_eq!(held.get(1, "none").unwrap(), None);
    assert_eq!(held.get(2, "a").unwrap(), Some(vec![1.0; 8]));
}

#[test]
fn items_come_by_id_or_by_path_from_the_database_and_from_the_list() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let paths = ["e.png", "a/b.png", "c.png", "sub/d.png", "b.png", "z/y.png"];
    let records: Vec<ItemRecord> = paths.iter().map(|p| item(p, &["x"])).collect();
    store.update_items(&records, &[]).unwrap();
    let mut by_id = records.clone();
    by_id.sort_by(|a, b| a.id.cmp(&b.id));
    let mut by_path = records;
    by_path.sort_by(|a, b| a.rel_path.cmp(&b.rel_path));
    assert_ne!(by_id, by_path, "the two orders differ for these paths");
    let list = item_list::path_in(&dir);
    assert!(!list.exists());
    assert_eq!(store.items_by_path().unwrap(), by_path, "from the database");
    assert!(list.exists());
    assert_eq!(store.items_by_path().unwrap(), by_path, "from the list");
    assert_eq!(store.items().unwrap(), by_id, "from the list");
    std::fs::remove_file(&list).unwrap();
    assert_eq!(store.items().unwrap(), by_id, "from the database");
}

#[test]
fn items_read_one_at_a_time_answer_as_items_held() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let paths = [
        "e.png",
        "a/b.png",
        "c.png",
        "sub/d.png",
        "b.png",
        "z/y.png",
        "ä/ö.png",
    ];
    let records: Vec<ItemRecord> = paths
        .iter()
        .enumerate()
        .map(|(i, p)| item(p, if i % 3 == 0 { &[] } else { &["x"] }))
        .collect();
    store.update_items(&records, &[]).unwrap();
    let held = store.items_to_ask().unwrap();
    assert!(
        held.loaded().is_some(),
        "no list yet: all read from the database"
    );
    let listed = store.items_to_ask().unwrap();
    assert!(
        listed.loaded().is_none(),
        "the list written: read when asked"
    );
    assert_eq!(listed.len(), paths.len());
    let all = held.all().unwrap();
    for (row, item) in all.iter().enumerate() {
        assert_eq!(listed.get(row).unwrap().as_ref(), item);
        assert_eq!(listed.row_of_rel_path(&item.rel_path).unwrap(), Some(row));
        assert_eq!(held.row_of_rel_path(&item.rel_path).unwrap(), Some(row));
        assert_eq!(listed.is_tagged(row).unwrap(), !item.tags.is_empty());
    }
    for missing in ["", "a", "d.png", "zz.png"] {
        assert_eq!(listed.row_of_rel_path(missing).unwrap(), None, "{missing}");
    }
    // Ids asked in ascending order (a code index's), in another order, and unknown ones.
    let mut ids: Vec<String> = all.iter().map(|i| i.id.clone()).collect();
    ids.push("unknown".into());
    ids.sort();
    let expected = |ids: &[String]| -> Vec<Option<usize>> {
        ids.iter()
            .map(|id| all.iter().position(|i| &i.id == id))
            .collect()
    };
    for order in [ids.clone(), ids.iter().rev().cloned().collect()] {
        let asked = || order.iter().map(String::as_str);
        assert_eq!(listed.rows_of_ids(asked()).unwrap(), expected(&order));
        assert_eq!(held.rows_of_ids(asked()).unwrap(), expected(&order));
    }
    assert_eq!(listed.tagged_rows().unwrap(), held.tagged_rows().unwrap());
    assert_eq!(listed.all().unwrap(), all);
}

/// A store with items, vectors and a blob, and what it should read back.
fn store_with_some_of_everything(dir: &Path, root: &Path) -> (Store, Vec<ItemRecord>) {
    let store = Store::open_or_create(dir, root).unwrap();
    let records: Vec<ItemRecord> = (0..300)
        .map(|i| item(&format!("p{i:03}.png"), &["harbour"]))
        .collect();
    store.update_items(&records, &[]).unwrap();
    let features: Vec<(String, Vec<f32>)> = records
        .iter()
        .enumerate()
        .map(|(i, r)| (r.id.clone(), vec![i as f32; 16]))
        .collect();
    store.put_vectors("features", &features).unwrap();
    store.put_blob("notes", &vec!["kept".to_string()]).unwrap();
    (store, records)
}

fn reads_everything_back(store: &Store, records: &[ItemRecord]) {
    let items = store.items().unwrap();
    assert!(records.iter().all(|r| items.contains(r)));
    for (i, r) in records.iter().enumerate() {
        assert_eq!(
            store.vector("features", &r.id).unwrap(),
            Some(vec![i as f32; 16])
        );
    }
    assert_eq!(
        store.blob::<Vec<String>>("notes").unwrap(),
        Some(vec!["kept".to_string()])
    );
    store.check_format().unwrap();
}

#[test]
fn a_compacted_database_keeps_every_entry_and_stays_writable() {
    let (temp, dir) = collection();
    let (mut store, records) = store_with_some_of_everything(&dir, temp.path());
    assert!(
        !store.compact_if_grown().unwrap(),
        "a small database is left as it is"
    );
    store.compact_database().unwrap();
    assert!(!dir.join(COMPACT_DIR).exists() && !dir.join(OLD_DIR).exists());
    reads_everything_back(&store, &records);
    let more = item("later.png", &[]);
    store
        .update_items(std::slice::from_ref(&more), &[])
        .unwrap();
    drop(store);
    let store = Store::open(&dir).unwrap();
    reads_everything_back(&store, &records);
    let items = store.items().unwrap();
    assert!(items.contains(&more) && items.len() == records.len() + 1);
}

fn copy_folder(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            copy_folder(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), &target).unwrap();
        }
    }
}

#[test]
fn a_compaction_cut_short_is_undone_or_finished_at_the_next_open() {
    let (temp, dir) = collection();
    let (store, records) = store_with_some_of_everything(&dir, temp.path());
    drop(store);
    // Cut short while the copy was made: a partial copy beside the database goes.
    std::fs::create_dir_all(dir.join(COMPACT_DIR)).unwrap();
    std::fs::write(dir.join(COMPACT_DIR).join("db"), b"half").unwrap();
    let store = Store::open(&dir).unwrap();
    assert!(!dir.join(COMPACT_DIR).exists());
    reads_everything_back(&store, &records);
    drop(store);
    // Cut short between the two renames: the whole copy takes the database's place.
    copy_folder(&dir.join(DB_DIR), &dir.join(COMPACT_DIR));
    std::fs::rename(dir.join(DB_DIR), dir.join(OLD_DIR)).unwrap();
    assert_eq!(
        Store::locate(temp.path()),
        Some(dir.clone()),
        "still a store"
    );
    let store = Store::open(&dir).unwrap();
    assert!(!dir.join(COMPACT_DIR).exists() && !dir.join(OLD_DIR).exists());
    reads_everything_back(&store, &records);
    drop(store);
    // Cut short before the old database was deleted: it goes.
    copy_folder(&dir.join(DB_DIR), &dir.join(OLD_DIR));
    let store = Store::open(&dir).unwrap();
    assert!(!dir.join(OLD_DIR).exists());
    reads_everything_back(&store, &records);
}

#[test]
fn kept_answers_go_before_any_change_and_are_never_kept_after_one() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let kept = || store.kept_answers("familiar");
    let file = dir.join("answers-familiar.bin");
    let changes: [&dyn Fn(); 5] = [
        &|| store.update_items(&[item("a.png", &["x"])], &[]).unwrap(),
        &|| {
            store
                .put_vectors("features", &[("a".into(), vec![1.0; 4])])
                .unwrap()
        },
        &|| store.clear_vectors("features").unwrap(),
        &|| store.put_blob("model", &1u32).unwrap(),
        &|| store.remove_blob("model").unwrap(),
    ];
    for (i, change) in changes.iter().enumerate() {
        kept().keep(b"answers");
        assert_eq!(
            kept().read().as_deref(),
            Some(&b"answers"[..]),
            "change {i}"
        );
        let taken_before = kept();
        change();
        assert!(!file.exists(), "change {i} deletes them first");
        taken_before.keep(b"stale");
        assert!(
            !file.exists(),
            "change {i}: worked out before it, never kept"
        );
    }
    store.kept_answers_to_read("familiar").keep(b"from a page");
    assert!(
        !file.exists(),
        "a handle that outlives the store keeps nothing"
    );
}

#[test]
fn blobs_are_files_and_those_an_older_store_kept_in_the_database_still_read() {
    let (temp, dir) = collection();
    let store = Store::open_or_create(&dir, temp.path()).unwrap();
    let file = dir.join(BLOB_DIR).join("notes.bin");
    let blobs = &store.db().unwrap().blobs;
    blobs.insert("notes", &b"[\"old\"]"[..]).unwrap();
    assert_eq!(
        store.blob::<Vec<String>>("notes").unwrap(),
        Some(vec!["old".to_string()]),
        "kept in the database"
    );
    store.put_blob("notes", &vec!["new".to_string()]).unwrap();
    assert!(file.exists());
    assert_eq!(blobs.get("notes").unwrap(), None, "the older copy goes");
    drop(store);
    let store = Store::open(&dir).unwrap();
    assert_eq!(
        store.blob::<Vec<String>>("notes").unwrap(),
        Some(vec!["new".to_string()])
    );
    store.remove_blob("notes").unwrap();
    assert!(!file.exists());
    assert_eq!(store.blob::<Vec<String>>("notes").unwrap(), None);
}

#[test]
fn a_question_the_derived_files_answer_never_opens_the_database() {
    let (temp, dir) = collection();
    let (store, records) = store_with_some_of_everything(&dir, temp.path());
    let reader = store.vector_reader("features").unwrap();
    reader.keep_locations().unwrap();
    assert_eq!(store.items_to_ask().unwrap().len(), records.len());
    drop((reader, store));

    {
        let store = Store::open(&dir).unwrap();
        assert_eq!(store.collection_root(), temp.path().canonicalize().unwrap());
        let items = store.items_to_ask().unwrap();
        let reader = store.vector_reader("features").unwrap();
        for row in [0, 150, 299] {
            let item = items.get(row).unwrap();
            let i = records.iter().position(|r| r.id == item.id).unwrap();
            assert_eq!(reader.get(&item.id).unwrap(), Some(vec![i as f32; 16]));
        }
        assert_eq!(reader.get("no-such-id").unwrap(), None);
        assert_eq!(
            store.blob::<Vec<String>>("notes").unwrap(),
            Some(vec!["kept".to_string()])
        );
        assert!(store.database.if_open().is_none(), "sled was opened");
    }
    {
        // A change deletes the table first; the next reader asks the database.
        let store = Store::open(&dir).unwrap();
        let changed = vec![(records[0].id.clone(), vec![-1.0; 16])];
        store.put_vectors("features", &changed).unwrap();
        assert!(!location_table::path_in(&dir, "features").exists());
        let reader = store.vector_reader("features").unwrap();
        assert!(reader.table.is_none());
        assert_eq!(reader.get(&records[0].id).unwrap(), Some(vec![-1.0; 16]));
        reader.keep_locations().unwrap();
    }
    // Vector files changed by a program that does not know the table (bytes appended):
    // the table is not used.
    let store = Store::open(&dir).unwrap();
    let files = store.vector_files("features").unwrap();
    assert!(store.vector_reader("features").unwrap().table.is_some());
    files.append([[0u8; 4].as_slice()]).unwrap();
    let reader = store.vector_reader("features").unwrap();
    assert!(reader.table.is_none());
    assert_eq!(reader.get(&records[0].id).unwrap(), Some(vec![-1.0; 16]));
}
