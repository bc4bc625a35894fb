//! Tests of the evaluation runner.

use std::cell::RefCell;
use std::rc::Rc;

use super::*;
use crate::baselines::tests::synthetic;

/// A synthetic collection as the CLI would pass it: string tags, and
/// content keys where every tenth picture duplicates the one before.
fn collection(n: usize, seed: u64) -> (Array2<f32>, Vec<Vec<String>>, Vec<String>) {
    let (mut x, idx) = synthetic(n, 12, 0.3, seed);
    let tags = idx
        .iter()
        .map(|row| row.iter().map(|t| format!("tag-{t}")).collect())
        .collect();
    let keys: Vec<String> = (0..n)
        .map(|i| format!("hash-{}", i - usize::from(i % 10 == 9)))
        .collect();
    for i in (9..n).step_by(10) {
        let prev = x.row(i - 1).to_owned();
        x.row_mut(i).assign(&prev);
    }
    (x, tags, keys)
}

fn run(x: &Array2<f32>, tags: &[Vec<String>], keys: &[String], seed: u64) -> Report {
    let options = EvalOptions {
        seed,
        ..EvalOptions::default()
    };
    evaluate(
        x.view(),
        tags,
        keys,
        &options,
        &mut baselines(),
        &mut |_| {},
    )
    .unwrap()
}

#[test]
fn informative_features_rank_baselines_as_expected() {
    let (x, tags, keys) = collection(240, 5);
    let r = run(&x, &tags, &keys, 5);
    let (prior, knn, ridge) = (&r.methods["prior"], &r.methods["knn"], &r.methods["ridge"]);
    assert!(knn.lrap > 0.85 && ridge.lrap > 0.85, "{}", r.to_table());
    assert!(prior.lrap < knn.lrap - 0.25, "{}", r.to_table());
    assert!(knn.search_map.unwrap() > prior.search_map.unwrap() + 0.3);
    assert!(knn.search_map_pairs.unwrap() > prior.search_map_pairs.unwrap());
    assert!(knn.mislabel_auc.unwrap() > 0.8, "{}", r.to_table());
    // a method blind to the picture cannot tell a swapped tag set from a true one
    assert_eq!(prior.mislabel_auc, Some(0.5));
    assert!(knn.n_plus > prior.n_plus);
    assert_eq!(r.split.train + r.split.test, 240);
    assert_eq!(r.split.mislabelled, 3); // round(5 % of 60)
    assert!(r.split.search_pairs > 0);
}

#[test]
fn same_seed_same_numbers() {
    let (x, tags, keys) = collection(120, 8);
    let a = run(&x, &tags, &keys, 3).without_timings();
    assert_eq!(a, run(&x, &tags, &keys, 3).without_timings());
    assert_ne!(a, run(&x, &tags, &keys, 4).without_timings());
}

type Seen = Rc<RefCell<Vec<(Array2<f32>, Vec<Vec<usize>>)>>>;

/// Records exactly what the runner hands it.
struct Recorder {
    fitted_on: Seen,
    scored: Seen,
}

impl TagScorer for Recorder {
    fn name(&self) -> &str {
        "recorder"
    }
    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        self.fitted_on
            .borrow_mut()
            .push((train.features.to_owned(), train.tags.to_vec()));
        Ok(())
    }
    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        self.scored
            .borrow_mut()
            .push((features.to_owned(), Vec::new()));
        Ok(Array2::from_shape_fn((features.nrows(), 12), |(i, j)| {
            ((i * 7 + j) % 5) as f32
        }))
    }
}

/// Records the variants the runner hands a method.
struct VariantRecorder(Rc<RefCell<Vec<Array2<f32>>>>);

impl TagScorer for VariantRecorder {
    fn name(&self) -> &str {
        "variants"
    }
    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        assert!(train
            .variants
            .iter()
            .all(|v| v.dim() == train.features.dim()));
        self.0.borrow_mut().extend(train.variants.iter().cloned());
        Ok(())
    }
    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        Ok(Array2::from_shape_fn((features.nrows(), 12), |(i, j)| {
            ((i * 7 + j) % 5) as f32
        }))
    }
}

