//! How tagweave fares with many pictures, without decoding a million files.
//!
//! 1. Scans a real collection (the demo archive by default) with the real binary and reads
//!    back its feature vectors, tags and learned extractor.
//! 2. Builds a store of `--pictures` pictures through the store's own API: each picture's
//!    features are a real picture's, perturbed (seeded uniform noise of ±`--noise` times
//!    that feature's spread), a `--tagged-share` of them tagged — the source picture's tags
//!    plus one to three of `--vocabulary` further tags drawn Zipf-like — under made-up paths
//!    (no picture file exists; queries read what the store holds).
//! 3. Runs tagweave's commands on it through the real binary, one process each, and reports
//!    wall time and peak resident memory (`wait4`), stopping any that passes `--memory-cap-gb`
//!    or `--time-limit-min`. Then starts `tagweave serve --read-only` on it and times its
//!    start-up and its main pages, one request at a time (`serve.rs`).
//!
//! With `--scan-flatness`, instead: generates `--scan-pictures` JPEG pictures and times the
//! real `tagweave scan` on the first `--scan-first` of them and on all, to show whether
//! pictures/s and memory stay flat as the folder grows (`scan.rs`).
//!
//! ```sh
//! cargo build --release -p tagweave -p tagweave-scale-bench
//! target/release/scale-bench --pictures 1000000 --work /tmp/scale
//! target/release/scale-bench --pictures 100000 --work /tmp/scale --only serve
//! target/release/scale-bench --scan-flatness --scan-pictures 20000 --work /tmp/scale
//! ```
//!
//! Figures go to BENCHMARKS.md ("How big does it get").

mod scan;
mod serve;

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{bail, ensure, Context};
use clap::Parser;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde_json::{json, Value};
use tagweave_collection::{item_id, FileStamp, ImageFormat, ItemRecord};
use tagweave_store::{FeatureTable, Store, EXTRACTOR_BLOB, FEATURES};

#[derive(Parser)]
#[command(about = "Times tagweave's commands on a store of many pictures")]
struct Args {
    /// Pictures in the built store.
    #[arg(long, default_value_t = 1_000_000)]
    pictures: usize,
    /// Share of them that carry tags.
    #[arg(long, default_value_t = 0.1)]
    tagged_share: f64,
    /// Further tags, drawn with chance ∝ 1 / rank (Zipf-like), beside the source's own.
    #[arg(long, default_value_t = 300)]
    vocabulary: usize,
    /// Uniform noise added to each feature, as a share of that feature's spread.
    #[arg(long, default_value_t = 0.05)]
    noise: f32,
    /// The real collection whose pictures' features are copied and perturbed.
    #[arg(long, default_value = "demo-collection")]
    source: PathBuf,
    /// Working folder (the source copy and the built store go there; reused if built).
    #[arg(long, default_value = "/tmp/tagweave-scale")]
    work: PathBuf,
    /// The tagweave binary to time.
    #[arg(long, default_value = "target/release/tagweave")]
    tagweave: PathBuf,
    #[arg(long, default_value_t = 7)]
    seed: u64,
    /// Stop a command whose resident memory passes this many GB.
    #[arg(long, default_value_t = 20.0)]
    memory_cap_gb: f64,
    /// Stop a command that runs longer than this many minutes.
    #[arg(long, default_value_t = 90.0)]
    time_limit_min: f64,
    /// Build the store only.
    #[arg(long)]
    build_only: bool,
    /// Time only these of the commands (comma-separated: train, tags, find, suggest,
    /// shift, audit, serve); all when not given.
    #[arg(long, value_delimiter = ',')]
    only: Vec<String>,
    /// Instead of the store of `--pictures`: generate pictures and time real scans of a
    /// few of them and of all.
    #[arg(long)]
    scan_flatness: bool,
    /// Pictures generated for `--scan-flatness`.
    #[arg(long, default_value_t = 20_000)]
    scan_pictures: usize,
    /// The smaller scans of `--scan-flatness`: the first this many of the generated
    /// pictures, each in a folder of its own (comma-separated, rising).
    #[arg(long, value_delimiter = ',', default_values_t = [400, 4000])]
    scan_first: Vec<usize>,
}

/// Pictures written per store batch.
const BATCH: usize = 2_000;

