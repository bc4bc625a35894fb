//! Measures tagweave's code search at collection scale: writing a million codes to the store,
//! loading them into a `CodeIndex`, its memory, query latency (exact and pre-filtered) and
//! recall, beside the machine's measured memory bandwidth.
//!
//!   code-search-bench [--codes 1000000] [--dim 256] [--queries 200] [--json]
//!
//! Codes are synthetic (see `synth`), generated deterministically from `--seed`.

mod data;
mod machine;
mod queries;
mod reference;
mod report;
mod stats;
mod store_load;
mod synth;

use std::path::PathBuf;
use std::time::Instant;

use anyhow::Context;
use clap::Parser;
use rayon::prelude::*;
use serde_json::json;
use tagweave_store::{CodeIndex, SearchMode, DEFAULT_CANDIDATES};

use crate::data::{describe, generate, medians, norms_of};
use crate::machine::{bandwidth, cpu_has, memory_status, Bandwidth};
use crate::stats::{mean, ms, percentile};

#[derive(Parser)]
#[command(about = "Speed, memory and recall of tagweave's code search")]
struct Args {
    /// Codes in the index.
    #[arg(long, default_value_t = 1_000_000)]
    codes: usize,
    /// Units per code (= hash bits).
    #[arg(long, default_value_t = 256)]
    dim: usize,
    /// Held-out pictures used as queries.
    #[arg(long, default_value_t = 200)]
    queries: usize,
    /// Cluster-centre codes ("tag codes") used as extra queries.
    #[arg(long, default_value_t = 8)]
    tags: usize,
    /// Neighbours asked for.
    #[arg(long, default_value_t = 10)]
    k: usize,
    /// Pre-filter candidate counts to sweep, e.g. "1000,5000" ("" for none).
    #[arg(long, default_value = "2000,5000,10000,20000")]
    sweep: String,
    /// Codes per `put_vectors` call (each call flushes).
    #[arg(long, default_value_t = 10_000)]
    batch: usize,
    /// Buffer for the bandwidth measurement.
    #[arg(long, default_value_t = 1024)]
    bandwidth_mb: usize,
    /// Buffer streamed before each timed query to empty the caches.
    #[arg(long, default_value_t = 1024)]
    flush_mb: usize,
    /// Folder for the temporary store (default: the system temp folder).
    #[arg(long)]
    dir: Option<PathBuf>,
    /// Skip the store: build the index straight from generated codes.
    #[arg(long)]
    skip_store: bool,
    #[arg(long, default_value_t = 256)]
    clusters: usize,
    #[arg(long, default_value_t = 32)]
    latent: usize,
    #[arg(long, default_value_t = 0.6)]
    spread: f64,
    #[arg(long, default_value_t = 0.9)]
    decay: f64,
    #[arg(long, default_value_t = 0.25)]
    unit_noise: f64,
    #[arg(long, default_value_t = 2.0)]
    gain: f64,
    #[arg(long, default_value_t = 7)]
    seed: u64,
    /// Print one JSON object instead of the table.
    #[arg(long)]
    json: bool,
    /// Internal: open the store in this folder, load the index, print figures as JSON.
    #[arg(long, hide = true)]
    load_child: Option<PathBuf>,
}

/// Where the parent leaves the hash thresholds for the loading child (beside the store).
const THRESHOLDS_FILE: &str = "thresholds.json";

const MB: f64 = 1_000_000.0;

