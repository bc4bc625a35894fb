//! Scan speed and memory as the folder grows: generated JPEG pictures (seeded colour
//! fields, shapes and noise; some with a text sidecar of tags), scanned by the real binary
//! from a fresh store, first the first `small` of them in a folder of their own, then all.

use std::path::{Path, PathBuf};

use anyhow::{ensure, Context};
use image::codecs::jpeg::JpegEncoder;
use image::{Rgb, RgbImage};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde_json::{json, Value};

use crate::{loadavg, run_measured, Args, Measured};

pub const WIDTH: u32 = 640;
pub const HEIGHT: u32 = 480;
/// Pictures per folder of the generated collection.
const PER_FOLDER: usize = 500;
/// Share of pictures with a text sidecar.
const SIDECAR_SHARE: f64 = 0.3;
const WORDS: [&str; 24] = [
    "harbour", "boats", "cliffs", "sea", "sunset", "market", "street", "night", "snow", "forest",
    "field", "bridge", "tower", "garden", "rain", "festival", "portrait", "dog", "train", "river",
    "beach", "winter", "summer", "lights",
];

pub fn scan_flatness(args: &Args, tagweave: &Path) -> anyhow::Result<Value> {
    let n = args.scan_pictures;
    let mut sizes: Vec<usize> = args.scan_first.iter().copied().filter(|&s| s < n).collect();
    sizes.sort_unstable();
    sizes.dedup();
    ensure!(
        sizes.first().is_some_and(|&s| s > 0),
        "--scan-first needs a positive size below --scan-pictures"
    );
    let all = args.work.join(format!("scan-{n}-seed{}", args.seed));
    let generated = generate(args, &all, n)?;
    let picture_bytes = folder_bytes(&all);
    let mut folders = Vec::new();
    for &size in &sizes {
        let folder = args
            .work
            .join(format!("scan-first-{size}-of-{n}-seed{}", args.seed));
        link_first(&all, &folder, size)?;
        folders.push((folder, size));
    }
    folders.push((all, n));

    let mut runs: Vec<Value> = Vec::new();
    for (folder, pictures) in &folders {
        let store = folder.join(".tagweave");
        if store.exists() {
            std::fs::remove_dir_all(&store)?;
        }
        let load_before = loadavg();
        eprintln!("running tagweave scan . --json in {}…", folder.display());
        let Measured {
            figures,
            stdout,
            samples,
        } = run_measured(args, tagweave, folder, &["scan", ".", "--json"])?;
        eprintln!("  {figures}");
        let report: Value = serde_json::from_str(&stdout).unwrap_or(Value::Null);
        ensure!(
            report["items"].as_u64() == Some(*pictures as u64),
            "the scan of {} indexed {} pictures, not {pictures}: {figures}",
            folder.display(),
            report["items"]
        );
        let seconds = figures["seconds"].as_f64().unwrap_or(f64::NAN);
        // Past the fixed start (store made, extractor learned from a sample): the pictures
        // beyond the previous scan's over the time beyond it.
        let marginal = runs.last().map(|previous| {
            let more = *pictures as f64 - previous["pictures"].as_f64().unwrap_or(0.0);
            let longer = seconds - previous["figures"]["seconds"].as_f64().unwrap_or(0.0);
            more / longer
        });
        runs.push(json!({
            "pictures": pictures,
            "figures": figures,
            "pictures_per_s": *pictures as f64 / seconds,
            "marginal_pictures_per_s": marginal,
            "scan_report": report,
            "rss_mb_by_quarter_of_wall_time": quarters(&samples),
            "loadavg_before": load_before,
            "loadavg_after": loadavg(),
        }));
    }
    let last = runs.len() - 1;
    let ratio = |key: &[&str], a: usize, b: usize| {
        let get = |i: usize| {
            key.iter()
                .fold(&runs[i], |v, k| &v[*k])
                .as_f64()
                .unwrap_or(f64::NAN)
        };
        get(a) / get(b)
    };
    Ok(json!({
        "pictures": n,
        "first": sizes,
        "size": format!("{WIDTH}x{HEIGHT}"),
        "picture_mb": picture_bytes as f64 / 1e6,
        "generation": generated,
        "rate_all_over_first": ratio(&["pictures_per_s"], last, 0),
        "marginal_rate_last_over_first": if last >= 2 {
            ratio(&["marginal_pictures_per_s"], last, 1)
        } else {
            f64::NAN
        },
        "peak_rss_all_over_first": ratio(&["figures", "peak_rss_mb"], last, 0),
        "runs": runs,
    }))
}

