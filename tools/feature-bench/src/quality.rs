//! Tag transfer quality of the image features on the shared evaluation folders: label-ranking
//! average precision (LRAP) of kNN tag transfer (the eval crate's baseline, k fixed) on
//! each feature block, beside the tag-frequency prior, leave-one-out and on a 75/25 split.

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use clap::Args;
use ndarray::{s, Array2, ArrayView2};
use rayon::prelude::*;
use tagweave_collection::{crawl, read_item, CrawlOptions};
use tagweave_eval::metrics::label_ranking_average_precision;
use tagweave_eval::{evaluate, EvalOptions, PriorScorer, TagScorer};
use tagweave_suggest::{knn_leave_one_out_scores, KnnScorer, Standardiser, TagColumns};
use tagweave_vision::FeatureExtractor;

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
    /// Also write each set's features to DIR/SET.f32 (little-endian f32, row per picture) and
    /// DIR/SET.tsv (first line "pictures values colour-values", then path TAB tags), for
    /// studies outside the Rust code (tools/feature-bench/study/).
    #[arg(long, value_name = "DIR")]
    dump: Option<PathBuf>,
    #[command(flatten)]
    features: FeatureArgs,
}

fn dump_features(
    dir: &Path,
    set: &str,
    x: ArrayView2<f32>,
    colour: usize,
    paths: &[PathBuf],
    tags: &[Vec<String>],
) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let raw: Vec<u8> = x.iter().flat_map(|v| v.to_le_bytes()).collect();
    let values = dir.join(format!("{set}.f32"));
    std::fs::write(&values, raw).with_context(|| format!("writing {}", values.display()))?;
    let mut meta = format!("{} {} {colour}\n", x.nrows(), x.ncols());
    for (path, tags) in paths.iter().zip(tags) {
        meta.push_str(&format!("{}\t{}\n", path.display(), tags.join(",")));
    }
    let listing = dir.join(format!("{set}.tsv"));
    std::fs::write(&listing, meta).with_context(|| format!("writing {}", listing.display()))
}

/// The tagged pictures of a folder exactly as `tagweave scan` finds them (every picture
/// format, text and XMP sidecars, normalised tags), in path order.
struct Tagged {
    paths: Vec<PathBuf>,
    tags: Vec<Vec<String>>,
    /// BLAKE3 of each picture's bytes: duplicates stay on one side of the split.
    hashes: Vec<String>,
    /// Pictures without any tag (nothing to transfer or measure) and files the scan skips.
    left_out: usize,
}

fn tagged_pictures(folder: &Path) -> anyhow::Result<Tagged> {
    let found = crawl(folder, &CrawlOptions::default())
        .with_context(|| format!("listing the pictures of {}", folder.display()))?;
    let mut out = Tagged {
        paths: Vec::new(),
        tags: Vec::new(),
        hashes: Vec::new(),
        left_out: found.skipped.len(),
    };
    for candidate in &found.candidates {
        match read_item(folder, candidate) {
            Ok(read) if !read.item.tags.is_empty() => {
                out.paths.push(candidate.path.clone());
                out.tags.push(read.item.tags);
                out.hashes.push(read.item.content_hash);
            }
            _ => out.left_out += 1,
        }
    }
    Ok(out)
}

/// Mean LRAP over the rows of `scores`, ranking only the tags marked in `keep`; pictures
/// with no relevant tag among them are left out (the eval crate measures whole rows only).
fn mean_lrap(scores: ArrayView2<f32>, truth: &[Vec<usize>], keep: &[bool]) -> f64 {
    let per_picture: Vec<f64> = scores
        .outer_iter()
        .zip(truth)
        .filter_map(|(row, tags)| {
            let mut relevant = vec![false; keep.len()];
            tags.iter().for_each(|&t| relevant[t] = true);
            let (kept, relevant): (Vec<f32>, Vec<bool>) = row
                .iter()
                .zip(relevant)
                .zip(keep)
                .filter(|(_, &k)| k)
                .map(|((&s, r), _)| (s, r))
                .unzip();
            relevant
                .contains(&true)
                .then(|| label_ranking_average_precision(&kept, &relevant))
        })
        .collect();
    per_picture.iter().sum::<f64>() / per_picture.len().max(1) as f64
}

