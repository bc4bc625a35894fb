//! Measures tagweave's code search at collection scale: writing a million codes to the store,
//! loading them into a `CodeIndex`, its memory, query latency (exact and pre-filtered) and
//! recall, beside the machine's measured memory bandwidth.
//!
//!   code-search-bench [--codes 1000000] [--dim 256] [--queries 200] [--json]
//!
//! Codes are synthetic (see `synth`), generated deterministically from `--seed`.

mod synth;

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::Context;
use clap::Parser;
use rayon::prelude::*;
use serde_json::json;
use tagweave_store::{CodeIndex, SearchMode, Store, DEFAULT_CANDIDATES};

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
    /// Internal, with --load-child: read sled directly with this page cache (MB) instead of
    /// through `Store` (whose sled cache is sled's default, 1 GiB).
    #[arg(long, hide = true)]
    sled_cache_mb: Option<u64>,
    /// sled page cache (MB) for the extra load measurement that bypasses `Store`.
    #[arg(long, default_value_t = 64)]
    capped_cache_mb: u64,
}

/// Where the parent leaves the hash thresholds for the loading child (beside the store).
const THRESHOLDS_FILE: &str = "thresholds.json";

const MB: f64 = 1_000_000.0;

fn main() -> anyhow::Result<()> {
    let args = Args::parse();
    if let Some(store_dir) = &args.load_child {
        return load_child(store_dir, args.sled_cache_mb);
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

    let mut store_figures = serde_json::Value::Null;
    let mut identical = None;
    if !args.skip_store {
        let root = match &args.dir {
            Some(d) => tempfile::tempdir_in(d),
            None => tempfile::tempdir(),
        }
        .context("creating the temporary store folder")?;
        let store_dir = root.path().join(".tagweave");
        let store = Store::open_or_create(&store_dir, root.path())?;
        let mut writing = Duration::ZERO;
        let batch = args.batch.max(1);
        // In scan order (by path), so keys arrive in random order as they would.
        for start in (0..n).step_by(batch) {
            let end = (start + batch).min(n);
            let rows: Vec<(String, Vec<f32>)> = (start..end)
                .map(|i| {
                    let r = rank[i];
                    (gen_ids[i].clone(), codes[r * dim..(r + 1) * dim].to_vec())
                })
                .collect();
            let t = Instant::now();
            store.put_vectors("code", &rows)?;
            writing += t.elapsed();
            if (end / batch) % 10 == 0 || end == n {
                eprintln!(
                    "  stored {end}/{n} codes ({:.1} s writing)",
                    writing.as_secs_f64()
                );
            }
        }
        let t = Instant::now();
        drop(store);
        writing += t.elapsed();
        let on_disk = dir_size(&store_dir);
        std::fs::write(
            root.path().join(THRESHOLDS_FILE),
            serde_json::to_vec(&thresholds)?,
        )?;

        // Open and load in a fresh process, so its memory figures are its own.
        eprintln!("loading the index from the store in a fresh process…");
        let output = std::process::Command::new(std::env::current_exe()?)
            .arg("--load-child")
            .arg(&store_dir)
            .output()
            .context("running the loading child process")?;
        anyhow::ensure!(
            output.status.success(),
            "loading child failed: {}",
            String::from_utf8_lossy(&output.stderr)
        );
        let child: serde_json::Value = serde_json::from_slice(&output.stdout)?;
        let output = std::process::Command::new(std::env::current_exe()?)
            .arg("--load-child")
            .arg(&store_dir)
            .arg("--sled-cache-mb")
            .arg(args.capped_cache_mb.to_string())
            .output()
            .context("running the capped-cache loading child process")?;
        anyhow::ensure!(
            output.status.success(),
            "capped-cache loading child failed: {}",
            String::from_utf8_lossy(&output.stderr)
        );
        let capped: serde_json::Value = serde_json::from_slice(&output.stdout)?;
        let built = digest(&index);
        identical = Some(
            child["digest"].as_str() == Some(built.as_str())
                && capped["digest"].as_str() == Some(built.as_str()),
        );
        store_figures = json!({
            "batch": batch,
            "write_s": writing.as_secs_f64(),
            "write_codes_per_s": n as f64 / writing.as_secs_f64(),
            "on_disk_mb": on_disk as f64 / MB,
            "child": child,
            "child_capped_cache": capped,
            "capped_cache_mb": args.capped_cache_mb,
        });
    }
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

    eprintln!("querying…");
    let default_mode = SearchMode::default();
    // Warm-up: page everything in once.
    index.search(&queries[0], k, SearchMode::Exact)?;
    index.search(&queries[0], k, default_mode)?;
    float_top_k(&codes, &norms, dim, &queries[0], k);

    let (mut t_exact, mut t_pre, mut t_float) = (Vec::new(), Vec::new(), Vec::new());
    let (mut r_pre_exact, mut r_exact_float, mut r_pre_float) =
        (Vec::new(), Vec::new(), Vec::new());
    let mut exact_rows = Vec::new();
    let mut exact_sims = Vec::new();
    let mut float_rows = Vec::new();
    let mut t_pre_warm = Vec::new();
    let flush = Flusher::new(args.flush_mb << 20);
    for q in &queries {
        flush.run();
        let t = Instant::now();
        let exact = index.search(q, k, SearchMode::Exact)?;
        t_exact.push(ms(t.elapsed()));
        flush.run();
        let t = Instant::now();
        let pre = index.search(q, k, default_mode)?;
        t_pre.push(ms(t.elapsed()));
        let t = Instant::now();
        index.search(q, k, default_mode)?;
        t_pre_warm.push(ms(t.elapsed()));
        flush.run();
        let t = Instant::now();
        let float = float_top_k(&codes, &norms, dim, q, k);
        t_float.push(ms(t.elapsed()));
        exact_sims.push(exact.iter().map(|h| f64::from(h.similarity)).sum::<f64>() / k as f64);
        let exact: Vec<usize> = exact.iter().map(|h| h.row).collect();
        let pre: Vec<usize> = pre.iter().map(|h| h.row).collect();
        r_pre_exact.push(recall(&pre, &exact, k));
        r_exact_float.push(recall(&exact, &float, k));
        r_pre_float.push(recall(&pre, &float, k));
        exact_rows.push(exact);
        float_rows.push(float);
    }
    let mut sweep_rows = Vec::new();
    for &candidates in &sweep {
        let mode = SearchMode::Prefiltered { candidates };
        let mut times = Vec::new();
        let (mut vs_exact, mut vs_float, mut loss) = (Vec::new(), Vec::new(), Vec::new());
        for (i, q) in queries.iter().enumerate() {
            flush.run();
            let t = Instant::now();
            let hits = index.search(q, k, mode)?;
            times.push(ms(t.elapsed()));
            let rows: Vec<usize> = hits.iter().map(|h| h.row).collect();
            loss.push(
                exact_sims[i]
                    - hits.iter().map(|h| f64::from(h.similarity)).sum::<f64>() / k as f64,
            );
            vs_exact.push(recall(&rows, &exact_rows[i], k));
            vs_float.push(recall(&rows, &float_rows[i], k));
        }
        sweep_rows.push(json!({
            "candidates": candidates,
            "p50_ms": percentile(&times, 0.5),
            "p99_ms": percentile(&times, 0.99),
            "recall_vs_exact": mean(&vs_exact),
            "recall_vs_f32": mean(&vs_float),
            "recall_vs_exact_min": vs_exact.iter().cloned().fold(1.0, f64::min),
            "tags_recall": mean(&vs_exact[held_out..]),
            "similarity_loss": mean(&loss),
            "similarity_loss_max": loss.iter().cloned().fold(0.0, f64::max),
        }));
    }

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
        "latency": [line("exact_u8", &t_exact, bytes_exact), line("prefiltered_default", &t_pre, bytes_pre), line("prefiltered_default_warm", &t_pre_warm, bytes_pre), line("f32_brute_force", &t_float, bytes_float)],
        "recall_at_k": {
            "prefiltered_vs_exact": split(&r_pre_exact),
            "exact_u8_vs_f32": split(&r_exact_float),
            "prefiltered_vs_f32": split(&r_pre_float),
        },
        "sweep": sweep_rows,
    });
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print_report(&report);
    }
    Ok(())
}