fn main() -> anyhow::Result<()> {
    let args = Args::parse();
    ensure!(args.pictures > 0, "--pictures must be positive");
    let tagweave = std::fs::canonicalize(&args.tagweave).with_context(|| {
        format!(
            "{} not found; build it with `cargo build --release -p tagweave`",
            args.tagweave.display()
        )
    })?;
    if args.scan_flatness {
        let report = scan::scan_flatness(&args, &tagweave)?;
        println!("{}", serde_json::to_string_pretty(&report)?);
        print_scan_table(&report);
        return Ok(());
    }
    let archive = args.work.join(format!("archive-{}", args.pictures));
    let mut report = json!({ "pictures": args.pictures, "seed": args.seed });
    if archive.join(".tagweave/db").exists() {
        eprintln!("reusing the store built earlier in {}", archive.display());
    } else {
        let source = source_features(&args, &tagweave)?;
        report["build"] = build_store(&args, &archive, &source)?;
    }
    report["store_on_disk_mb"] = json!(dir_size(&archive.join(".tagweave")) as f64 / 1e6);
    if !args.build_only {
        report["commands"] = time_commands(&args, &tagweave, &archive)?;
    }
    println!("{}", serde_json::to_string_pretty(&report)?);
    print_table(&report);
    Ok(())
}

/// The figures as a Markdown table on standard error, for BENCHMARKS.md.
fn print_table(report: &Value) {
    eprintln!(
        "\n{} pictures; store on disk {:.0} MB",
        report["pictures"],
        report["store_on_disk_mb"].as_f64().unwrap_or(0.0)
    );
    eprintln!("| command | wall | peak RSS | result |\n| --- | --- | --- | --- |");
    for c in report["commands"].as_array().into_iter().flatten() {
        let f = &c["figures"];
        let result = match (f["stopped"].as_str(), f["exit_code"].as_i64()) {
            _ if f["result"].is_string() => f["result"].as_str().unwrap_or("").to_string(),
            (Some(why), _) => format!("stopped: {why}"),
            (None, Some(0)) => "done".to_string(),
            (None, code) => format!("exit {code:?}: {}", f["last_words"].as_str().unwrap_or("")),
        };
        let seconds = f["seconds"].as_f64().unwrap_or(0.0);
        let wall = if seconds < 1.0 {
            format!("{:.0} ms", seconds * 1000.0)
        } else {
            format!("{seconds:.2} s")
        };
        eprintln!(
            "| {} | {wall} | {:.0} MB | {result} |",
            c["command"].as_str().unwrap_or(""),
            f["peak_rss_mb"].as_f64().unwrap_or(0.0)
        );
    }
}

/// The scan-flatness figures as a Markdown table on standard error.
fn print_scan_table(report: &Value) {
    eprintln!(
        "\n{} generated pictures ({}, {:.0} MB, {} with a text sidecar)",
        report["pictures"],
        report["size"].as_str().unwrap_or(""),
        report["picture_mb"].as_f64().unwrap_or(0.0),
        report["generation"]["sidecars"]
    );
    eprintln!(
        "| scan | wall | pictures/s | pictures/s past the smaller scan | peak RSS | RSS max by quarter of the run | load before → after |\n\
         | --- | --- | --- | --- | --- | --- | --- |"
    );
    for r in report["runs"].as_array().into_iter().flatten() {
        let quarters: Vec<String> = r["rss_mb_by_quarter_of_wall_time"]
            .as_array()
            .into_iter()
            .flatten()
            .map(|q| format!("{:.0}", q.as_f64().unwrap_or(0.0)))
            .collect();
        let marginal = r["marginal_pictures_per_s"]
            .as_f64()
            .map_or("—".to_string(), |m| format!("{m:.1}"));
        eprintln!(
            "| {} pictures | {:.1} s | {:.1} | {marginal} | {:.0} MB | {} MB | {} → {} |",
            r["pictures"],
            r["figures"]["seconds"].as_f64().unwrap_or(0.0),
            r["pictures_per_s"].as_f64().unwrap_or(0.0),
            r["figures"]["peak_rss_mb"].as_f64().unwrap_or(0.0),
            quarters.join(" / "),
            r["loadavg_before"].as_str().unwrap_or("?"),
            r["loadavg_after"].as_str().unwrap_or("?"),
        );
    }
    eprintln!(
        "all against the first scan: pictures/s ×{:.3}, pictures/s past the smaller scan ×{:.3} \
         (against the second scan's), peak RSS ×{:.3}",
        report["rate_all_over_first"].as_f64().unwrap_or(f64::NAN),
        report["marginal_rate_last_over_first"]
            .as_f64()
            .unwrap_or(f64::NAN),
        report["peak_rss_all_over_first"]
            .as_f64()
            .unwrap_or(f64::NAN)
    );
}