fn main() -> anyhow::Result<()> {
    let args = Args::parse();
    if let Some(store_dir) = &args.load_child {
        return store_load::load_child(store_dir);
    }
    anyhow::ensure!(
        args.codes > 0 && args.dim > 0,
        "--codes and --dim must be positive"
    );
    let sweep: Vec<usize> = args
        .sweep
        .split(',')
        .map(str::trim)
        .filter(|t| !t.is_empty())
        .map(|t| t.parse().with_context(|| format!("--sweep value {t:?}")))
        .collect::<anyhow::Result<_>>()?;
    let (n, dim, k) = (args.codes, args.dim, args.k);
    let mix = synth::Mixture::new(
        args.seed,
        &synth::Shape {
            clusters: args.clusters,
            latent: args.latent,
            dim,
            spread: args.spread,
            decay: args.decay,
            unit_noise: args.unit_noise,
            gain: args.gain,
        },
    );
    let threads = rayon::current_num_threads();

    // Ids as the scanner makes them; the store (and so the index) keeps them sorted, so
    // row r of the index is generated point order[r].
    let gen_ids: Vec<String> = (0..n)
        .into_par_iter()
        .map(|i| tagweave_collection::item_id(&format!("pictures/{i:07}.jpg")))
        .collect();
    let mut order: Vec<usize> = (0..n).collect();
    order.par_sort_unstable_by(|&a, &b| gen_ids[a].cmp(&gen_ids[b]));
    let mut rank = vec![0usize; n];
    for (r, &i) in order.iter().enumerate() {
        rank[i] = r;
    }
    let sorted_ids: Vec<String> = order.iter().map(|&i| gen_ids[i].clone()).collect();

    eprintln!("generating {n} codes…");
    let t = Instant::now();
    let codes = generate(&mix, &order);
    let generate_s = t.elapsed().as_secs_f64();
    // Thresholds: each unit's median over a "training" sample (ids are hashes, so the first
    // rows are a random sample), as the model provides them.
    let thresholds = medians(&codes[..n.min(50_000) * dim], dim);

    eprintln!("measuring memory bandwidth…");
    let bw_start = bandwidth(args.bandwidth_mb << 20);

    let t = Instant::now();
    let index = CodeIndex::build(sorted_ids, &codes, dim, &thresholds)?;
    let build = t.elapsed();

    let (store_figures, identical) = if args.skip_store {
        (serde_json::Value::Null, None)
    } else {
        let (figures, same) =
            store_load::write_and_reload(&args, &index, &gen_ids, &rank, &codes, &thresholds)?;
        (figures, Some(same))
    };
    let memory = index.memory_bytes();
    let words = dim.div_ceil(64);
    let norms: Vec<f32> = codes
        .par_chunks(dim)
        .map(|c| c.iter().map(|v| v * v).sum::<f32>().sqrt())
        .collect();

    let mut queries: Vec<Vec<f32>> = generate(&mix, &(n..n + args.queries).collect::<Vec<_>>())
        .chunks(dim)
        .map(<[f32]>::to_vec)
        .collect();
    let clusters = mix.clusters();
    for t in 0..args.tags {
        let mut code = vec![0f32; dim];
        mix.centre(t * clusters / args.tags.max(1), &mut code);
        queries.push(code);
    }
    let held_out = args.queries;
    let data_shape = describe(
        &codes,
        &norms,
        dim,
        &queries[..held_out],
        &norms_of(&queries[..held_out]),
        k,
    );

    let default_mode = SearchMode::default();
    let q = queries::run(
        &args,
        &index,
        &codes,
        &norms,
        &queries,
        &sweep,
        default_mode,
    )?;

    eprintln!("measuring memory bandwidth again…");
    let bw_end = bandwidth(args.bandwidth_mb << 20);
    // Other processes share the machine: the better of the two measurements is the closer
    // to what the hardware can do.
    let bw = Bandwidth {
        copy_1t: bw_start.copy_1t.max(bw_end.copy_1t),
        copy_2t: bw_start.copy_2t.max(bw_end.copy_2t),
        read_2t: bw_start.read_2t.max(bw_end.read_2t),
    };
    // Bytes each query reads; the floor is bytes ÷ bandwidth.
    let candidates = match default_mode {
        SearchMode::Prefiltered { candidates } => candidates,
        SearchMode::Exact => n,
    };
    let bytes_exact = (n * dim + 4 * n) as f64;
    let bytes_pre = (n * words * 8 + 4 * n + candidates.min(n) * (dim + 4)) as f64;
    let bytes_float = (4 * n * dim + 4 * n) as f64;
    let line = |name: &str, times: &[f64], bytes: f64| {
        json!({
            "mode": name,
            "p50_ms": percentile(times, 0.5),
            "p99_ms": percentile(times, 0.99),
            "mean_ms": mean(times),
            "bytes_per_query_mb": bytes / MB,
            "floor_at_copy_bw_ms": bytes / bw.copy_2t * 1e3,
            "floor_at_read_bw_ms": bytes / bw.read_2t * 1e3,
        })
    };
    let split = |v: &[f64]| json!({"all": mean(v), "held_out": mean(&v[..held_out]), "tag_codes": if v.len() > held_out { json!(mean(&v[held_out..])) } else { json!(null) }});
    let report = json!({
        "codes": n,
        "dim": dim,
        "k": k,
        "queries_held_out": held_out,
        "queries_tag_codes": args.tags,
        "threads": threads,
        "cpu": {"popcnt": cpu_has("popcnt"), "avx2": cpu_has("avx2")},
        "data_shape": data_shape,
        "data": {"clusters": args.clusters, "latent": args.latent, "spread": args.spread, "decay": args.decay, "unit_noise": args.unit_noise, "gain": args.gain, "seed": args.seed},
        "bandwidth_gb_s": {"buffer_mb": args.bandwidth_mb, "copy_1t": bw.copy_1t / 1e9, "copy_2t": bw.copy_2t / 1e9, "read_2t": bw.read_2t / 1e9,
            "at_start": {"copy_1t": bw_start.copy_1t / 1e9, "copy_2t": bw_start.copy_2t / 1e9, "read_2t": bw_start.read_2t / 1e9},
            "at_end": {"copy_1t": bw_end.copy_1t / 1e9, "copy_2t": bw_end.copy_2t / 1e9, "read_2t": bw_end.read_2t / 1e9}},
        "store": store_figures,
        "generate_s": generate_s,
        "build_from_f32_ms": ms(build),
        "loaded_index_identical_to_built": identical,
        "index_memory_mb": memory as f64 / MB,
        "index_memory_parts_mb": {"codes_u8": (n * dim) as f64 / MB, "hashes": (n * words * 8) as f64 / MB, "inv_norms": (4 * n) as f64 / MB, "ids": index_id_bytes(&index) as f64 / MB},
        "peak_rss_mb": memory_status("VmHWM:"),
        "rss_now_mb": memory_status("VmRSS:"),
        "default_candidates": DEFAULT_CANDIDATES,
        "flush_mb": args.flush_mb,
        "latency": [line("exact_u8", &q.exact_ms, bytes_exact), line("prefiltered_default", &q.pre_ms, bytes_pre), line("prefiltered_default_warm", &q.pre_warm_ms, bytes_pre), line("f32_brute_force", &q.float_ms, bytes_float)],
        "recall_at_k": {
            "prefiltered_vs_exact": split(&q.pre_vs_exact),
            "exact_u8_vs_f32": split(&q.exact_vs_float),
            "prefiltered_vs_f32": split(&q.pre_vs_float),
        },
        "sweep": q.sweep,
    });
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        report::print_report(&report);
    }
    Ok(())
}

fn index_id_bytes(index: &CodeIndex) -> usize {
    (0..index.len()).map(|r| index.id(r).len()).sum()
}