fn print_report(r: &serde_json::Value) {
    let f = |v: &serde_json::Value| v.as_f64().map(|x| format!("{x:.2}")).unwrap_or("–".into());
    println!(
        "code-search-bench: {} codes × {} units, {} held-out + {} tag-code queries, k = {}, {} threads (popcnt {}, avx2 {})",
        r["codes"], r["dim"], r["queries_held_out"], r["queries_tag_codes"], r["k"], r["threads"], r["cpu"]["popcnt"], r["cpu"]["avx2"]
    );
    let d = &r["data_shape"];
    println!(
        "data: {} of values < 0.05 or > 0.95; cosine of held-out query to its 1st / {}th f32 neighbour {} / {} (mean), to a random code {}",
        f(&d["saturated_fraction"]), r["k"], f3(&d["nn1_cosine"]), f3(&d["nnk_cosine"]), f3(&d["random_cosine"])
    );
    let b = &r["bandwidth_gb_s"];
    println!(
        "memory bandwidth ({} MB buffer, best of start/end of run): copy 1T {} GB/s, copy 2T {} GB/s, read 2T {} GB/s (start: {} / {} / {}, end: {} / {} / {})",
        b["buffer_mb"],
        f(&b["copy_1t"]),
        f(&b["copy_2t"]),
        f(&b["read_2t"]),
        f(&b["at_start"]["copy_1t"]),
        f(&b["at_start"]["copy_2t"]),
        f(&b["at_start"]["read_2t"]),
        f(&b["at_end"]["copy_1t"]),
        f(&b["at_end"]["copy_2t"]),
        f(&b["at_end"]["read_2t"])
    );
    let s = &r["store"];
    if !s.is_null() {
        println!(
            "store write: {} s for all codes via put_vectors (batches of {}, {} codes/s); on disk {} MB",
            f(&s["write_s"]), s["batch"], f(&s["write_codes_per_s"]), f(&s["on_disk_mb"])
        );
        let c = &s["child"];
        println!(
            "fresh process: open {} ms, load (vectors_of_kind streamed into CodeIndex) {} s; RSS at start {} MB, after load {} MB, peak (VmHWM) {} MB",
            f(&c["open_ms"]), f(&c["load_s"]), f(&c["rss_start_mb"]), f(&c["rss_after_load_mb"]), f(&c["peak_rss_mb"])
        );
        let c = &s["child_capped_cache"];
        println!(
            "  same load reading sled directly with a {} MB page cache: open {} ms, load {} s, peak RSS {} MB",
            s["capped_cache_mb"], f(&c["open_ms"]), f(&c["load_s"]), f(&c["peak_rss_mb"])
        );
    }
    println!(
        "generating the codes {} s; CodeIndex::build from f32 codes {} ms; index loaded from the store identical to built: {}",
        f(&r["generate_s"]),
        f(&r["build_from_f32_ms"]),
        r["loaded_index_identical_to_built"]
    );
    let p = &r["index_memory_parts_mb"];
    println!(
        "index memory_bytes: {} MB (codes u8 {}, hashes {}, inv norms {}, ids {}); process peak RSS {} MB (includes the bench's f32 reference codes)",
        f(&r["index_memory_mb"]), f(&p["codes_u8"]), f(&p["hashes"]), f(&p["inv_norms"]), f(&p["ids"]), f(&r["peak_rss_mb"])
    );
    println!(
        "latency per query (ms)        p50      p99     mean   MB read   floor@copy  floor@read"
    );
    for l in r["latency"].as_array().into_iter().flatten() {
        println!(
            "  {:<26} {:>7} {:>8} {:>8} {:>9} {:>11} {:>11}",
            l["mode"].as_str().unwrap_or(""),
            f(&l["p50_ms"]),
            f(&l["p99_ms"]),
            f(&l["mean_ms"]),
            f(&l["bytes_per_query_mb"]),
            f(&l["floor_at_copy_bw_ms"]),
            f(&l["floor_at_read_bw_ms"])
        );
    }
    println!(
        "  (prefiltered_default = {} candidates; each timing starts after streaming a {} MB buffer to empty the caches, except _warm = the same query repeated at once)",
        r["default_candidates"], r["flush_mb"]
    );
    let rc = &r["recall_at_k"];
    let g = |v: &serde_json::Value| v.as_f64().map(|x| format!("{x:.4}")).unwrap_or("–".into());
    println!(
        "recall@{}                      all   held-out  tag codes",
        r["k"]
    );
    for name in [
        "prefiltered_vs_exact",
        "exact_u8_vs_f32",
        "prefiltered_vs_f32",
    ] {
        let v = &rc[name];
        println!(
            "  {:<24} {:>8} {:>9} {:>10}",
            name,
            g(&v["all"]),
            g(&v["held_out"]),
            g(&v["tag_codes"])
        );
    }
    println!("pre-filter sweep: candidates   p50 ms   p99 ms   recall vs exact (min)   tag codes  sim loss (max)");
    for s in r["sweep"].as_array().into_iter().flatten() {
        println!(
            "  {:>24} {:>8} {:>8} {:>10} ({:>5}) {:>10} {:>9} ({:.5})",
            s["candidates"],
            f(&s["p50_ms"]),
            f(&s["p99_ms"]),
            g(&s["recall_vs_exact"]),
            f(&s["recall_vs_exact_min"]),
            g(&s["tags_recall"]),
            s["similarity_loss"]
                .as_f64()
                .map(|x| format!("{x:.5}"))
                .unwrap_or_default(),
            s["similarity_loss_max"].as_f64().unwrap_or(0.0)
        );
    }
}

