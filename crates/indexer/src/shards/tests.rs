use super::*;
use crate::tests::{quick_options, small_collection};
use tagweave_collection::SkipReason;

#[test]
fn parts_are_k_of_n_and_every_path_lands_in_exactly_one() {
    assert_eq!("2/8".parse::<Part>().unwrap(), Part { number: 2, of: 8 });
    assert_eq!(
        " 1 / 1 ".parse::<Part>().unwrap(),
        Part { number: 1, of: 1 }
    );
    for bad in ["0/3", "4/3", "3", "a/b", "1/0", "-1/2", ""] {
        assert!(
            matches!(bad.parse::<Part>(), Err(IndexError::BadPart(_))),
            "{bad}"
        );
    }
    let mut counts = [0usize; 4];
    for i in 0..2000 {
        let path = format!("1970s/picture-{i:04}.jpg");
        let holders: Vec<u32> = (1..=4)
            .filter(|&k| Part { number: k, of: 4 }.holds(&path))
            .collect();
        assert_eq!(holders.len(), 1, "{path}");
        assert_eq!(
            holders[0],
            part_number(&path, 4),
            "the same answer every time"
        );
        counts[holders[0] as usize - 1] += 1;
    }
    // A hash spreads 2,000 names evenly: each part within 20 % of 500.
    assert!(
        counts.iter().all(|&c| (400..=600).contains(&c)),
        "{counts:?}"
    );
}

/// A collection of `count` demo pictures, its extractor file (quick options) and its
/// fingerprint.
fn learned(count: usize) -> (tempfile::TempDir, PathBuf, PathBuf) {
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path().join("photos");
    std::fs::create_dir(&root).unwrap();
    small_collection(&root, count);
    let (bytes, report) = learn_extractor(&root, &quick_options(), &|_| {}).unwrap();
    assert_eq!(report.pictures, count);
    assert_eq!(report.fingerprint, fingerprint(&bytes));
    let file = temp.path().join("extractor.json");
    std::fs::write(&file, bytes).unwrap();
    (temp, root, file)
}

#[test]
fn a_picture_gone_between_listing_and_describing_is_reported_and_the_rest_written() {
    let (temp, root, extractor_file) = learned(6);
    let (extractor, bytes) = read_learned::<FeatureExtractor>(&extractor_file, "x").unwrap();
    let all = Part { number: 1, of: 1 };
    let listed = list(&root, false).unwrap().candidates;
    assert_eq!(listed.len(), 6);
    std::fs::remove_file(&listed[2].path).unwrap();
    let out = temp.path().join("part.parquet");
    let report = describe_candidates(
        &root,
        &extractor,
        &fingerprint(&bytes),
        all,
        &listed,
        &out,
        &|_| {},
    )
    .unwrap();
    assert_eq!(report.described, 5);
    assert_eq!(report.skipped_files.len(), 1);
    assert_eq!(report.skipped_files[0].path, listed[2].path);
    assert!(matches!(
        report.skipped_files[0].reason,
        SkipReason::Vanished
    ));
    let (_, reader) = open_shard(&out, Some(FEATURES_KIND)).unwrap();
    let mut paths = Vec::new();
    reader
        .rows(2, &mut |rows| {
            for row in rows {
                paths.push(read_feature_row(&out, row).unwrap().0.rel_path);
            }
            Ok(())
        })
        .unwrap();
    let mut want: Vec<_> = listed.iter().map(|c| c.rel_path.clone()).collect();
    want.remove(2);
    assert_eq!(paths, want);
}