#[test]
fn variants_of_train_pictures_reach_methods_scaled_like_the_features() {
    let (x, tags, keys) = collection(100, 2);
    let seed = 9;
    let parts = split(100, &keys, 0.75, seed).unwrap();
    let mirror = x.mapv(|v| 3.0 * v + 1.0);
    let crop = x.mapv(|v| -v);
    let seen = Rc::new(RefCell::new(Vec::new()));
    let mut methods: Vec<Box<dyn TagScorer>> = vec![Box::new(VariantRecorder(seen.clone()))];
    let options = EvalOptions {
        seed,
        ..EvalOptions::default()
    };
    let variants = [mirror.view(), crop.view()];
    evaluate_with_variants(
        x.view(),
        &variants,
        &tags,
        &keys,
        &options,
        &mut methods,
        &mut |_| {},
    )
    .unwrap();
    // the features' standardiser (fitted on train originals), train rows only
    let standardiser = Standardiser::fit(x.select(Axis(0), &parts.train).view());
    let want: Vec<Array2<f32>> = [&mirror, &crop]
        .iter()
        .map(|v| standardiser.apply(v.select(Axis(0), &parts.train).view()))
        .collect();
    assert_eq!(*seen.borrow(), want);
    // without variants the methods get none
    seen.borrow_mut().clear();
    evaluate(x.view(), &tags, &keys, &options, &mut methods, &mut |_| {}).unwrap();
    assert!(seen.borrow().is_empty());
    // variants of the wrong shape are refused
    let short = x.slice(ndarray::s![..10, ..]);
    let narrow = x.slice(ndarray::s![.., ..3]);
    for (bad, wrong_rows) in [(short, true), (narrow, false)] {
        let e = evaluate_with_variants(
            x.view(),
            &[bad],
            &tags,
            &keys,
            &options,
            &mut methods,
            &mut |_| {},
        )
        .unwrap_err();
        assert_eq!(
            matches!(e, EvalError::LengthMismatch { got: 10, .. }),
            wrong_rows,
            "{e}"
        );
        assert_eq!(
            matches!(e, EvalError::VariantWidth { got: 3, .. }),
            !wrong_rows,
            "{e}"
        );
    }
}

#[test]
fn methods_never_see_held_out_tags() {
    let (x, mut tags, keys) = collection(100, 2);
    let seed = 9;
    let parts = split(100, &keys, 0.75, seed).unwrap();
    // a canary tag on every test picture; the train tags are left untouched
    for &i in &parts.test {
        tags[i].push("held-out-canary".to_string());
    }
    let (fitted_on, scored) = (Seen::default(), Seen::default());
    let mut methods: Vec<Box<dyn TagScorer>> = vec![Box::new(Recorder {
        fitted_on: fitted_on.clone(),
        scored: scored.clone(),
    })];
    let options = EvalOptions {
        seed,
        ..EvalOptions::default()
    };
    let report = evaluate(x.view(), &tags, &keys, &options, &mut methods, &mut |_| {}).unwrap();
    assert_eq!(report.split.unseen_test_tags, 1);

    let columns = TagColumns::from_items(parts.train.iter().map(|&i| tags[i].as_slice()));
    assert!(columns.index_of("held-out-canary").is_none());
    let standardiser = Standardiser::fit(x.select(Axis(0), &parts.train).view());
    let fitted = fitted_on.borrow();
    assert_eq!(fitted.len(), 1);
    let (features, got_tags) = &fitted[0];
    // exactly the train pictures (all tagged here), in order, with their own tags
    let want: Vec<Vec<usize>> = parts
        .train
        .iter()
        .map(|&i| columns.encode(&tags[i]))
        .collect();
    assert_eq!(got_tags, &want);
    assert_eq!(
        features,
        &standardiser.apply(x.select(Axis(0), &parts.train).view())
    );
    // scoring sees test features only, standardised with the train statistics
    let scored = scored.borrow();
    // (the first call scores the completion protocol's rows, a subset of the test rows;
    // the last one every test picture)
    let test_x = standardiser.apply(x.select(Axis(0), &parts.test).view());
    assert_eq!(scored.last().unwrap().0, test_x);
    for (rows, _) in scored.iter() {
        assert!(rows
            .outer_iter()
            .all(|r| test_x.outer_iter().any(|t| t == r)));
    }
}

