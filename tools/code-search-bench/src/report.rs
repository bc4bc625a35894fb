//! The table printed when `--json` is not given.

pub(crate) fn print_report(r: &serde_json::Value) {
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