/// The largest resident memory seen in each quarter of the run's wall time, in MB.
fn quarters(samples: &[(f64, u64)]) -> Vec<f64> {
    let Some(&(end, _)) = samples.last() else {
        return Vec::new();
    };
    (0..4)
        .map(|q| {
            let (lo, hi) = (end * q as f64 / 4.0, end * (q + 1) as f64 / 4.0);
            samples
                .iter()
                .filter(|(t, _)| *t >= lo && *t <= hi)
                .map(|&(_, kb)| kb as f64 / 1000.0)
                .fold(0.0, f64::max)
        })
        .collect()
}

/// Writes the `n` pictures (and their sidecars) unless a finished set is there already.
fn generate(args: &Args, folder: &Path, n: usize) -> anyhow::Result<Value> {
    let done = folder.with_extension("done");
    if done.exists() {
        eprintln!(
            "reusing the pictures generated earlier in {}",
            folder.display()
        );
        return Ok(serde_json::from_slice(&std::fs::read(&done)?)?);
    }
    if folder.exists() {
        std::fs::remove_dir_all(folder)?;
    }
    eprintln!(
        "generating {n} pictures of {WIDTH}×{HEIGHT} in {}…",
        folder.display()
    );
    let started = std::time::Instant::now();
    let seed = args.seed;
    let written = std::sync::atomic::AtomicUsize::new(0);
    let sidecars: usize = (0..n)
        .into_par_iter()
        .map(|i| -> anyhow::Result<usize> {
            let sidecar = write_picture(folder, seed, i)?;
            let k = written.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
            if k.is_multiple_of(2000) {
                eprintln!("  {k}/{n} ({:.0} s)", started.elapsed().as_secs_f64());
            }
            Ok(usize::from(sidecar))
        })
        .sum::<anyhow::Result<usize>>()?;
    let summary = json!({
        "seconds": started.elapsed().as_secs_f64(),
        "sidecars": sidecars,
        "seed": seed,
    });
    std::fs::write(&done, serde_json::to_vec(&summary)?)?;
    Ok(summary)
}

fn rel_path(i: usize) -> PathBuf {
    PathBuf::from(format!("{:03}/pic-{i:06}.jpg", i / PER_FOLDER))
}

/// Picture `i`: a gradient field, a few shapes, grain; a text sidecar for some. Returns
/// whether it has a sidecar.
fn write_picture(folder: &Path, seed: u64, i: usize) -> anyhow::Result<bool> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ (i as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15));
    let bytes = jpeg(&mut rng)?;
    let path = folder.join(rel_path(i));
    std::fs::create_dir_all(path.parent().context("a picture has a folder")?)?;
    std::fs::write(&path, bytes).with_context(|| format!("writing {}", path.display()))?;
    if rng.random_bool(SIDECAR_SHARE) {
        let count = rng.random_range(1..=4);
        let mut tags: Vec<&str> = Vec::new();
        while tags.len() < count {
            let w = WORDS[rng.random_range(0..WORDS.len())];
            if !tags.contains(&w) {
                tags.push(w);
            }
        }
        std::fs::write(path.with_extension("txt"), tags.join(", ") + "\n")?;
        return Ok(true);
    }
    Ok(false)
}

/// A generated picture as JPEG bytes (quality 85).
pub fn jpeg(rng: &mut ChaCha8Rng) -> anyhow::Result<Vec<u8>> {
    let mut bytes = Vec::new();
    JpegEncoder::new_with_quality(&mut bytes, 85).encode_image(&paint(rng))?;
    Ok(bytes)
}