/// The 1-, 5- and 15-minute load averages, as `/proc/loadavg` says them.
pub(crate) fn loadavg() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map(|l| l.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
        .unwrap_or_default()
}

/// What the built store copies: real pictures' features and tags, and their extractor.
struct Source {
    features: Vec<Vec<f32>>,
    tags: Vec<Vec<String>>,
    spread: Vec<f32>,
    extractor: Value,
}

fn source_features(args: &Args, tagweave: &Path) -> anyhow::Result<Source> {
    let copy = args.work.join("source");
    if !copy.exists() {
        copy_folder(&args.source, &copy)?;
    }
    eprintln!("scanning {} with {}…", copy.display(), tagweave.display());
    let scan = Command::new(tagweave)
        .args(["scan", "."])
        .current_dir(&copy)
        .stdout(Stdio::null())
        .status()?;
    ensure!(scan.success(), "scanning the source failed");
    let store = Store::open(&copy.join(".tagweave"))?;
    let table = FeatureTable::load(&store)?;
    let extractor: Value = store
        .blob(EXTRACTOR_BLOB)?
        .context("the source store holds no feature extractor")?;
    let (n, d) = table.features.dim();
    ensure!(n > 0, "the source has no pictures with features");
    let spread = (0..d)
        .map(|j| {
            let column = table.features.column(j);
            let (lo, hi) = column
                .iter()
                .fold((f32::INFINITY, f32::NEG_INFINITY), |(lo, hi), &v| {
                    (lo.min(v), hi.max(v))
                });
            hi - lo
        })
        .collect();
    Ok(Source {
        features: table
            .features
            .rows()
            .into_iter()
            .map(|r| r.to_vec())
            .collect(),
        tags: table.items.iter().map(|i| i.tags.clone()).collect(),
        spread,
        extractor,
    })
}

fn build_store(args: &Args, archive: &Path, source: &Source) -> anyhow::Result<Value> {
    std::fs::create_dir_all(archive)?;
    let store = Store::open_or_create(&archive.join(".tagweave"), archive)?;
    store.put_blob(EXTRACTOR_BLOB, &source.extractor)?;
    // Zipf-like draws over the further tags: cumulative 1 / rank.
    let weights: Vec<f64> = (1..=args.vocabulary).map(|r| 1.0 / r as f64).collect();
    let total: f64 = weights.iter().sum();
    let cumulative: Vec<f64> = weights
        .iter()
        .scan(0.0, |acc, w| {
            *acc += w / total;
            Some(*acc)
        })
        .collect();
    let started = Instant::now();
    let (mut items_s, mut vectors_s) = (0.0, 0.0);
    for start in (0..args.pictures).step_by(BATCH) {
        let end = (start + BATCH).min(args.pictures);
        let made: Vec<(ItemRecord, Vec<f32>)> = (start..end)
            .into_par_iter()
            .map(|i| picture(args, source, &cumulative, i))
            .collect();
        let (items, rows): (Vec<ItemRecord>, Vec<(String, Vec<f32>)>) = made
            .into_iter()
            .map(|(item, features)| {
                let id = item.id.clone();
                (item, (id, features))
            })
            .unzip();
        let t = Instant::now();
        store.update_items(&items, &[])?;
        items_s += t.elapsed().as_secs_f64();
        let t = Instant::now();
        store.put_vectors(FEATURES, &rows)?;
        vectors_s += t.elapsed().as_secs_f64();
        if (end / BATCH).is_multiple_of(25) || end == args.pictures {
            eprintln!(
                "  built {end}/{} pictures ({:.0} s)",
                args.pictures,
                started.elapsed().as_secs_f64()
            );
        }
    }
    drop(store);
    Ok(json!({
        "seconds": started.elapsed().as_secs_f64(),
        "writing_items_s": items_s,
        "writing_features_s": vectors_s,
        "source_pictures": source.features.len(),
        "dimension": source.spread.len(),
    }))
}

