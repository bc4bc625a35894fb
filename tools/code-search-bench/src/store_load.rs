//! The store side: writing the codes through `Store`, then loading them back in fresh
//! processes, so the load's memory figures are not mixed with the bench's own.

use std::path::Path;
use std::time::{Duration, Instant};

use anyhow::Context;
use serde_json::json;
use tagweave_store::{CodeIndex, Store};

use crate::machine::{dir_size, memory_status};
use crate::stats::ms;
use crate::{Args, MB, THRESHOLDS_FILE};

/// Writes every code in scan order, reloads it twice in child processes and returns their
/// figures, with whether both loaded indexes match `index`.
pub(crate) fn write_and_reload(
    args: &Args,
    index: &CodeIndex,
    gen_ids: &[String],
    rank: &[usize],
    codes: &[f32],
    thresholds: &[f32],
) -> anyhow::Result<(serde_json::Value, bool)> {
    let (n, dim) = (gen_ids.len(), args.dim);
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
        if (end / batch).is_multiple_of(10) || end == n {
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
        serde_json::to_vec(thresholds)?,
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
    let built = digest(index);
    let identical = child["digest"].as_str() == Some(built.as_str());
    let figures = json!({
        "batch": batch,
        "write_s": writing.as_secs_f64(),
        "write_codes_per_s": n as f64 / writing.as_secs_f64(),
        "on_disk_mb": on_disk as f64 / MB,
        "child": child,
    });
    Ok((figures, identical))
}

/// The child side of the load measurement.
pub(crate) fn load_child(store_dir: &Path) -> anyhow::Result<()> {
    let parent = store_dir.parent().unwrap_or(store_dir);
    let thresholds: Vec<f32> =
        serde_json::from_slice(&std::fs::read(parent.join(THRESHOLDS_FILE))?)?;
    let rss_start = memory_status("VmRSS:");
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
