//! Measures tagweave's RBM trainer: time per epoch, the GFLOP/s its matrix products reach,
//! and beside it a plain ndarray `dot` of the same shapes in the same run, the same products
//! through the trainer's own `matmul` (the ratio to that says how much of a step goes to
//! anything but the counted products), and through the `gemm` crate directly.
//!
//!   train-bench [--json] [--epochs 3] [--rows 4096] [--only NAME] [--threads N] [--cpu-time]
//!
//! The digits case (64 visible → 256 hidden, batch 64, lr 0.05, 20 epochs) matches
//! `sklearn_reference.py` beside this file, which times scikit-learn's BernoulliRBM on the
//! same rows; run both by hand on an idle machine and compare ms/epoch.

mod cases;

use std::time::Instant;

use anyhow::Result;
use clap::Parser;
use serde::Serialize;

#[derive(Parser)]
#[command(about = "Speed figures for tagweave's RBM trainer beside a plain GEMM")]
struct Cli {
    /// Print JSON instead of a table.
    #[arg(long)]
    json: bool,
    /// Epochs per large-shape case (the median epoch is reported).
    #[arg(long, default_value_t = 3)]
    epochs: usize,
    /// Training rows per large-shape case (joint shapes use half).
    #[arg(long, default_value_t = 4096)]
    rows: usize,
    /// Run only the cases whose name contains this text.
    #[arg(long)]
    only: Option<String>,
    /// Rayon threads (default: all cores).
    #[arg(long)]
    threads: Option<usize>,
    /// Time in CPU seconds of the process (user + system) instead of wall seconds: steadier
    /// on a machine shared with other work; comparable between columns with --threads 1.
    #[arg(long)]
    cpu_time: bool,
}

/// Set once from --cpu-time before anything is timed.
static CPU_TIME: std::sync::OnceLock<bool> = std::sync::OnceLock::new();

/// Milliseconds on the chosen clock (wall, or the process's CPU time with --cpu-time).
pub fn clock_ms() -> f64 {
    static START: std::sync::OnceLock<Instant> = std::sync::OnceLock::new();
    if *CPU_TIME.get().unwrap_or(&false) {
        // SAFETY: getrusage only writes the struct it is given.
        let usage = unsafe {
            let mut usage: libc::rusage = std::mem::zeroed();
            libc::getrusage(libc::RUSAGE_SELF, &mut usage);
            usage
        };
        let ms = |t: libc::timeval| t.tv_sec as f64 * 1e3 + t.tv_usec as f64 * 1e-3;
        ms(usage.ru_utime) + ms(usage.ru_stime)
    } else {
        START.get_or_init(Instant::now).elapsed().as_secs_f64() * 1e3
    }
}

/// One measured case.
#[derive(Serialize, Clone, Debug)]
pub struct Row {
    pub name: String,
    pub units: &'static str,
    /// "CD-1" or "PCD-1".
    pub method: &'static str,
    pub rows: usize,
    pub batch: usize,
    pub visible: usize,
    pub hidden: usize,
    pub epochs: usize,
    /// Median over epochs.
    pub ms_per_epoch: f64,
    /// Matrix products of the algorithm per step (2·n·v·h FLOPs each).
    pub products_per_step: usize,
    pub gflop_per_epoch: f64,
    pub gflops: f64,
    /// The same products with plain `ndarray::dot`, median of `epochs` passes.
    pub gemm_ms_per_epoch: f64,
    pub gemm_gflops: f64,
    /// gflops / gemm_gflops.
    pub ratio: f64,
    /// The same products, each split into one block per rayon thread.
    pub split_gemm_gflops: f64,
    /// gflops / split_gemm_gflops.
    pub split_ratio: f64,
    /// The same products through the trainer's own `matmul` (AVX-512 for small shapes).
    pub own_gemm_gflops: f64,
    /// gflops / own_gemm_gflops: the share of a step spent in its counted products.
    pub own_ratio: f64,
    /// The same products through the `gemm` crate on rayon's threads.
    pub library_gemm_gflops: f64,
    /// The same products through the `gemm` crate on one thread.
    pub library_one_gemm_gflops: f64,
    /// Mean-field reconstruction MSE over the training rows after the last epoch.
    pub reconstruction_error: f32,
}

#[derive(Serialize)]
struct Report {
    /// Timed in CPU time rather than wall time.
    cpu_time: bool,
    threads: usize,
    rows: Vec<Row>,
}

fn main() -> Result<()> {
    let cli = Cli::parse();
    CPU_TIME.get_or_init(|| cli.cpu_time);
    if let Some(n) = cli.threads {
        rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build_global()?;
    }
    let wanted = |name: &str| cli.only.as_ref().is_none_or(|o| name.contains(o.as_str()));
    let mut rows = Vec::new();
    let started = Instant::now();
    for case in cases::all(cli.rows, cli.epochs) {
        if !wanted(&case.name) {
            continue;
        }
        if !cli.json {
            eprintln!("running {} …", case.name);
        }
        rows.push(case.run()?);
    }
    let report = Report {
        cpu_time: cli.cpu_time,
        threads: rayon::current_num_threads(),
        rows,
    };
    if cli.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print_table(&report);
        eprintln!("total {:.1} s", started.elapsed().as_secs_f64());
    }
    Ok(())
}

fn print_table(report: &Report) {
    println!(
        "{} rayon threads: {} (dot = ndarray/matrixmultiply on 1 thread; split dot = the same cut into one block per thread; own = the trainer's matmul; gemm = the gemm crate)",
        if report.cpu_time {
            "CPU time (user + system),"
        } else {
            "wall time,"
        },
        report.threads
    );
    println!(
        "| case | method | batch | v×h | ms/epoch | GFLOP/epoch | GFLOP/s | dot ms/epoch | dot GFLOP/s | ratio | split dot GFLOP/s | ratio to split | own GFLOP/s | ratio to own | gemm GFLOP/s | gemm 1-thread GFLOP/s | recon. MSE |"
    );
    println!(
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"
    );
    for r in &report.rows {
        println!(
            "| {} | {} | {} | {}×{} | {:.1} | {:.2} | {:.1} | {:.1} | {:.1} | {:.2} | {:.1} | {:.2} | {:.1} | {:.2} | {:.1} | {:.1} | {:.4} |",
            r.name,
            r.method,
            r.batch,
            r.visible,
            r.hidden,
            r.ms_per_epoch,
            r.gflop_per_epoch,
            r.gflops,
            r.gemm_ms_per_epoch,
            r.gemm_gflops,
            r.ratio,
            r.split_gemm_gflops,
            r.split_ratio,
            r.own_gemm_gflops,
            r.own_ratio,
            r.library_gemm_gflops,
            r.library_one_gemm_gflops,
            r.reconstruction_error,
        );
    }
}

pub fn median(mut xs: Vec<f64>) -> f64 {
    xs.sort_by(f64::total_cmp);
    let n = xs.len();
    match n {
        0 => f64::NAN,
        _ if n % 2 == 1 => xs[n / 2],
        _ => 0.5 * (xs[n / 2 - 1] + xs[n / 2]),
    }
}
