//! Pictures per second on large JPEGs, against a bare full-size decode with the `image` crate,
//! for each JPEG decoder built (jpeg-decoder; libjpeg-turbo with the `turbojpeg` feature).

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use clap::Args;
use image::codecs::jpeg::JpegEncoder;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use tagweave_vision::{
    load_working_image, load_working_image_with, FeatureExtractor, FeatureOptions, JpegDecoder,
    WorkingImage,
};

use crate::FeatureArgs;

const CACHE: &str = "/tmp/tagweave-bench-jpegs";
const WIDTH: u32 = 4000;
const HEIGHT: u32 = 3000;

#[derive(Args)]
pub struct SpeedArgs {
    /// Use the JPEG/PNG pictures in this folder instead of generated 4000×3000 JPEGs.
    #[arg(long)]
    folder: Option<PathBuf>,
    /// Number of pictures.
    #[arg(long, default_value_t = 40)]
    count: usize,
    /// Worker threads (rayon) over pictures.
    #[arg(long, default_value_t = 2)]
    threads: usize,
    /// Timed passes per measurement; the fastest counts.
    #[arg(long, default_value_t = 2)]
    repeats: usize,
    /// Also print the K × stride × working-size table.
    #[arg(long)]
    table: bool,
    #[command(flatten)]
    features: FeatureArgs,
}

/// Smooth gradients, soft texture, hard-edged shapes and sensor-like noise: enough detail
/// that the JPEG's entropy-coded data is as heavy as a real photo's.
fn synthetic_photo(seed: u64) -> image::RgbImage {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let top: [f32; 3] = std::array::from_fn(|_| rng.random_range(40.0..220.0));
    let bottom: [f32; 3] = std::array::from_fn(|_| rng.random_range(20.0..200.0));
    let cell = 48usize;
    let (gw, gh) = (WIDTH as usize / cell + 2, HEIGHT as usize / cell + 2);
    let texture: Vec<f32> = (0..gw * gh)
        .map(|_| rng.random_range(-30.0..30.0))
        .collect();
    let shapes: Vec<([f32; 4], [f32; 3], bool)> = (0..40)
        .map(|_| {
            let cx = rng.random_range(0.0..WIDTH as f32);
            let cy = rng.random_range(0.0..HEIGHT as f32);
            let r = rng.random_range(60.0..600.0);
            let colour = std::array::from_fn(|_| rng.random_range(0.0..255.0));
            (
                [cx, cy, r, rng.random_range(4.0..40.0)],
                colour,
                rng.random_bool(0.5),
            )
        })
        .collect();
    let mut pixels = vec![0u8; (WIDTH * HEIGHT * 3) as usize];
    pixels
        .par_chunks_mut(WIDTH as usize * 3)
        .enumerate()
        .for_each(|(y, row)| {
            let mut noise = ChaCha8Rng::seed_from_u64(seed ^ (y as u64) << 20);
            let t = y as f32 / HEIGHT as f32;
            let (gy, fy) = (y / cell, (y % cell) as f32 / cell as f32);
            for x in 0..WIDTH as usize {
                let (gx, fx) = (x / cell, (x % cell) as f32 / cell as f32);
                let at = |i: usize, j: usize| texture[j * gw + i];
                let tex = (at(gx, gy) * (1.0 - fx) + at(gx + 1, gy) * fx) * (1.0 - fy)
                    + (at(gx, gy + 1) * (1.0 - fx) + at(gx + 1, gy + 1) * fx) * fy;
                let mut px: [f32; 3] =
                    std::array::from_fn(|c| top[c] * (1.0 - t) + bottom[c] * t + tex);
                for ([cx, cy, r, stripe], colour, round) in &shapes {
                    let (dx, dy) = (x as f32 - cx, y as f32 - cy);
                    let inside = if *round {
                        dx * dx + dy * dy < r * r
                    } else {
                        dx.abs() < *r && dy.abs() < r * 0.6
                    };
                    if inside {
                        let band = if ((dx + dy) / stripe) as i32 % 2 == 0 {
                            1.0
                        } else {
                            0.8
                        };
                        px = colour.map(|c| c * band);
                    }
                }
                let n: f32 = noise.random_range(-8.0..8.0);
                for c in 0..3 {
                    row[x * 3 + c] = (px[c] + n).clamp(0.0, 255.0) as u8;
                }
            }
        });
    image::RgbImage::from_raw(WIDTH, HEIGHT, pixels).unwrap_or_default()
}