/// Picture `i`: a seeded pick of a source picture, perturbed, maybe tagged.
fn picture(args: &Args, source: &Source, cumulative: &[f64], i: usize) -> (ItemRecord, Vec<f32>) {
    let mut rng = ChaCha8Rng::seed_from_u64(args.seed ^ (i as u64).wrapping_mul(0x9e37_79b9));
    let from = rng.random_range(0..source.features.len());
    let features = source.features[from]
        .iter()
        .zip(&source.spread)
        .map(|(&v, &s)| v + args.noise * s * (rng.random::<f32>() * 2.0 - 1.0))
        .collect();
    let mut tags = Vec::new();
    if rng.random_bool(args.tagged_share) {
        tags.extend(source.tags[from].iter().cloned());
        for _ in 0..rng.random_range(1..=3) {
            let u: f64 = rng.random();
            let rank = cumulative.partition_point(|&c| c < u);
            let tag = format!("subject-{rank:03}");
            if !tags.contains(&tag) {
                tags.push(tag);
            }
        }
    }
    let rel_path = synthetic_path(i);
    let item = ItemRecord {
        id: item_id(&rel_path),
        content_hash: blake3::hash(rel_path.as_bytes()).to_hex().to_string(),
        rel_path,
        format: ImageFormat::Jpeg,
        stamp: FileStamp {
            size: 0,
            mtime_ns: 0,
        },
        sidecars: Vec::new(),
        tags,
        accepted: Vec::new(),
    };
    (item, features)
}

/// The made-up path of the built store's picture `i`.
fn synthetic_path(i: usize) -> String {
    format!("synthetic/{:04}/{i:07}.jpg", i / 1000)
}

fn time_commands(args: &Args, tagweave: &Path, archive: &Path) -> anyhow::Result<Value> {
    let new_file = std::fs::read_dir(args.work.join("source/1970s"))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.extension().is_some_and(|e| e == "jpg"))
        .context("no JPEG in the source's 1970s folder to suggest for")?;
    let new_file = new_file.to_string_lossy().into_owned();
    let commands: Vec<(&str, Vec<&str>)> = vec![
        ("train", vec!["train", "--json"]),
        ("tags", vec!["tags", "--json"]),
        (
            "find (open + first query)",
            vec!["find", "subject-000", "--json"],
        ),
        (
            "find, two tags",
            vec!["find", "subject-001", "subject-002", "--json"],
        ),
        (
            "suggest an indexed picture",
            vec!["suggest", "synthetic/0000/0000001.jpg", "--json"],
        ),
        ("suggest a new file", vec!["suggest", &new_file, "--json"]),
        (
            "shift",
            vec![
                "shift",
                "synthetic/0000/0000002.jpg",
                "--away",
                "subject-000",
                "--toward",
                "subject-001",
                "--json",
            ],
        ),
        ("audit", vec!["audit", "--json"]),
    ];
    let wanted = |argv: &[&str]| args.only.is_empty() || args.only.iter().any(|o| o == argv[0]);
    let mut out = Vec::new();
    for (name, argv) in commands {
        if !wanted(&argv) {
            continue;
        }
        eprintln!("running tagweave {}…", argv.join(" "));
        let figures = run_measured(args, tagweave, archive, &argv)?.figures;
        eprintln!("  {figures}");
        out.push(json!({ "command": name, "args": argv, "figures": figures }));
    }
    if wanted(&["serve"]) {
        out.extend(serve::time_serve(
            tagweave,
            archive,
            args.seed,
            synthetic_path,
        )?);
    }
    Ok(Value::Array(out))
}

/// What [`run_measured`] saw of one command.
pub(crate) struct Measured {
    /// Wall time, peak RSS (wait4), exit code, why it was stopped, its last words.
    figures: Value,
    stdout: String,
    /// (seconds since start, resident kB), every 100 ms.
    samples: Vec<(f64, u64)>,
}