#[test]
fn counts_unseen_and_unmeasurable_test_pictures() {
    let tags: Vec<Vec<String>> = [
        &["a", "b"][..],
        &["a"],
        &["b"],
        &["a", "b"],
        &["zz"],
        &[],
        &["a", "yy"],
        &["b", "yy", "xx"],
    ]
    .iter()
    .map(|t| t.iter().map(|s| s.to_string()).collect())
    .collect();
    let x = Array2::from_shape_fn((8, 3), |(i, j)| (i * 3 + j) as f32);
    let keys: Vec<String> = (0..8).map(|i| i.to_string()).collect();
    // find a seed whose test part holds pictures 4..8 only (train 0..4 carry a and b)
    let seed = (0..10_000u64)
        .find(|&s| split(8, &keys, 0.5, s).unwrap().test == vec![4, 5, 6, 7])
        .unwrap();
    let options = EvalOptions {
        seed,
        train_fraction: 0.5,
        ..EvalOptions::default()
    };
    let r = evaluate(
        x.view(),
        &tags,
        &keys,
        &options,
        &mut baselines(),
        &mut |_| {},
    )
    .unwrap();
    let s = &r.split;
    assert_eq!((s.train, s.test, s.vocabulary), (4, 4, 2));
    assert_eq!(s.unseen_test_tags, 3); // zz, yy, xx
    assert_eq!(s.test_without_known_tags, 2); // pictures 4 (zz only) and 5 (untagged)
}

#[test]
fn report_serialises_and_renders() {
    let (x, tags, keys) = collection(80, 1);
    let mut progress = Vec::new();
    let r = evaluate(
        x.view(),
        &tags,
        &keys,
        &EvalOptions::default(),
        &mut baselines(),
        &mut |p| progress.push(format!("{p:?}")),
    )
    .unwrap();
    assert_eq!(progress.len(), 6);
    let json = serde_json::to_value(&r).unwrap();
    let top: Vec<&String> = json.as_object().unwrap().keys().collect();
    assert_eq!(top, ["completion", "methods", "split"]);
    let methods: Vec<&String> = json["methods"].as_object().unwrap().keys().collect();
    assert_eq!(methods, ["knn", "prior", "ridge"]);
    for key in ["seed", "train", "test", "vocabulary", "unseen_test_tags"] {
        assert!(json["split"][key].is_u64(), "{key}");
    }
    for key in [
        "lrap",
        "p_at_1",
        "p_at_5",
        "r_at_5",
        "coverage",
        "tag_precision",
        "tag_recall",
        "search_map",
        "mislabel_auc",
        "seconds",
    ] {
        assert!(json["methods"]["knn"][key].is_f64(), "{key}");
    }
    assert_eq!(
        json["methods"]["knn"]["settings"]
            .as_str()
            .map(|s| s.starts_with("k=")),
        Some(true)
    );
    let md = r.to_markdown();
    assert!(md.contains("| method | settings | LRAP |"));
    // two tables: pictures alone and tag completion, each a header, a rule and 3 methods
    assert_eq!(md.lines().filter(|l| l.starts_with('|')).count(), 10);
    assert!(md.contains("tag completion:"));
    let table = r.to_table();
    // summary, header, 3 methods; a blank line, the completion summary, header, 3 methods
    assert_eq!(table.lines().count(), 11);
    assert!(table.lines().nth(2).unwrap().starts_with("knn "));

    let audit = crate::Audit {
        folds: 5,
        disputes: BTreeMap::from([
            ("knn".to_string(), vec![Some(0.8), Some(0.1), Some(0.3)]),
            ("prior".to_string(), vec![Some(0.5); 3]),
        ]),
    };
    let mut r = r;
    r.known_mislabels = Some(audit.against_known(&[true, false, false]).unwrap());
    let json = serde_json::to_value(&r).unwrap();
    let known = &json["known_mislabels"];
    assert_eq!(
        (&known["pictures"], &known["known"]),
        (&3.into(), &1.into())
    );
    assert_eq!(known["methods"]["knn"]["auc"], 1.0);
    assert_eq!(known["methods"]["prior"]["precision"], 1.0 / 3.0);
    let md = r.to_markdown();
    assert!(md.contains("| method | known-mislabel AUC | precision in top 1 |\n| --- | --- | --- |\n| knn | 1.000 | 1.000 |\n| prior | 0.500 | 0.333 |\n"), "{md}");
    let table = r.to_table();
    assert_eq!(table.lines().count(), 11 + 5);
    assert!(table.ends_with("\nmethod  known-mislabel AUC  precision in top 1\nknn                  1.000               1.000\nprior                0.500               0.333\n"), "{table}");
}

