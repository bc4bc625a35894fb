//! Tag transfer quality on the shared evaluation folders: leave-one-out kNN (cosine, k=10,
//! score(tag) = Σ sim · has_tag) and label-ranking average precision (LRAP), beside the
//! tag-frequency prior. Small and private to this tool on purpose.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use clap::Args;
use ndarray::{s, Array2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use tagweave_vision::{FeatureExtractor, Standardiser};

use crate::FeatureArgs;

#[derive(Args)]
pub struct QualityArgs {
    /// Folder holding the evaluation sets.
    #[arg(long, default_value = concat!(env!("CARGO_MANIFEST_DIR"), "/../../../shared/eval"))]
    eval: PathBuf,
    /// Sets (sub-folders) to evaluate.
    #[arg(
        long,
        default_value = "emoji-twemoji,tuxpaint-stamps",
        value_delimiter = ','
    )]
    sets: Vec<String>,
    /// Neighbours per picture.
    #[arg(long, default_value_t = 10)]
    k: usize,
    #[arg(long, default_value_t = 2)]
    threads: usize,
    /// Weight of the colour block against the patch block in "both" (after standardising).
    #[arg(long, default_value_t = 1.0)]
    colour_weight: f32,
    /// Skip per-dimension standardisation (for comparison only).
    #[arg(long)]
    raw: bool,
    #[command(flatten)]
    features: FeatureArgs,
}

/// Pictures that have a `NAME.txt` sidecar, with their tags (trimmed, lower-case lines).
fn tagged_pictures(folder: &Path) -> anyhow::Result<Vec<(PathBuf, Vec<String>)>> {
    let mut out = Vec::new();
    for entry in
        std::fs::read_dir(folder).with_context(|| format!("reading {}", folder.display()))?
    {
        let path = entry?.path();
        let ext = path
            .extension()
            .and_then(|e| e.to_str())
            .unwrap_or("")
            .to_lowercase();
        let sidecar = path.with_extension("txt");
        if matches!(ext.as_str(), "png" | "jpg" | "jpeg") && sidecar.exists() {
            let text = std::fs::read_to_string(&sidecar)?;
            let mut tags: Vec<String> = text
                .lines()
                .map(|l| l.trim().to_lowercase())
                .filter(|l| !l.is_empty())
                .collect();
            tags.sort();
            tags.dedup();
            out.push((path, tags));
        }
    }
    out.sort();
    Ok(out)
}

/// scikit-learn's label_ranking_average_precision_score for one sample: mean over the
/// relevant labels of (relevant labels ranked at or above it) / (labels ranked at or
/// above it); ties count against. A sample whose relevant set is empty or everything is 1.
fn lrap_one(scores: &[f32], relevant: &[usize]) -> f64 {
    if relevant.is_empty() || relevant.len() == scores.len() {
        return 1.0;
    }
    let sum: f64 = relevant
        .iter()
        .map(|&j| {
            let at_or_above = scores.iter().filter(|&&s| s >= scores[j]).count();
            let relevant_above = relevant.iter().filter(|&&r| scores[r] >= scores[j]).count();
            relevant_above as f64 / at_or_above as f64
        })
        .sum();
    sum / relevant.len() as f64
}

/// Mean LRAP over the pictures `eval`, ranking only the tags in `universe`; pictures with
/// no relevant tag in the universe are left out. `score_of(i)` scores every tag.
fn lrap(
    eval: &[usize],
    truth: &[Vec<usize>],
    universe: &[usize],
    n_tags: usize,
    score_of: impl Fn(usize) -> Vec<f32> + Sync,
) -> f64 {
    let mut position = vec![usize::MAX; n_tags];
    universe
        .iter()
        .enumerate()
        .for_each(|(i, &t)| position[t] = i);
    let per_picture: Vec<f64> = eval
        .par_iter()
        .filter_map(|&i| {
            let relevant: Vec<usize> = truth[i]
                .iter()
                .map(|&t| position[t])
                .filter(|&t| t != usize::MAX)
                .collect();
            if relevant.is_empty() {
                return None;
            }
            let scores = score_of(i);
            let kept: Vec<f32> = universe.iter().map(|&t| scores[t]).collect();
            Some(lrap_one(&kept, &relevant))
        })
        .collect();
    per_picture.iter().sum::<f64>() / per_picture.len().max(1) as f64
}