/// Runs one command and measures it.
pub(crate) fn run_measured(
    args: &Args,
    tagweave: &Path,
    cwd: &Path,
    argv: &[&str],
) -> anyhow::Result<Measured> {
    let started = Instant::now();
    let mut child = Command::new(tagweave)
        .args(argv)
        .current_dir(cwd)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()?;
    let pid = child.id();
    let stdout = child.stdout.take();
    let out = std::thread::spawn(move || {
        let mut text = String::new();
        if let Some(mut s) = stdout {
            let _ = std::io::Read::read_to_string(&mut s, &mut text);
        }
        text
    });
    let stderr = child.stderr.take();
    let tail = std::thread::spawn(move || {
        let mut text = String::new();
        if let Some(mut s) = stderr {
            let _ = std::io::Read::read_to_string(&mut s, &mut text);
        }
        text.lines().rev().take(3).collect::<Vec<_>>().join(" | ")
    });
    let done = Arc::new(AtomicBool::new(false));
    let stopped = Arc::new(AtomicU64::new(0)); // 1: memory cap, 2: time limit
    let watch = {
        let (done, stopped) = (Arc::clone(&done), Arc::clone(&stopped));
        let cap_kb = (args.memory_cap_gb * 1e6) as u64;
        let limit = Duration::from_secs_f64(args.time_limit_min * 60.0);
        std::thread::spawn(move || {
            let mut samples = Vec::new();
            while !done.load(Ordering::Relaxed) {
                let rss = rss_kb(pid).unwrap_or(0);
                samples.push((started.elapsed().as_secs_f64(), rss));
                let why = if rss > cap_kb {
                    1
                } else if started.elapsed() > limit {
                    2
                } else {
                    0
                };
                if why > 0 {
                    stopped.store(why, Ordering::Relaxed);
                    // SAFETY: `pid` is our own child, not yet waited for.
                    unsafe { libc::kill(pid as libc::pid_t, libc::SIGKILL) };
                    return samples;
                }
                std::thread::sleep(Duration::from_millis(10));
            }
            samples
        })
    };
    let mut status = 0;
    // SAFETY: plain wait4 on our own child; `usage` is written by the kernel.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let waited = unsafe { libc::wait4(pid as libc::pid_t, &mut status, 0, &mut usage) };
    done.store(true, Ordering::Relaxed);
    let samples = watch.join().unwrap_or_default();
    if waited < 0 {
        bail!("waiting for tagweave failed");
    }
    let seconds = started.elapsed().as_secs_f64();
    let code = libc::WIFEXITED(status).then(|| libc::WEXITSTATUS(status));
    let stopped = match stopped.load(Ordering::Relaxed) {
        1 => Some(format!("resident memory passed {} GB", args.memory_cap_gb)),
        2 => Some(format!("ran past {} min", args.time_limit_min)),
        _ => None,
    };
    Ok(Measured {
        figures: json!({
            "seconds": seconds,
            "peak_rss_mb": usage.ru_maxrss as f64 / 1000.0,
            "exit_code": code,
            "stopped": stopped,
            "last_words": tail.join().unwrap_or_default(),
        }),
        stdout: out.join().unwrap_or_default(),
        samples,
    })
}

fn rss_kb(pid: u32) -> Option<u64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = status.lines().find(|l| l.starts_with("VmRSS:"))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

fn copy_folder(from: &Path, to: &Path) -> anyhow::Result<()> {
    std::fs::create_dir_all(to)?;
    for entry in std::fs::read_dir(from).with_context(|| format!("reading {}", from.display()))? {
        let entry = entry?;
        let name = entry.file_name();
        if name == ".tagweave" {
            continue;
        }
        let target = to.join(&name);
        if entry.file_type()?.is_dir() {
            copy_folder(&entry.path(), &target)?;
        } else {
            std::fs::copy(entry.path(), &target)?;
        }
    }
    Ok(())
}

fn dir_size(dir: &Path) -> u64 {
    std::fs::read_dir(dir)
        .map(|entries| {
            entries
                .filter_map(Result::ok)
                .map(|e| match e.file_type() {
                    Ok(t) if t.is_dir() => dir_size(&e.path()),
                    _ => e.metadata().map_or(0, |m| m.len()),
                })
                .sum()
        })
        .unwrap_or(0)
}