fn f3(v: &serde_json::Value) -> String {
    v.as_f64().map(|x| format!("{x:.3}")).unwrap_or("–".into())
}

fn norms_of(rows: &[Vec<f32>]) -> Vec<f32> {
    rows.iter()
        .map(|r| r.iter().map(|v| v * v).sum::<f32>().sqrt())
        .collect()
}

/// How hard the data is: saturation of the units, and how much nearer a query's
/// neighbours are than an arbitrary code.
fn describe(
    codes: &[f32],
    norms: &[f32],
    dim: usize,
    queries: &[Vec<f32>],
    query_norms: &[f32],
    k: usize,
) -> serde_json::Value {
    let saturated = codes
        .par_iter()
        .filter(|&&v| !(0.05..=0.95).contains(&v))
        .count();
    let n = norms.len();
    let cos = |q: usize, r: usize| {
        let d = query_norms[q] * norms[r];
        if d > 0.0 {
            dot8(&codes[r * dim..(r + 1) * dim], &queries[q]) / d
        } else {
            0.0
        }
    };
    let mut nn1 = Vec::new();
    let mut nnk = Vec::new();
    let mut random = Vec::new();
    for (q, query) in queries.iter().enumerate().take(50) {
        let top = float_top_k(codes, norms, dim, query, k);
        if let (Some(&a), Some(&b)) = (top.first(), top.last()) {
            nn1.push(f64::from(cos(q, a)));
            nnk.push(f64::from(cos(q, b)));
        }
        for j in 0..20 {
            random.push(f64::from(cos(q, (q * 7_919 + j * 104_729) % n)));
        }
    }
    json!({
        "saturated_fraction": saturated as f64 / codes.len() as f64,
        "nn1_cosine": mean(&nn1),
        "nnk_cosine": mean(&nnk),
        "random_cosine": mean(&random),
    })
}