/// Tag-frequency prior with each picture's own tags left out of the counts: the eval
/// crate's prior is fitted on a train part, this is its leave-one-out counterpart.
fn loo_prior(truth: &[Vec<usize>], n_tags: usize) -> Array2<f32> {
    let mut counts = vec![0f32; n_tags];
    truth.iter().flatten().for_each(|&t| counts[t] += 1.0);
    let mut scores = Array2::from_shape_fn((truth.len(), n_tags), |(_, t)| counts[t]);
    for (mut row, tags) in scores.outer_iter_mut().zip(truth) {
        tags.iter().for_each(|&t| row[t] -= 1.0);
    }
    scores
}

/// LRAP of one method on the seeded 75/25 split (grouped by content), through the eval
/// crate's runner: standardised and fitted on train pictures only.
fn split_lrap(
    x: ArrayView2<f32>,
    tags: &[Vec<String>],
    hashes: &[String],
    method: Box<dyn TagScorer>,
) -> anyhow::Result<f64> {
    let options = EvalOptions {
        seed: SPLIT_SEED,
        ..EvalOptions::default()
    };
    let name = method.name().to_string();
    let report = evaluate(x, tags, hashes, &options, &mut [method], &mut |_| {})?;
    report
        .methods
        .get(&name)
        .map(|m| m.lrap)
        .with_context(|| format!("the evaluation report lacks method {name}"))
}