/// kNN scores for picture i from its k most cosine-similar `candidates` (never itself):
/// Σ sim · has_tag.
fn knn_scorer<'a>(
    rows: &Array2<f32>,
    truth: &'a [Vec<usize>],
    n_tags: usize,
    k: usize,
    candidates: &'a [usize],
) -> impl Fn(usize) -> Vec<f32> + Sync + 'a {
    let mut unit = rows.clone();
    for mut row in unit.axis_iter_mut(Axis(0)) {
        let norm = row.dot(&row).sqrt();
        if norm > 0.0 {
            row /= norm;
        }
    }
    let sims = unit.dot(&unit.t());
    move |i| {
        let mut order: Vec<usize> = candidates.iter().copied().filter(|&j| j != i).collect();
        order.sort_by(|&a, &b| sims[[i, b]].total_cmp(&sims[[i, a]]).then(a.cmp(&b)));
        let mut scores = vec![0f32; n_tags];
        for &j in order.iter().take(k) {
            truth[j].iter().for_each(|&t| scores[t] += sims[[i, j]]);
        }
        scores
    }
}

/// Standardised copy of `x`, fitted on the rows `fit_on`.
fn standardised(x: &Array2<f32>, fit_on: &[usize], raw: bool) -> anyhow::Result<Array2<f32>> {
    if raw {
        return Ok(x.clone());
    }
    let st = Standardiser::fit(x.select(Axis(0), fit_on).view());
    let mut out = x.clone();
    st.apply(out.view_mut())?;
    Ok(out)
}