/// The child side of the load measurement.
fn load_child(store_dir: &Path, sled_cache_mb: Option<u64>) -> anyhow::Result<()> {
    let parent = store_dir.parent().unwrap_or(store_dir);
    let thresholds: Vec<f32> =
        serde_json::from_slice(&std::fs::read(parent.join(THRESHOLDS_FILE))?)?;
    let rss_start = memory_status("VmRSS:");
    if let Some(mb) = sled_cache_mb {
        return load_child_capped(store_dir, &thresholds, mb, rss_start);
    }
    let t = Instant::now();
    let store = Store::open(store_dir)?;
    let open = t.elapsed();
    let t = Instant::now();
    let index = CodeIndex::load(&store, "code", &thresholds)?;
    let load = t.elapsed();
    let rss_loaded = memory_status("VmRSS:");
    let peak = memory_status("VmHWM:");
    drop(store);
    let report = json!({
        "open_ms": ms(open),
        "load_s": load.as_secs_f64(),
        "rss_start_mb": rss_start,
        "rss_after_load_mb": rss_loaded,
        "peak_rss_mb": peak,
        "rss_after_store_closed_mb": memory_status("VmRSS:"),
        "index_memory_mb": index.memory_bytes() as f64 / MB,
        "codes": index.len(),
        "digest": digest(&index),
    });
    println!("{report}");
    Ok(())
}