fn colour(rng: &mut ChaCha8Rng) -> [f32; 3] {
    [rng.random(), rng.random(), rng.random()].map(|c: f32| c * 255.0)
}

fn paint(rng: &mut ChaCha8Rng) -> RgbImage {
    let (a, b) = (colour(rng), colour(rng));
    let angle: f32 = rng.random::<f32>() * std::f32::consts::TAU;
    let (dx, dy) = (angle.cos(), angle.sin());
    let span = (WIDTH as f32).hypot(HEIGHT as f32);
    let mut img = RgbImage::from_fn(WIDTH, HEIGHT, |x, y| {
        let t = ((x as f32 - WIDTH as f32 / 2.0) * dx + (y as f32 - HEIGHT as f32 / 2.0) * dy)
            / span
            + 0.5;
        Rgb(std::array::from_fn(|c| (a[c] + (b[c] - a[c]) * t) as u8))
    });
    for _ in 0..rng.random_range(2..=12) {
        let c = colour(rng);
        let (cx, cy) = (
            rng.random_range(0..WIDTH) as f32,
            rng.random_range(0..HEIGHT) as f32,
        );
        let (rx, ry) = (
            rng.random_range(10.0..WIDTH as f32 / 3.0),
            rng.random_range(10.0..HEIGHT as f32 / 3.0),
        );
        let kind = rng.random_range(0..3);
        let stripe = rng.random_range(4.0..24.0f32);
        let (x0, x1) = (
            (cx - rx).max(0.0) as u32,
            (cx + rx).min(WIDTH as f32) as u32,
        );
        let (y0, y1) = (
            (cy - ry).max(0.0) as u32,
            (cy + ry).min(HEIGHT as f32) as u32,
        );
        for y in y0..y1 {
            for x in x0..x1 {
                let (u, v) = ((x as f32 - cx) / rx, (y as f32 - cy) / ry);
                let inside = match kind {
                    0 => true,                                                        // rectangle
                    1 => u * u + v * v <= 1.0,                                        // ellipse
                    _ => (((x as f32 + y as f32) / stripe) as u32).is_multiple_of(2), // stripes
                };
                if inside {
                    img.put_pixel(x, y, Rgb(c.map(|v| v as u8)));
                }
            }
        }
    }
    let grain: f32 = rng.random_range(0.0..24.0);
    if grain > 0.0 {
        for p in img.pixels_mut() {
            let d = (rng.random::<f32>() - 0.5) * 2.0 * grain;
            for v in p.0.iter_mut() {
                *v = (*v as f32 + d).clamp(0.0, 255.0) as u8;
            }
        }
    }
    img
}

/// `first` holds the first `small` pictures of `all` (hard links, sidecars included).
fn link_first(all: &Path, first: &Path, small: usize) -> anyhow::Result<()> {
    if first.exists() {
        std::fs::remove_dir_all(first)?;
    }
    for i in 0..small {
        let rel = rel_path(i);
        for rel in [rel.clone(), rel.with_extension("txt")] {
            let from = all.join(&rel);
            if !from.exists() {
                continue;
            }
            let to = first.join(&rel);
            std::fs::create_dir_all(to.parent().context("a picture has a folder")?)?;
            if std::fs::hard_link(&from, &to).is_err() {
                std::fs::copy(&from, &to)?;
            }
        }
    }
    Ok(())
}

fn folder_bytes(dir: &Path) -> u64 {
    walk(dir)
        .iter()
        .filter_map(|p| std::fs::metadata(p).ok())
        .map(|m| m.len())
        .sum()
}

fn walk(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for entry in std::fs::read_dir(dir).into_iter().flatten().flatten() {
        let path = entry.path();
        if entry.file_name() == ".tagweave" {
            continue;
        }
        if path.is_dir() {
            out.extend(walk(&path));
        } else {
            out.push(path);
        }
    }
    out
}