pub fn run(args: &QualityArgs) -> anyhow::Result<()> {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(args.threads)
        .build()?;
    let opts = args.features.options()?;
    println!(
        "long side {}, patch {}, stride {}, K {}, {:?}, pool {:?}; colour L{}×ab{} range ±{} hist {:?} moments {:?}",
        opts.decode.long_side,
        opts.patches.size,
        opts.patches.stride,
        opts.patches.atoms,
        opts.patches.activation,
        opts.patches.pool_grids,
        opts.colour.l_bins,
        opts.colour.ab_bins,
        opts.colour.ab_range,
        opts.colour.histogram_grids,
        opts.colour.moment_grids,
    );
    for set in &args.sets {
        let folder = args.eval.join(set);
        if !folder.is_dir() {
            println!("{set}: skipped, {} absent", folder.display());
            continue;
        }
        let pictures = tagged_pictures(&folder)?;
        let paths: Vec<PathBuf> = pictures.iter().map(|p| p.0.clone()).collect();
        let mut vocab = BTreeMap::new();
        for (_, tags) in &pictures {
            for t in tags {
                let next = vocab.len();
                vocab.entry(t.clone()).or_insert(next);
            }
        }
        let truth: Vec<Vec<usize>> = pictures
            .iter()
            .map(|(_, tags)| tags.iter().map(|t| vocab[t]).collect())
            .collect();
        let mut counts = vec![0usize; vocab.len()];
        truth.iter().flatten().for_each(|&t| counts[t] += 1);

        let start = Instant::now();
        let fx = pool
            .install(|| FeatureExtractor::learn(&paths, &opts, args.features.seed, &|_, _| {}))?;
        let learned = start.elapsed().as_secs_f64();
        let iterations = fx.dictionary().kmeans_iterations();
        let start = Instant::now();
        let rows: Vec<Vec<f32>> = pool.install(|| {
            paths
                .par_iter()
                .map(|p| fx.features(p))
                .collect::<Result<_, _>>()
        })?;
        let featured = start.elapsed().as_secs_f64();
        let (n, d, cd) = (rows.len(), fx.dimension(), fx.colour_dimension());
        let x = Array2::from_shape_vec((n, d), rows.concat())?;
        println!(
            "\n{set}: {n} pictures, {} tags ({} on >= 2 pictures); {d} features ({cd} colour + {} patch); learn {learned:.1} s ({iterations} k-means updates), features {featured:.1} s",
            vocab.len(),
            counts.iter().filter(|&&c| c >= 2).count(),
            d - cd
        );
        // Leave-one-out over everything, and a seeded 75/25 split like the reference figures.
        let everyone: Vec<usize> = (0..n).collect();
        let all_tags: Vec<usize> = (0..vocab.len()).collect();
        let frequent: Vec<usize> = all_tags
            .iter()
            .copied()
            .filter(|&t| counts[t] >= 2)
            .collect();
        let mut shuffled = everyone.clone();
        shuffled.shuffle(&mut ChaCha8Rng::seed_from_u64(7));
        let (train, test) = shuffled.split_at(n * 3 / 4);
        let mut train_counts = vec![0usize; vocab.len()];
        train
            .iter()
            .flat_map(|&i| &truth[i])
            .for_each(|&t| train_counts[t] += 1);
        let train_tags: Vec<usize> = all_tags
            .iter()
            .copied()
            .filter(|&t| train_counts[t] > 0)
            .collect();
        let loo_x = standardised(&x, &everyone, args.raw)?;
        let split_x = standardised(&x, train, args.raw)?;

        println!(
            "{:<22} {:>9} {:>13} {:>10}",
            "method", "LOO LRAP", "LOO tags>=2", "split LRAP"
        );
        let loo_prior = |i: usize| -> Vec<f32> {
            let mut s: Vec<f32> = counts.iter().map(|&c| c as f32).collect();
            truth[i].iter().for_each(|&t| s[t] -= 1.0);
            s
        };
        let split_prior =
            |_: usize| -> Vec<f32> { train_counts.iter().map(|&c| c as f32).collect() };
        let nt = vocab.len();
        pool.install(|| -> anyhow::Result<()> {
            println!(
                "{:<22} {:>9.3} {:>13.3} {:>10.3}",
                "tag-frequency prior",
                lrap(&everyone, &truth, &all_tags, nt, loo_prior),
                lrap(&everyone, &truth, &frequent, nt, loo_prior),
                lrap(test, &truth, &train_tags, nt, split_prior),
            );
            let blocks: [(&str, std::ops::Range<usize>); 3] = [
                ("kNN colour", 0..cd),
                ("kNN patches", cd..d),
                ("kNN colour+patches", 0..d),
            ];
            for (name, cols) in blocks {
                let pick = |m: &Array2<f32>| {
                    let mut b = m.slice(s![.., cols.clone()]).to_owned();
                    if cols.start == 0 && cols.end == d {
                        b.slice_mut(s![.., ..cd])
                            .mapv_inplace(|v| v * args.colour_weight);
                    }
                    b
                };
                let (loo_m, split_m) = (pick(&loo_x), pick(&split_x));
                let loo = knn_scorer(&loo_m, &truth, nt, args.k, &everyone);
                let split = knn_scorer(&split_m, &truth, nt, args.k, train);
                println!(
                    "{name:<22} {:>9.3} {:>13.3} {:>10.3}",
                    lrap(&everyone, &truth, &all_tags, nt, &loo),
                    lrap(&everyone, &truth, &frequent, nt, &loo),
                    lrap(test, &truth, &train_tags, nt, &split),
                );
            }
            Ok(())
        })?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lrap_matches_scikit_learn_docs_example() {
        // source: scikit-learn docs, label_ranking_average_precision_score example:
        // y_true [[1,0,0],[0,0,1]], y_score [[0.75,0.5,1],[1,0.2,0.1]] → 0.416…
        let a = lrap_one(&[0.75, 0.5, 1.0], &[0]);
        let b = lrap_one(&[1.0, 0.2, 0.1], &[2]);
        assert!(((a + b) / 2.0 - 0.416_666_666).abs() < 1e-6);
    }

    #[test]
    fn ties_count_against_and_universe_restricts() {
        // Worked by hand: all scores equal, two relevant of three → 2/3 each.
        assert!((lrap_one(&[0.0, 0.0, 0.0], &[0, 1]) - 2.0 / 3.0).abs() < 1e-12);
        let truth = vec![vec![0, 2], vec![0, 1], vec![1]];
        let scores = |_: usize| vec![3.0, 2.0, 1.0];
        let all = lrap(&[0, 1, 2], &truth, &[0, 1, 2], 3, scores);
        // picture 0 → (1/1 + 2/3)/2, picture 1 → 1, picture 2 → 1/2
        assert!((all - ((1.0 + 2.0 / 3.0) / 2.0 + 1.0 + 0.5) / 3.0).abs() < 1e-12);
        // Tag 2 dropped: picture 0 → 1, picture 1 → every label relevant → 1, picture 2 → 1/2.
        let kept = lrap(&[0, 1, 2], &truth, &[0, 1], 3, scores);
        assert!((kept - (1.0 + 1.0 + 0.5) / 3.0).abs() < 1e-12);
        // A picture with no tag in the universe is left out.
        assert!((lrap(&[2], &truth, &[0], 3, scores) - 0.0).abs() < 1e-12);
    }

    #[test]
    fn knn_leaves_the_picture_itself_out() {
        let rows = ndarray::array![[1.0f32, 0.0], [0.9, 0.1], [0.0, 1.0]];
        let truth = vec![vec![0], vec![1], vec![2]];
        let everyone = [0, 1, 2];
        let score = knn_scorer(&rows, &truth, 3, 1, &everyone);
        let s0 = score(0);
        assert_eq!(s0[0], 0.0, "own tags must not leak");
        assert!(s0[1] > 0.9 && s0[2] == 0.0);
    }
}