/// The generated JPEGs, made once and kept in /tmp for later runs.
fn bench_jpegs(count: usize) -> anyhow::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(CACHE).with_context(|| format!("creating {CACHE}"))?;
    let paths: Vec<PathBuf> = (0..count)
        .map(|i| Path::new(CACHE).join(format!("bench-{i:03}-{WIDTH}x{HEIGHT}-q85.jpg")))
        .collect();
    let missing: Vec<&PathBuf> = paths.iter().filter(|p| !p.exists()).collect();
    if !missing.is_empty() {
        println!(
            "generating {} JPEGs of {WIDTH}x{HEIGHT} in {CACHE} ...",
            missing.len()
        );
        for (i, path) in paths.iter().enumerate().filter(|(_, p)| !p.exists()) {
            let photo = synthetic_photo(i as u64);
            let mut bytes = Vec::new();
            photo
                .write_with_encoder(JpegEncoder::new_with_quality(&mut bytes, 85))
                .context("encoding a benchmark JPEG")?;
            let partial = path.with_extension("part");
            std::fs::write(&partial, &bytes)
                .with_context(|| format!("writing {}", partial.display()))?;
            std::fs::rename(&partial, path)?;
        }
    }
    Ok(paths)
}

fn folder_pictures(folder: &Path, count: usize) -> anyhow::Result<Vec<PathBuf>> {
    let mut paths: Vec<PathBuf> = std::fs::read_dir(folder)
        .with_context(|| format!("reading {}", folder.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| {
            let ext = p
                .extension()
                .and_then(|e| e.to_str())
                .unwrap_or("")
                .to_lowercase();
            matches!(ext.as_str(), "jpg" | "jpeg" | "png")
        })
        .collect();
    paths.sort();
    paths.truncate(count);
    anyhow::ensure!(
        !paths.is_empty(),
        "no JPEG or PNG pictures in {}",
        folder.display()
    );
    Ok(paths)
}

/// Fastest of `repeats` timed runs of `work`, in seconds.
fn best_time(repeats: usize, work: impl FnMut() -> anyhow::Result<()>) -> anyhow::Result<f64> {
    Ok(best_times(repeats, work)?.wall)
}

/// Wall and CPU seconds of a run.
#[derive(Clone, Copy)]
struct Times {
    wall: f64,
    /// User + system time of the whole process: on a machine shared with other work this
    /// moves much less than the wall time does.
    cpu: f64,
}

/// The least wall time and the least CPU time over `repeats` runs of `work`.
fn best_times(
    repeats: usize,
    mut work: impl FnMut() -> anyhow::Result<()>,
) -> anyhow::Result<Times> {
    let mut best = Times {
        wall: f64::INFINITY,
        cpu: f64::INFINITY,
    };
    for _ in 0..repeats.max(1) {
        let (start, cpu) = (Instant::now(), cpu_seconds());
        work()?;
        best.wall = best.wall.min(start.elapsed().as_secs_f64());
        best.cpu = best.cpu.min(cpu_seconds() - cpu);
    }
    Ok(best)
}

/// User + system CPU seconds this process has used so far.
fn cpu_seconds() -> f64 {
    // SAFETY: getrusage only writes the struct it is given.
    let usage = unsafe {
        let mut usage: libc::rusage = std::mem::zeroed();
        libc::getrusage(libc::RUSAGE_SELF, &mut usage);
        usage
    };
    let seconds = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 * 1e-6;
    seconds(usage.ru_utime) + seconds(usage.ru_stime)
}

pub fn run(args: &SpeedArgs) -> anyhow::Result<()> {
    let paths = match &args.folder {
        Some(folder) => folder_pictures(folder, args.count)?,
        None => bench_jpegs(args.count)?,
    };
    let bytes: u64 = paths
        .iter()
        .map(|p| std::fs::read(p).map(|b| b.len() as u64))
        .sum::<std::io::Result<u64>>()?; // also warms the page cache
    let n = paths.len() as f64;
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(args.threads)
        .build()?;
    let opts = args.features.options()?;
    println!(
        "{} pictures, {:.1} MB, {} rayon threads; long side {}, K {}, stride {}, patch {}",
        paths.len(),
        bytes as f64 / 1e6,
        args.threads,
        opts.decode.long_side,
        opts.patches.atoms,
        opts.patches.stride,
        opts.patches.size
    );
    let start = Instant::now();
    let fx =
        pool.install(|| FeatureExtractor::learn(&paths, &opts, args.features.seed, &|_, _| {}))?;
    println!(
        "learning (decode {} + dictionary): {:.2} s",
        paths.len(),
        start.elapsed().as_secs_f64()
    );

    let bare = best_times(args.repeats, || {
        pool.install(|| {
            paths.par_iter().try_for_each(|p| {
                let img = image::open(p).with_context(|| p.display().to_string())?;
                std::hint::black_box(img.to_rgb8());
                Ok(())
            })
        })
    })?;
    let decoders = [
        ("jpeg-decoder (pure Rust)", JpegDecoder::PureRust),
        #[cfg(feature = "turbojpeg")]
        ("libjpeg-turbo", JpegDecoder::Turbo),
    ];
    let mut rates = Vec::new();
    for (name, jpeg) in decoders {
        let decode = best_times(args.repeats, || {
            pool.install(|| {
                paths.par_iter().try_for_each(|p| {
                    std::hint::black_box(load_working_image_with(p, &opts.decode, jpeg)?);
                    Ok(())
                })
            })
        })?;
        let full = best_times(args.repeats, || {
            pool.install(|| {
                paths.par_iter().try_for_each(|p| {
                    let img = load_working_image_with(p, &opts.decode, jpeg)?;
                    std::hint::black_box(fx.features_of(&img));
                    Ok(())
                })
            })
        })?;
        rates.push((name, decode, full));
    }
    println!(
        "{:<50} {:>10} {:>8} {:>12} {:>8}",
        "", "pictures/s", "÷ bare", "per CPU-s", "÷ bare"
    );
    let line = |label: &str, t: Times| {
        println!(
            "{label:<50} {:>10.2} {:>8.2} {:>12.2} {:>8.2}",
            n / t.wall,
            bare.wall / t.wall,
            n / t.cpu,
            bare.cpu / t.cpu
        );
    };
    line("bare full-size decode (image::open + to_rgb8)", bare);
    for (name, decode, full) in rates {
        line(&format!("tagweave decode only, {name}"), decode);
        line(&format!("tagweave decode + features, {name}"), full);
    }
    println!(
        "goal: decode + features >= 2.5x the bare decode; the scan uses {}",
        match JpegDecoder::FASTEST {
            JpegDecoder::PureRust => "jpeg-decoder",
            #[cfg(feature = "turbojpeg")]
            JpegDecoder::Turbo => "libjpeg-turbo",
        }
    );
    if args.table {
        table(args, &paths, &pool, n / bare.wall)?;
    }
    Ok(())
}

/// Decode rate per working size, features rate per (K, stride), and the combined rate.
fn table(
    args: &SpeedArgs,
    paths: &[PathBuf],
    pool: &rayon::ThreadPool,
    bare_rate: f64,
) -> anyhow::Result<()> {
    let n = paths.len() as f64;
    println!("\nlong  K    stride  dims   decode/s  features/s  both/s  both/bare");
    for long_side in [128u32, 160, 192, 256] {
        let mut opts: FeatureOptions = args.features.options()?;
        opts.decode.long_side = long_side;
        let mut images: Vec<WorkingImage> = Vec::new();
        let decode = best_time(args.repeats, || {
            images = pool.install(|| {
                paths
                    .par_iter()
                    .map(|p| load_working_image(p, &opts.decode))
                    .collect::<Result<Vec<_>, _>>()
            })?;
            Ok(())
        })?;
        for atoms in [32usize, 128, 256, 512] {
            for stride in [1usize, 2, 3] {
                opts.patches.atoms = atoms;
                opts.patches.stride = stride;
                let fx = pool.install(|| {
                    FeatureExtractor::learn_from_images(
                        &images,
                        &opts,
                        args.features.seed,
                        &|_, _| {},
                    )
                })?;
                let features = best_time(args.repeats, || {
                    pool.install(|| {
                        images.par_iter().for_each(|img| {
                            std::hint::black_box(fx.features_of(img));
                        })
                    });
                    Ok(())
                })?;
                let both = n / (decode + features);
                println!(
                    "{long_side:<5} {atoms:<4} {stride:<7} {:<6} {:>8.1} {:>11.1} {:>7.1} {:>9.2}",
                    fx.dimension(),
                    n / decode,
                    n / features,
                    both,
                    both / bare_rate
                );
            }
        }
    }
    Ok(())
}
