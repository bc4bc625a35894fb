//! What the machine gives: memory bandwidth, cache flushing, process memory, disk use, CPU
//! features. The latency floors are set against these.

use std::path::Path;
use std::time::Instant;

use rayon::prelude::*;

use crate::MB;

/// A buffer larger than the last-level cache (this machine kind reports hundreds of MB),
/// streamed before each timed query so every query starts with the index out of cache.
pub(crate) struct Flusher(Vec<u64>);

impl Flusher {
    pub fn new(bytes: usize) -> Flusher {
        Flusher((0..(bytes / 8).max(1) as u64).into_par_iter().collect())
    }

    pub fn run(&self) {
        let sum = self
            .0
            .par_chunks(1 << 16)
            .map(|c| c.iter().step_by(8).fold(0u64, |a, &b| a.wrapping_add(b)))
            .reduce(|| 0, u64::wrapping_add);
        std::hint::black_box(sum);
    }
}

pub(crate) struct Bandwidth {
    pub copy_1t: f64,
    pub copy_2t: f64,
    pub read_2t: f64,
}

/// Bytes per second: copying a buffer (bytes copied ÷ time, best of 3) on one thread and on
/// all threads, and summing it on all threads (a pure read, like a scan).
pub(crate) fn bandwidth(bytes: usize) -> Bandwidth {
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
pub(crate) fn memory_status(field: &str) -> Option<f64> {
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

pub(crate) fn dir_size(dir: &Path) -> u64 {
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

pub(crate) fn cpu_has(feature: &str) -> bool {
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