/// Reads the store's sled database directly, with a small page cache, the way `Store`
/// would if it set one: shows what the default 1 GiB cache costs in memory and buys in time.
fn load_child_capped(
    store_dir: &Path,
    thresholds: &[f32],
    cache_mb: u64,
    rss_start: Option<f64>,
) -> anyhow::Result<()> {
    let t = Instant::now();
    let db = sled::Config::new()
        .path(store_dir.join("db"))
        .mode(sled::Mode::LowSpace)
        .cache_capacity(cache_mb << 20)
        .open()?;
    let tree = db.open_tree("vectors")?;
    let open = t.elapsed();
    let t = Instant::now();
    let mut builder = tagweave_store::CodeIndexBuilder::new(thresholds.len(), thresholds)?;
    let mut values = Vec::new();
    for entry in tree.iter() {
        let (key, value) = entry?;
        let Some(id) = key.strip_suffix(b"/code") else {
            continue;
        };
        values.clear();
        values.extend(
            value
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]])),
        );
        builder.push(std::str::from_utf8(id)?, &values)?;
    }
    let index = builder.finish();
    let load = t.elapsed();
    let report = json!({
        "open_ms": ms(open),
        "load_s": load.as_secs_f64(),
        "rss_start_mb": rss_start,
        "rss_after_load_mb": memory_status("VmRSS:"),
        "peak_rss_mb": memory_status("VmHWM:"),
        "codes": index.len(),
        "digest": digest(&index),
    });
    println!("{report}");
    Ok(())
}

/// FNV-1a over every id and stored code, to compare indexes across processes.
fn digest(index: &CodeIndex) -> String {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |bytes: &[u8]| {
        for &b in bytes {
            h = (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3);
        }
    };
    for r in 0..index.len() {
        eat(index.id(r).as_bytes());
        let code: Vec<u8> = index
            .code(r)
            .iter()
            .map(|&v| (v * 255.0).round() as u8)
            .collect();
        eat(&code);
    }
    format!("{h:016x}")
}

fn index_id_bytes(index: &CodeIndex) -> usize {
    (0..index.len()).map(|r| index.id(r).len()).sum()
}

/// Codes of the given point numbers, row-major.
fn generate(mix: &synth::Mixture, points: &[usize]) -> Vec<f32> {
    let dim = mix.dim;
    let mut out = vec![0f32; points.len() * dim];
    out.par_chunks_mut(dim)
        .zip(points.par_iter())
        .for_each(|(row, &p)| mix.point(p as u64, row));
    out
}

