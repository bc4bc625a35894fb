//! `tagweave eval` run as a user would run it, on a copy of the demo archive.
//!
//! Scanning the demo is the slow part, so one test copies and scans it once and
//! then runs every demo check in turn on that copy.

mod common;

use std::path::Path;
use std::process::Output;

use common::*;
use serde_json::Value;

fn demo_copy() -> (tempfile::TempDir, std::path::PathBuf) {
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path().join("archive");
    copy_tree(&repo_root().join("demo-collection"), &folder);
    (temp, folder)
}

fn succeeded(out: &Output) -> Value {
    assert_eq!(
        out.status.code(),
        Some(0),
        "stderr:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    json(out)
}

fn stdout(out: &Output) -> String {
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// The report without what legitimately changes between runs (timings) or
/// names the seed, so two reports compare on their measurements alone.
fn measurements(mut report: Value) -> Value {
    report["split"]["seed"] = Value::Null;
    for method in report["methods"].as_object_mut().unwrap().values_mut() {
        method["seconds"] = Value::Null;
    }
    for method in report["completion"]["methods"]
        .as_object_mut()
        .unwrap()
        .values_mut()
    {
        method["seconds"] = Value::Null;
    }
    report
}

fn lrap(report: &Value, method: &str) -> f64 {
    report["methods"][method]["lrap"].as_f64().unwrap()
}

fn the_report_has_the_agreed_shape_and_baselines_beat_the_prior(folder: &Path) -> Value {
    let report = succeeded(&tagweave(folder, &["eval", ".", "--json"]));
    let split = &report["split"];
    for key in ["seed", "train", "test", "vocabulary", "unseen_test_tags"] {
        assert!(split[key].is_u64(), "split.{key}: {report}");
    }
    assert_eq!(split["seed"], 7, "the default seed");
    let methods: Vec<&String> = report["methods"].as_object().unwrap().keys().collect();
    assert_eq!(methods, ["joint", "knn", "prior", "ridge"]);
    // Tag completion on the same split: test pictures with two or more tags show half.
    let completion = &report["completion"];
    let shown = completion["split"]["revealed"].as_u64().unwrap();
    let hidden = completion["split"]["hidden"].as_u64().unwrap();
    assert!(
        completion["split"]["pictures"].as_u64().unwrap() > 0,
        "{report}"
    );
    assert!(
        shown > 0 && hidden >= shown,
        "⌊n/2⌋ shown: {shown} shown, {hidden} hidden"
    );
    let completed: Vec<&String> = completion["methods"].as_object().unwrap().keys().collect();
    assert_eq!(
        completed,
        [
            "co-occurrence",
            "joint",
            "joint model alone",
            "knn",
            "prior",
            "ridge",
            "ridge+co-occurrence"
        ]
    );
    for (name, m) in completion["methods"].as_object().unwrap() {
        let lrap = m["lrap"].as_f64().unwrap();
        assert!((0.0..=1.0).contains(&lrap), "{name}: {lrap}");
    }
    for method in ["prior", "knn", "ridge"] {
        for key in [
            "lrap",
            "p_at_1",
            "p_at_5",
            "r_at_5",
            "search_map",
            "search_map_pairs",
            "mislabel_auc",
            "seconds",
        ] {
            assert!(
                report["methods"][method][key].is_f64(),
                "{method}.{key}: {report}"
            );
        }
    }
    assert!(report.get("known_mislabels").is_none(), "only when asked");
    // The demo's tags are drawn from visible scene parameters. Measured
    // (features of commit c2ebfb7) with seed 7: prior 0.510, kNN 0.805, ridge 0.905.
    let prior = lrap(&report, "prior");
    for method in ["knn", "ridge"] {
        assert!(
            lrap(&report, method) >= prior + 0.15,
            "{method} {} vs prior {prior}",
            lrap(&report, method)
        );
    }
    report
}

fn the_same_seed_gives_the_same_numbers_another_seed_another_split(folder: &Path) {
    let run = |seed: &str| {
        measurements(succeeded(&tagweave(
            folder,
            &["eval", ".", "--json", "--seed", seed],
        )))
    };
    let first = run("3");
    assert_eq!(first, run("3"));
    assert_ne!(first, run("4"));
}

fn known_mislabels_from_truth_csv_are_found_out_of_fold(folder: &Path, plain: &Value) {
    let truth = demo_truth();
    let tagged = truth.iter().filter(|r| !r.written_tags.is_empty()).count();
    let known = truth
        .iter()
        .filter(|r| !r.written_tags.is_empty() && !r.false_tags.is_empty())
        .count();
    let report = succeeded(&tagweave(
        folder,
        &["eval", ".", "--json", "--known-mislabels", "TRUTH.csv"],
    ));
    assert_eq!(
        measurements(report.clone())["methods"],
        measurements(plain.clone())["methods"],
        "the audit leaves the held-out measurements alone"
    );
    let found = &report["known_mislabels"];
    assert_eq!(found["pictures"], tagged, "{found}");
    assert_eq!(found["known"], known, "{found}");
    assert_eq!(found["folds"], 5, "{found}");
    assert_eq!(found["methods"]["prior"]["auc"], 0.5, "{found}");
    // Each known mislabel is one wrong tag among about seven right ones, and
    // the dispute is the mean over a picture's tags, so the signal is diluted.
    // Measured (features of commit c2ebfb7) with seed 7: kNN 0.702, ridge 0.758;
    // over seeds 1–8: kNN 0.69–0.73, ridge 0.75–0.82 (earlier features: kNN 0.65).
    let auc = |method: &str| found["methods"][method]["auc"].as_f64().unwrap();
    assert!(auc("knn") > 0.6, "{found}");
    assert!(auc("ridge") > 0.68, "{found}");
    for method in ["knn", "ridge"] {
        assert!(
            found["methods"][method]["precision"].is_f64(),
            "{method}: {found}"
        );
    }

    let table = stdout(&tagweave(
        folder,
        &["eval", ".", "--known-mislabels", "TRUTH.csv"],
    ));
    assert!(
        table.contains(&format!("known mislabels: {tagged} tagged pictures")),
        "{table}"
    );
    assert!(table.contains("precision in top"), "{table}");
    let markdown = stdout(&tagweave(
        folder,
        &["eval", ".", "--markdown", "--known-mislabels", "TRUTH.csv"],
    ));
    assert!(
        markdown.contains(&format!(
            "| method | known-mislabel AUC | precision in top {known} |"
        )),
        "{markdown}"
    );
}

fn an_unknown_path_in_the_known_file_is_named(folder: &Path, scratch: &Path) {
    let file = scratch.join("mislabels.csv");
    let first = &demo_truth()[0].file;
    std::fs::write(
        &file,
        format!("file,false_tags\n{first},rain\nno-such/picture.jpg,fog\n"),
    )
    .unwrap();
    let out = tagweave(
        folder,
        &["eval", ".", "--known-mislabels", file.to_str().unwrap()],
    );
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{stderr}");
    assert!(
        stderr.contains("mislabels.csv line 3") && stderr.contains("`no-such/picture.jpg`"),
        "{stderr}"
    );
    assert!(out.stdout.is_empty(), "no half report");
}

#[test]
fn eval_on_the_demo_archive() {
    let (temp, folder) = demo_copy();
    let plain = the_report_has_the_agreed_shape_and_baselines_beat_the_prior(&folder);
    the_same_seed_gives_the_same_numbers_another_seed_another_split(&folder);
    known_mislabels_from_truth_csv_are_found_out_of_fold(&folder, &plain);
    an_unknown_path_in_the_known_file_is_named(&folder, temp.path());
}

#[test]
fn too_few_tagged_pictures_fail_with_a_clear_message() {
    let temp = tempfile::tempdir().unwrap();
    let demo = repo_root().join("demo-collection");
    for row in demo_truth().iter().filter(|r| r.sidecar == "txt").take(3) {
        let picture = demo.join(&row.file);
        let name = picture.file_name().unwrap();
        std::fs::copy(&picture, temp.path().join(name)).unwrap();
        let sidecar = picture.with_extension("txt");
        std::fs::copy(&sidecar, temp.path().join(sidecar.file_name().unwrap())).unwrap();
    }
    let out = tagweave(temp.path(), &["eval", "."]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{stderr}");
    assert!(
        stderr.contains("only 3 tagged pictures") && stderr.contains("tag at least 8"),
        "{stderr}"
    );
}