#[test]
fn a_damaged_or_foreign_file_is_refused_whole_and_a_second_merge_changes_nothing() {
    let (temp, root, extractor_file) = learned(5);
    let out = temp.path().join("part.parquet");
    let all = Part { number: 1, of: 1 };
    describe_part(&root, &extractor_file, all, false, &out, &|_| {}).unwrap();
    let bytes = std::fs::read(&out).unwrap();

    let store_dir = temp.path().join("store");
    let store = Store::open_or_create(&store_dir, &root).unwrap();
    let merge_one = |path: &Path| {
        merge(
            &store,
            &[path.to_path_buf()],
            Some(&extractor_file),
            &mut |_| {},
        )
    };

    // cut short: no footer
    let cut = temp.path().join("cut.parquet");
    std::fs::write(&cut, &bytes[..bytes.len() * 2 / 3]).unwrap();
    let error = merge_one(&cut).unwrap_err().to_string();
    assert!(
        error.contains("cut.parquet") && error.contains("cut short"),
        "{error}"
    );
    // one value changed inside, footer intact: the checksum finds it
    let flipped = temp.path().join("flipped.parquet");
    let mut changed = bytes.clone();
    let at = changed.len() / 2;
    changed[at] ^= 0x40;
    std::fs::write(&flipped, &changed).unwrap();
    let error = merge_one(&flipped).unwrap_err().to_string();
    assert!(error.contains("flipped.parquet"), "{error}");
    // nothing of either was written, not even the extractor
    assert_eq!(store.item_count().unwrap(), 0);
    assert_eq!(store.blob_bytes(EXTRACTOR_BLOB).unwrap(), None);

    let first = merge_one(&out).unwrap();
    assert_eq!((first.files[0].written, first.files[0].unchanged), (5, 0));
    assert!(first.extractor_stored);
    let second = merge_one(&out).unwrap();
    assert_eq!((second.files[0].written, second.files[0].unchanged), (0, 5));
    assert!(!second.extractor_stored);

    // described with an extractor learned with another seed: refused by name
    let other_options = ScanOptions {
        seed: 8,
        ..quick_options()
    };
    let (other_bytes, _) = learn_extractor(&root, &other_options, &|_| {}).unwrap();
    assert_ne!(
        fingerprint(&other_bytes),
        fingerprint(&std::fs::read(&extractor_file).unwrap())
    );
    let other_file = temp.path().join("other-extractor.json");
    std::fs::write(&other_file, other_bytes).unwrap();
    let foreign = temp.path().join("foreign.parquet");
    describe_part(&root, &other_file, all, false, &foreign, &|_| {}).unwrap();
    let before = store.vectors_of_kind(FEATURES).count();
    let error = merge(&store, std::slice::from_ref(&foreign), None, &mut |_| {}).unwrap_err();
    assert!(
        matches!(error, IndexError::OtherExtractor { .. }),
        "{error}"
    );
    assert!(error.to_string().contains("foreign.parquet"), "{error}");
    assert_eq!(store.vectors_of_kind(FEATURES).count(), before);
}

#[test]
fn codes_need_the_stores_model() {
    let (temp, root, extractor_file) = learned(5);
    let out = temp.path().join("part.parquet");
    describe_part(
        &root,
        &extractor_file,
        Part { number: 1, of: 1 },
        false,
        &out,
        &|_| {},
    )
    .unwrap();
    // A codes file claiming a model the store does not have.
    let codes = temp.path().join("codes.parquet");
    let metadata = vec![
        (KIND_KEY.to_string(), CODES_KIND.to_string()),
        (FORMAT_KEY.to_string(), SHARD_FORMAT.to_string()),
        (
            EXTRACTOR_KEY.to_string(),
            fingerprint(&std::fs::read(&extractor_file).unwrap()),
        ),
        (MODEL_KEY.to_string(), fingerprint(b"another model")),
    ];
    let mut writer = ShardWriter::create(&codes, "tagweave_codes", CODE_LAYOUT, metadata).unwrap();
    writer
        .write_group(&[vec![
            Value::Text("a.jpg".into()),
            Value::Text("0123456789abcdef".into()),
            Value::Text("00".into()),
            Value::FloatList(vec![0.5, 0.25]),
        ]])
        .unwrap();
    writer.finish().unwrap();
    let store = Store::open_or_create(&temp.path().join("store"), &root).unwrap();
    let error = merge(&store, &[out, codes], Some(&extractor_file), &mut |_| {}).unwrap_err();
    assert!(matches!(error, IndexError::NoModel { .. }), "{error}");
    assert!(error.to_string().contains("codes.parquet"), "{error}");
    assert_eq!(
        store.item_count().unwrap(),
        0,
        "the features file was not merged either"
    );
}