fn medians(codes: &[f32], dim: usize) -> Vec<f32> {
    (0..dim)
        .into_par_iter()
        .map(|j| {
            let mut column: Vec<f32> = codes.chunks(dim).map(|c| c[j]).collect();
            column.sort_by(f32::total_cmp);
            column[column.len() / 2]
        })
        .collect()
}

/// The bench's own float brute force: cosine over the f32 codes, best `k` rows (ties by row).
fn float_top_k(codes: &[f32], norms: &[f32], dim: usize, query: &[f32], k: usize) -> Vec<usize> {
    let qn = query.iter().map(|v| v * v).sum::<f32>().sqrt();
    const ROWS: usize = 8192;
    let mut best: Vec<(f32, usize)> = codes
        .par_chunks(ROWS * dim)
        .enumerate()
        .flat_map_iter(|(chunk, rows)| {
            let mut local: Vec<(f32, usize)> = rows
                .chunks_exact(dim)
                .enumerate()
                .map(|(i, row)| {
                    let r = chunk * ROWS + i;
                    let denom = qn * norms[r];
                    let s = if denom > 0.0 {
                        dot8(row, query) / denom
                    } else {
                        0.0
                    };
                    (s, r)
                })
                .collect();
            let keep = k.min(local.len());
            if keep > 0 && local.len() > keep {
                local.select_nth_unstable_by(keep - 1, by_score);
            }
            local.truncate(keep);
            local
        })
        .collect();
    best.sort_by(by_score);
    best.truncate(k);
    best.into_iter().map(|(_, r)| r).collect()
}

fn by_score(a: &(f32, usize), b: &(f32, usize)) -> std::cmp::Ordering {
    b.0.total_cmp(&a.0).then(a.1.cmp(&b.1))
}

/// Dot product with eight running sums so the compiler can vectorise it.
fn dot8(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0f32; 8];
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let tail: f32 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (x, y) in ca.zip(cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    acc.iter().sum::<f32>() + tail
}

/// A buffer larger than the last-level cache (this machine kind reports hundreds of MB),
/// streamed before each timed query so every query starts with the index out of cache.
struct Flusher(Vec<u64>);

impl Flusher {
    fn new(bytes: usize) -> Flusher {
        Flusher((0..(bytes / 8).max(1) as u64).into_par_iter().collect())
    }

    fn run(&self) {
        let sum = self
            .0
            .par_chunks(1 << 16)
            .map(|c| c.iter().step_by(8).fold(0u64, |a, &b| a.wrapping_add(b)))
            .reduce(|| 0, u64::wrapping_add);
        std::hint::black_box(sum);
    }
}

fn recall(found: &[usize], truth: &[usize], k: usize) -> f64 {
    let truth = &truth[..k.min(truth.len())];
    if truth.is_empty() {
        return 1.0;
    }
    found.iter().filter(|r| truth.contains(r)).count() as f64 / truth.len() as f64
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

/// Nearest-rank percentile.
fn percentile(v: &[f64], p: f64) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let rank = ((p * s.len() as f64).ceil() as usize).clamp(1, s.len().max(1));
    s.get(rank - 1).copied().unwrap_or(f64::NAN)
}