#[test]
fn bad_inputs_are_refused_with_reasons() {
    let (mut x, tags, keys) = collection(40, 1);
    let o = EvalOptions::default();
    let e = evaluate(
        x.view(),
        &tags[..39],
        &keys,
        &o,
        &mut baselines(),
        &mut |_| {},
    );
    assert!(matches!(
        e,
        Err(EvalError::LengthMismatch {
            got: 39,
            expected: 40,
            ..
        })
    ));
    let e = evaluate(
        x.view(),
        &tags,
        &keys[..3],
        &o,
        &mut baselines(),
        &mut |_| {},
    );
    assert!(matches!(e, Err(EvalError::LengthMismatch { got: 3, .. })));
    let mut twice: Vec<Box<dyn TagScorer>> = vec![
        Box::new(PriorScorer::default()),
        Box::new(PriorScorer::default()),
    ];
    let e = evaluate(x.view(), &tags, &keys, &o, &mut twice, &mut |_| {});
    assert!(matches!(e, Err(EvalError::DuplicateMethod(_))));
    let wrong = EvalOptions {
        noise_fraction: 0.9,
        ..o.clone()
    };
    assert!(matches!(
        evaluate(
            x.view(),
            &tags,
            &keys,
            &wrong,
            &mut baselines(),
            &mut |_| {}
        ),
        Err(EvalError::BadNoiseFraction(_))
    ));
    x[[7, 2]] = f32::NAN;
    let e = evaluate(x.view(), &tags, &keys, &o, &mut baselines(), &mut |_| {});
    assert!(matches!(
        e,
        Err(EvalError::NonFiniteFeature { row: 7, col: 2 })
    ));
    let empty: Vec<Vec<String>> = vec![Vec::new(); 40];
    x[[7, 2]] = 0.0;
    let e = evaluate(x.view(), &empty, &keys, &o, &mut baselines(), &mut |_| {});
    assert!(matches!(e, Err(EvalError::EmptyVocabulary)));
}

/// Returns one column too few.
struct Broken;

impl TagScorer for Broken {
    fn name(&self) -> &str {
        "broken"
    }
    fn fit(&mut self, _: &TrainSet) -> Result<(), EvalError> {
        Ok(())
    }
    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        Ok(Array2::zeros((features.nrows(), 11)))
    }
}

#[test]
fn wrongly_shaped_scores_name_the_method() {
    let (x, tags, keys) = collection(40, 1);
    let mut methods: Vec<Box<dyn TagScorer>> = vec![Box::new(Broken)];
    let e = evaluate(
        x.view(),
        &tags,
        &keys,
        &EvalOptions::default(),
        &mut methods,
        &mut |_| {},
    )
    .unwrap_err();
    assert!(
        e.to_string().contains("'broken'") && e.to_string().contains("x11"),
        "{e}"
    );
}