const SPLIT_SEED: u64 = 7;

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
        let Tagged {
            paths,
            tags,
            hashes,
            left_out,
        } = tagged_pictures(&folder)?;
        let vocab = TagColumns::from_items(tags.iter().map(Vec::as_slice));
        let truth: Vec<Vec<usize>> = tags.iter().map(|t| vocab.encode(t)).collect();
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
            "\n{set}: {n} pictures ({left_out} files left out), {} tags ({} on >= 2 pictures); {d} features ({cd} colour + {} patch); learn {learned:.1} s ({iterations} k-means updates), features {featured:.1} s",
            vocab.len(),
            counts.iter().filter(|&&c| c >= 2).count(),
            d - cd
        );
        let every_tag = vec![true; vocab.len()];
        let frequent: Vec<bool> = counts.iter().map(|&c| c >= 2).collect();
        let loo_x = Standardiser::fit(x.view()).apply(x.view());
        if let Some(dir) = &args.dump {
            dump_features(dir, set, x.view(), cd, &paths, &tags)?;
        }

        println!(
            "{:<22} {:>9} {:>13} {:>10}",
            "method", "LOO LRAP", "LOO tags>=2", "split LRAP"
        );
        pool.install(|| -> anyhow::Result<()> {
            let prior = loo_prior(&truth, vocab.len());
            println!(
                "{:<22} {:>9.3} {:>13.3} {:>10.3}",
                "tag-frequency prior",
                mean_lrap(prior.view(), &truth, &every_tag),
                mean_lrap(prior.view(), &truth, &frequent),
                split_lrap(x.view(), &tags, &hashes, Box::new(PriorScorer::default()))?,
            );
            let blocks: [(&str, std::ops::Range<usize>); 3] = [
                ("kNN colour", 0..cd),
                ("kNN patches", cd..d),
                ("kNN colour+patches", 0..d),
            ];
            for (name, cols) in blocks {
                let loo = knn_leave_one_out_scores(
                    loo_x.slice(s![.., cols.clone()]),
                    &truth,
                    vocab.len(),
                    args.k,
                );
                let knn = KnnScorer::with_k_candidates(vec![args.k]);
                println!(
                    "{name:<22} {:>9.3} {:>13.3} {:>10.3}",
                    mean_lrap(loo.view(), &truth, &every_tag),
                    mean_lrap(loo.view(), &truth, &frequent),
                    split_lrap(x.slice(s![.., cols]), &tags, &hashes, Box::new(knn))?,
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
    use ndarray::array;

    #[test]
    fn mean_lrap_restricts_to_kept_tags_and_skips_pictures_without_one() {
        // Worked by hand with scikit-learn's LRAP definition (ties count against).
        let truth = vec![vec![0, 2], vec![0, 1], vec![1]];
        let scores = array![[3.0f32, 2.0, 1.0], [3.0, 2.0, 1.0], [3.0, 2.0, 1.0]];
        let all = mean_lrap(scores.view(), &truth, &[true; 3]);
        // picture 0 → (1/1 + 2/3)/2, picture 1 → 1, picture 2 → 1/2
        assert!((all - ((1.0 + 2.0 / 3.0) / 2.0 + 1.0 + 0.5) / 3.0).abs() < 1e-12);
        // tag 2 dropped: picture 0 → 1, picture 1 → every kept tag relevant → 1, picture 2 → 1/2
        let kept = mean_lrap(scores.view(), &truth, &[true, true, false]);
        assert!((kept - (1.0 + 1.0 + 0.5) / 3.0).abs() < 1e-12);
        // only tag 0 kept: picture 2 has none of it and is left out, the others score 1
        let only = mean_lrap(scores.view(), &truth, &[true, false, false]);
        assert!((only - 1.0).abs() < 1e-12);
    }

    #[test]
    fn loo_prior_leaves_each_pictures_own_tags_out() {
        let truth = vec![vec![0, 1], vec![0], vec![2]];
        let p = loo_prior(&truth, 3);
        assert_eq!(
            p,
            array![[1.0f32, 0.0, 1.0], [1.0, 1.0, 1.0], [2.0, 1.0, 0.0]]
        );
    }

    #[test]
    fn dumped_features_read_back_row_by_row() {
        let dir = tempfile::tempdir().unwrap();
        let x = array![[1.0f32, -2.5, 0.0], [3.0, 4.0, 1e-3]];
        let paths = [PathBuf::from("a b.png"), PathBuf::from("c.png")];
        let tags = [
            vec!["sky".to_string(), "sea".to_string()],
            vec!["cat".to_string()],
        ];
        dump_features(dir.path(), "set", x.view(), 1, &paths, &tags).unwrap();
        let raw = std::fs::read(dir.path().join("set.f32")).unwrap();
        let back: Vec<f32> = raw
            .chunks_exact(4)
            .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
            .collect();
        assert_eq!(back, x.iter().copied().collect::<Vec<_>>());
        let listing = std::fs::read_to_string(dir.path().join("set.tsv")).unwrap();
        assert_eq!(listing, "2 3 1\na b.png\tsky,sea\nc.png\tcat\n");
    }

    #[test]
    fn pictures_and_tags_are_found_as_the_scan_finds_them() {
        let dir = tempfile::tempdir().unwrap();
        let png = |name: &str, shade: u8| {
            image::RgbImage::from_pixel(4, 4, image::Rgb([shade, 0, 0]))
                .save(dir.path().join(name))
                .unwrap();
        };
        png("b.png", 1);
        png("a.png", 2);
        png("untagged.png", 3);
        std::fs::write(dir.path().join("b.txt"), "Red  Apple\nfruit, red apple\n").unwrap();
        std::fs::write(dir.path().join("a.txt"), "# a comment\nSky\n").unwrap();
        std::fs::write(dir.path().join("notes.md"), "not a picture").unwrap();
        let t = tagged_pictures(dir.path()).unwrap();
        let names: Vec<_> = t.paths.iter().map(|p| p.file_name().unwrap()).collect();
        assert_eq!(names, ["a.png", "b.png"]);
        assert_eq!(t.tags, [vec!["sky"], vec!["red-apple", "fruit"]]);
        assert_eq!(t.hashes.len(), 2);
        assert_ne!(t.hashes[0], t.hashes[1]);
        assert_eq!(t.left_out, 1);
    }
}