fn ms(d: Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

struct Bandwidth {
    copy_1t: f64,
    copy_2t: f64,
    read_2t: f64,
}

/// Bytes per second: copying a buffer (bytes copied ÷ time, best of 3) on one thread and on
/// all threads, and summing it on all threads (a pure read, like a scan).
fn bandwidth(bytes: usize) -> Bandwidth {
    let words = (bytes / 8).max(1);
    let src: Vec<u64> = (0..words as u64).into_par_iter().collect();
    let mut dst = vec![0u64; words];
    let bytes = (words * 8) as f64;
    let best = |f: &mut dyn FnMut()| {
        (0..3)
            .map(|_| {
                let t = Instant::now();
                f();
                t.elapsed().as_secs_f64()
            })
            .fold(f64::INFINITY, f64::min)
    };
    let copy_1t = bytes / best(&mut || dst.copy_from_slice(&src));
    let copy_2t = bytes
        / best(&mut || {
            let chunk = words.div_ceil(rayon::current_num_threads() * 4).max(1);
            dst.par_chunks_mut(chunk)
                .zip(src.par_chunks(chunk))
                .for_each(|(d, s)| d.copy_from_slice(s));
        });
    let mut sink = 0u64;
    let read_2t = bytes
        / best(&mut || {
            sink ^= src
                .par_chunks(1 << 16)
                .map(|c| c.iter().fold(0u64, |a, &b| a.wrapping_add(b)))
                .reduce(|| 0, u64::wrapping_add);
        });
    std::hint::black_box((sink, &dst));
    Bandwidth {
        copy_1t,
        copy_2t,
        read_2t,
    }
}

/// A `/proc/self/status` figure in MB (Linux only).
fn memory_status(field: &str) -> Option<f64> {
    let text = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = text.lines().find(|l| l.starts_with(field))?;
    let kb: f64 = line[field.len()..]
        .trim()
        .trim_end_matches("kB")
        .trim()
        .parse()
        .ok()?;
    Some(kb * 1024.0 / MB)
}

fn dir_size(dir: &Path) -> u64 {
    std::fs::read_dir(dir)
        .into_iter()
        .flatten()
        .flatten()
        .map(|e| match e.file_type() {
            Ok(t) if t.is_dir() => dir_size(&e.path()),
            _ => e.metadata().map(|m| m.len()).unwrap_or(0),
        })
        .sum()
}

fn cpu_has(feature: &str) -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        match feature {
            "popcnt" => std::arch::is_x86_feature_detected!("popcnt"),
            "avx2" => std::arch::is_x86_feature_detected!("avx2"),
            _ => false,
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = feature;
        false
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recall_and_percentiles_by_hand() {
        // source: by hand: 3 of the 4 true rows found.
        assert_eq!(recall(&[1, 2, 3, 9], &[3, 2, 1, 0], 4), 0.75);
        // source: by hand: nearest-rank percentile of 1..=10 (p50 → 5th, p99 → 10th value).
        let v: Vec<f64> = (1..=10).rev().map(f64::from).collect();
        assert_eq!(percentile(&v, 0.5), 5.0);
        assert_eq!(percentile(&v, 0.99), 10.0);
    }

    #[test]
    fn synthetic_codes_are_probabilities_and_repeatable() {
        let shape = synth::Shape {
            clusters: 4,
            latent: 3,
            dim: 20,
            spread: 0.6,
            decay: 0.9,
            unit_noise: 0.25,
            gain: 2.0,
        };
        let (a, b) = (
            synth::Mixture::new(1, &shape),
            synth::Mixture::new(1, &shape),
        );
        let (mut x, mut y) = (vec![0f32; 20], vec![0f32; 20]);
        a.point(12, &mut x);
        b.point(12, &mut y);
        assert_eq!(x, y);
        assert!(x.iter().all(|v| (0.0..=1.0).contains(v)));
        b.point(13, &mut y);
        assert_ne!(x, y);
        assert_eq!(generate(&a, &[12]), x);
    }

    #[test]
    fn float_reference_finds_the_plain_best_rows() {
        let codes = [1.0, 0.0, 0.0, 1.0, 0.7, 0.7];
        let norms: Vec<f32> = codes
            .chunks(2)
            .map(|c| c.iter().map(|v| v * v).sum::<f32>().sqrt())
            .collect();
        // source: by hand: cos to (1, 0.1) is 0.995, 0.0995 and 0.7740 for the three rows.
        assert_eq!(float_top_k(&codes, &norms, 2, &[1.0, 0.1], 2), vec![0, 2]);
    }
}
