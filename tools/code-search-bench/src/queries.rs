//! The timed queries: exact, pre-filtered (cold and warm) and the f32 reference on every
//! query, then the sweep over pre-filter candidate counts.

use std::time::Instant;

use serde_json::json;
use tagweave_store::{CodeIndex, SearchMode};

use crate::machine::Flusher;
use crate::reference::float_top_k;
use crate::stats::{mean, ms, percentile, recall};
use crate::Args;

/// Per-query times (ms) and recalls, in query order, plus one summary row per swept count.
pub(crate) struct QueryFigures {
    pub exact_ms: Vec<f64>,
    pub pre_ms: Vec<f64>,
    pub pre_warm_ms: Vec<f64>,
    pub float_ms: Vec<f64>,
    pub pre_vs_exact: Vec<f64>,
    pub exact_vs_float: Vec<f64>,
    pub pre_vs_float: Vec<f64>,
    pub sweep: Vec<serde_json::Value>,
}

pub(crate) fn run(
    args: &Args,
    index: &CodeIndex,
    codes: &[f32],
    norms: &[f32],
    queries: &[Vec<f32>],
    sweep: &[usize],
    default_mode: SearchMode,
) -> anyhow::Result<QueryFigures> {
    let (dim, k, held_out) = (args.dim, args.k, args.queries);
    eprintln!("querying…");
    // Warm-up: page everything in once.
    index.search(&queries[0], k, SearchMode::Exact)?;
    index.search(&queries[0], k, default_mode)?;
    float_top_k(codes, norms, dim, &queries[0], k);

    let (mut t_exact, mut t_pre, mut t_float) = (Vec::new(), Vec::new(), Vec::new());
    let (mut r_pre_exact, mut r_exact_float, mut r_pre_float) =
        (Vec::new(), Vec::new(), Vec::new());
    let mut exact_rows = Vec::new();
    let mut exact_sims = Vec::new();
    let mut float_rows = Vec::new();
    let mut t_pre_warm = Vec::new();
    let flush = Flusher::new(args.flush_mb << 20);
    for q in queries {
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
        let float = float_top_k(codes, norms, dim, q, k);
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
    for &candidates in sweep {
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
    Ok(QueryFigures {
        exact_ms: t_exact,
        pre_ms: t_pre,
        pre_warm_ms: t_pre_warm,
        float_ms: t_float,
        pre_vs_exact: r_pre_exact,
        exact_vs_float: r_exact_float,
        pre_vs_float: r_pre_float,
        sweep: sweep_rows,
    })
}
