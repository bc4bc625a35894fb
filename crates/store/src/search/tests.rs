use super::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Clustered codes in [0, 1] so that neighbours exist and hashes are informative.
fn clustered(n: usize, dim: usize, seed: u64) -> Vec<f32> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let centres: Vec<Vec<f32>> = (0..8)
        .map(|_| (0..dim).map(|_| rng.random_range(-3.0..3.0)).collect())
        .collect();
    let mut out = Vec::with_capacity(n * dim);
    for _ in 0..n {
        let c = &centres[rng.random_range(0..centres.len())];
        for &m in c {
            let x: f32 = m + rng.random_range(-1.5..1.5);
            out.push(1.0 / (1.0 + (-x).exp()));
        }
    }
    out
}

fn ids(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("{:016x}", i * 7919)).collect()
}

fn medians(codes: &[f32], dim: usize) -> Vec<f32> {
    (0..dim)
        .map(|j| {
            let mut column: Vec<f32> = codes.chunks(dim).map(|c| c[j]).collect();
            column.sort_by(f32::total_cmp);
            column[column.len() / 2]
        })
        .collect()
}

fn index(n: usize, dim: usize, seed: u64) -> (CodeIndex, Vec<f32>) {
    let codes = clustered(n, dim, seed);
    let thresholds = medians(&codes, dim);
    let index = CodeIndex::build(ids(n), &codes, dim, &thresholds).unwrap();
    (index, codes)
}

// source: by hand: definition of cosine similarity, a·b / (‖a‖ ‖b‖), in f64.
fn cosine(a: &[f32], b: &[f32]) -> f64 {
    let dot: f64 = a
        .iter()
        .zip(b)
        .map(|(&x, &y)| f64::from(x) * f64::from(y))
        .sum();
    let na: f64 = a
        .iter()
        .map(|&x| f64::from(x) * f64::from(x))
        .sum::<f64>()
        .sqrt();
    let nb: f64 = b
        .iter()
        .map(|&x| f64::from(x) * f64::from(x))
        .sum::<f64>()
        .sqrt();
    if na == 0.0 || nb == 0.0 {
        0.0
    } else {
        dot / (na * nb)
    }
}

/// (similarity, row) of every row, best first, ties by row.
fn reference(codes: &[f32], dim: usize, query: &[f32]) -> Vec<(f64, usize)> {
    let mut all: Vec<(f64, usize)> = codes
        .chunks(dim)
        .enumerate()
        .map(|(row, c)| (cosine(c, query), row))
        .collect();
    all.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
    all
}

/// The hits are a correct top-k up to `tol`: the i-th similarity matches the reference's
/// i-th (order statistics move by at most the per-value error), and every hit's own
/// similarity matches the reference value of its row.
fn assert_top_k(hits: &[Hit], reference: &[(f64, usize)], k: usize, tol: f64) {
    assert_eq!(hits.len(), k.min(reference.len()));
    let by_row: std::collections::HashMap<usize, f64> =
        reference.iter().map(|&(s, r)| (r, s)).collect();
    for (i, hit) in hits.iter().enumerate() {
        let s = f64::from(hit.similarity);
        assert!(
            (s - reference[i].0).abs() <= tol,
            "rank {i}: {s} vs {}",
            reference[i].0
        );
        assert!((s - by_row[&hit.row]).abs() <= tol, "row {}: {s}", hit.row);
        if i > 0 {
            let prev = &hits[i - 1];
            assert!(
                prev.similarity > hit.similarity
                    || (prev.similarity == hit.similarity && prev.row < hit.row),
                "hits out of order at {i}"
            );
        }
    }
}

#[test]
fn exact_search_on_byte_exact_codes_equals_plain_cosine() {
    // Codes on the 1/255 grid are stored without loss, so only the query's ~15-bit
    // scaling separates the index from the reference.
    let (n, dim) = (600, 40);
    let grid: Vec<f32> = clustered(n, dim, 1)
        .iter()
        .map(|&v| (v * 255.0).round() / 255.0)
        .collect();
    let index = CodeIndex::build(ids(n), &grid, dim, &vec![0.5; dim]).unwrap();
    for q in 0..5 {
        let query = &clustered(1, dim, 100 + q);
        let hits = index.search(query, 10, SearchMode::Exact).unwrap();
        assert_top_k(&hits, &reference(&grid, dim, query), 10, 1e-4);
    }
}

#[test]
fn exact_search_stays_within_the_quantisation_error_of_float_cosine() {
    let (n, dim) = (800, 64);
    let (index, codes) = index(n, dim, 2);
    for q in 0..5 {
        let query = &codes[q * dim..(q + 1) * dim];
        let hits = index.search(query, 10, SearchMode::Exact).unwrap();
        // Each value moves by ≤ 1/510; for codes of norm ≳ 0.3·√dim the cosine moves by
        // well under 0.01.
        assert_top_k(&hits, &reference(&codes, dim, query), 10, 0.01);
        assert_eq!(hits[0].row, q, "a stored code is its own nearest");
    }
}

#[test]
fn quantisation_error_is_at_most_half_a_step() {
    // source: by hand: rounding to the nearest of the levels i/255 errs by ≤ 1/(2·255).
    let values: Vec<f32> = (0..=100_000)
        .map(|i| i as f32 / 100_000.0)
        .chain([0.5 / 255.0, 1.5 / 255.0, 254.5 / 255.0, 1.0])
        .collect();
    for v in values {
        let q = quantise(v);
        let err = (f64::from(q) / 255.0 - f64::from(v)).abs();
        assert!(err <= 1.0 / 510.0 + 1e-7, "{v} -> {q}: {err}");
    }
    assert_eq!(quantise(0.0), 0);
    assert_eq!(quantise(1.0), 255);
}

#[test]
fn hashes_match_the_thresholds_by_hand() {
    // source: by hand: bit j is set when code[j] > threshold[j] (equal is not above).
    let thresholds = [0.5, 0.2, 0.9];
    let codes = [
        0.6, 0.1, 0.95, // above, below, above -> 0b101
        0.5, 0.2, 0.9, // all equal -> 0
        0.0, 1.0, 0.91, // below, above, above -> 0b110
    ];
    let index = CodeIndex::build(ids(3), &codes, 3, &thresholds).unwrap();
    assert_eq!(index.hashes, vec![0b101, 0, 0b110]);

    // 70 units span two words: unit 65 is bit 1 of the second word.
    let mut code = vec![0.0; 70];
    code[0] = 1.0;
    code[65] = 1.0;
    let index = CodeIndex::build(ids(1), &code, 70, &[0.5; 70]).unwrap();
    assert_eq!(index.hashes, vec![1, 2]);
}

#[test]
fn prefilter_with_every_row_as_candidate_equals_exact() {
    let (index, codes) = index(700, 48, 3);
    for q in 0..4 {
        let query = &codes[q * 48..(q + 1) * 48];
        let exact = index.search(query, 15, SearchMode::Exact).unwrap();
        for candidates in [700, 5000] {
            let pre = index
                .search(query, 15, SearchMode::Prefiltered { candidates })
                .unwrap();
            assert_eq!(pre, exact);
        }
    }
}

#[test]
fn prefilter_reranks_exactly_the_nearest_hashes() {
    let (n, dim) = (3000, 96);
    let (index, codes) = index(n, dim, 4);
    let thresholds = medians(&codes, dim);
    let bits = |c: &[f32]| -> Vec<bool> { c.iter().zip(&thresholds).map(|(v, t)| v > t).collect() };
    for q in 0..4 {
        let query = clustered(1, dim, 200 + q);
        let qb = bits(&query);
        // source: by hand: Hamming distance = number of differing bits; nearest 100, ties
        // by row.
        let mut by_distance: Vec<(usize, usize)> = codes
            .chunks(dim)
            .enumerate()
            .map(|(row, c)| (bits(c).iter().zip(&qb).filter(|(a, b)| a != b).count(), row))
            .collect();
        by_distance.sort();
        let chosen: std::collections::HashSet<usize> =
            by_distance[..100].iter().map(|&(_, r)| r).collect();
        let expected = index
            .search_where(&query, 10, SearchMode::Exact, |r| chosen.contains(&r))
            .unwrap();
        let got = index
            .search(&query, 10, SearchMode::Prefiltered { candidates: 100 })
            .unwrap();
        assert_eq!(got, expected);
    }
}

#[test]
fn the_filter_is_respected_in_both_modes() {
    let (n, dim) = (2000, 32);
    let (index, codes) = index(n, dim, 5);
    let query = &codes[..dim];
    let keep = |row: usize| row % 3 == 1;
    for mode in [
        SearchMode::Exact,
        SearchMode::Prefiltered { candidates: 5000 },
    ] {
        let hits = index.search_where(query, 20, mode, keep).unwrap();
        let kept: Vec<(f64, usize)> = reference(&codes, dim, query)
            .into_iter()
            .filter(|&(_, r)| keep(r))
            .collect();
        assert_top_k(&hits, &kept, 20, 0.01);
        assert!(hits.iter().all(|h| keep(h.row)));
        // Excluding the query item itself.
        let others = index.search_where(query, 5, mode, |r| r != 0).unwrap();
        assert!(others.iter().all(|h| h.row != 0));
        assert_eq!(others.len(), 5);
    }
    // A strict filter still gets a full candidate list from the pre-filter.
    let few = index
        .search_where(query, 10, SearchMode::Prefiltered { candidates: 10 }, |r| {
            r % 100 == 0
        })
        .unwrap();
    assert_eq!(few.len(), 10);
    let none = index
        .search_where(query, 10, SearchMode::Exact, |_| false)
        .unwrap();
    assert!(none.is_empty());
}

#[test]
fn k_above_n_returns_every_row_best_first() {
    let (index, codes) = index(7, 16, 6);
    for mode in [SearchMode::Exact, SearchMode::Prefiltered { candidates: 3 }] {
        let hits = index.search(&codes[..16], 100, mode).unwrap();
        assert_eq!(hits.len(), 7);
        assert_top_k(&hits, &reference(&codes, 16, &codes[..16]), 100, 0.01);
    }
    assert!(index
        .search(&codes[..16], 0, SearchMode::Exact)
        .unwrap()
        .is_empty());
}

#[test]
fn an_empty_index_finds_nothing() {
    let index = CodeIndex::build(Vec::new(), &[], 8, &[0.5; 8]).unwrap();
    assert_eq!(index.len(), 0);
    assert!(index.is_empty());
    for mode in [SearchMode::Exact, SearchMode::default()] {
        assert!(index.search(&[0.3; 8], 5, mode).unwrap().is_empty());
    }
    assert!(CodeIndexBuilder::new(8, &[0.5; 8])
        .unwrap()
        .finish()
        .is_empty());
}

#[test]
fn zero_vectors_have_similarity_zero() {
    let (n, dim) = (50, 16);
    let mut codes = clustered(n, dim, 7);
    codes[3 * dim..4 * dim].fill(0.0);
    let index = CodeIndex::build(ids(n), &codes, dim, &[0.5; 16]).unwrap();
    for mode in [
        SearchMode::Exact,
        SearchMode::Prefiltered { candidates: 20 },
    ] {
        let hits = index.search(&[0.0; 16], 4, mode).unwrap();
        assert!(hits.iter().all(|h| h.similarity == 0.0));
        assert!(
            hits.windows(2).all(|w| w[0].row < w[1].row),
            "ties go by row"
        );
    }
    let hits = index.search(&[0.0; 16], 4, SearchMode::Exact).unwrap();
    assert!(hits.iter().map(|h| h.row).eq(0..4));
    let hits = index.search(&codes[..dim], n, SearchMode::Exact).unwrap();
    let zero_row = hits.iter().find(|h| h.row == 3).unwrap();
    assert_eq!(zero_row.similarity, 0.0);
}

#[test]
fn ids_round_trip_and_can_be_found() {
    let (n, dim) = (40, 8);
    let codes = clustered(n, dim, 8);
    let fixed = ids(n);
    let index = CodeIndex::build(fixed.clone(), &codes, dim, &[0.5; 8]).unwrap();
    for (row, id) in fixed.iter().enumerate() {
        assert_eq!(index.id(row), id);
        assert_eq!(index.row_of(id), Some(row));
    }
    assert_eq!(index.row_of("ffffffffffffffff"), None);
    assert!(
        index.ids.ends.is_empty(),
        "equal-length ids need no offsets"
    );

    // Mixed lengths, not sorted.
    let mixed: Vec<String> = (0..n).map(|i| format!("id{}", (i * 37) % 101)).collect();
    let index = CodeIndex::build(mixed.clone(), &codes, dim, &[0.5; 8]).unwrap();
    for (row, id) in mixed.iter().enumerate() {
        assert_eq!(index.id(row), id);
        assert_eq!(index.row_of(id), Some(row));
        let hit = index
            .search(&codes[row * dim..(row + 1) * dim], 1, SearchMode::Exact)
            .unwrap();
        assert_eq!(hit[0].id, index.id(hit[0].row));
    }
    assert_eq!(index.row_of("nope"), None);
}

#[test]
fn the_builder_and_build_agree() {
    let (n, dim) = (300, 70);
    let codes = clustered(n, dim, 9);
    let thresholds = medians(&codes, dim);
    let built = CodeIndex::build(ids(n), &codes, dim, &thresholds).unwrap();
    let mut builder = CodeIndexBuilder::new(dim, &thresholds).unwrap();
    for (id, code) in ids(n).iter().zip(codes.chunks(dim)) {
        builder.push(id, code).unwrap();
    }
    assert_eq!(builder.finish(), built);
    let back = built.code(5);
    for (a, b) in back.iter().zip(&codes[5 * dim..6 * dim]) {
        assert!((a - b).abs() <= 1.0 / 510.0 + 1e-7);
    }
}

#[test]
fn bad_codes_and_queries_are_refused_with_the_item_named() {
    let codes = [0.1, 0.2, 0.3, 0.4, 1.5, 0.6];
    let error = CodeIndex::build(vec!["a".into(), "b".into()], &codes, 3, &[0.5; 3])
        .expect_err("1.5 is not a probability");
    assert!(
        matches!(&error, StoreError::BadCode { id, .. } if id == "b"),
        "{error}"
    );
    assert!(error.to_string().contains("--rebuild"), "{error}");
    let mut builder = CodeIndexBuilder::new(3, &[0.5; 3]).unwrap();
    assert!(builder.push("c", &[0.1, f32::NAN, 0.2]).is_err());
    assert!(matches!(
        builder.push("d", &[0.1]),
        Err(StoreError::BadCode { .. })
    ));
    assert!(CodeIndex::build(vec!["a".into()], &[0.1; 4], 3, &[0.5; 3]).is_err());
    assert!(CodeIndexBuilder::new(3, &[0.5; 2]).is_err());
    assert!(CodeIndexBuilder::new(0, &[]).is_err());

    let index = CodeIndex::build(vec!["a".into()], &[0.1, 0.2, 0.3], 3, &[0.5; 3]).unwrap();
    assert!(matches!(
        index.search(&[0.1, 0.2], 1, SearchMode::Exact),
        Err(StoreError::BadQuery { .. })
    ));
    assert!(index
        .search(&[0.1, f32::INFINITY, 0.0], 1, SearchMode::Exact)
        .is_err());
}

#[test]
fn results_do_not_depend_on_the_thread_count() {
    let (n, dim) = (40_000, 64);
    let codes = clustered(n, dim, 10);
    let thresholds = medians(&codes, dim);
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        pool.install(|| {
            let index = CodeIndex::build(ids(n), &codes, dim, &thresholds).unwrap();
            let mut results = Vec::new();
            for q in 0..3 {
                let query = &codes[q * 977 * dim..(q * 977 + 1) * dim];
                for mode in [
                    SearchMode::Exact,
                    SearchMode::Prefiltered { candidates: 500 },
                ] {
                    let hits = index.search(query, 25, mode).unwrap();
                    results.push(
                        hits.iter()
                            .map(|h| (h.row, h.similarity.to_bits()))
                            .collect::<Vec<_>>(),
                    );
                }
            }
            (index, results)
        })
    };
    let (one_index, one) = run(1);
    let (two_index, two) = run(2);
    assert!(one_index == two_index);
    assert_eq!(one, two);
}

#[test]
fn the_fast_kernels_agree_with_the_plain_loops() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    for dim in [1, 15, 16, 17, 31, 32, 33, 100, 256, 300] {
        let rows: Vec<u8> = (0..dim * 9).map(|_| rng.random()).collect();
        let query: Vec<i16> = (0..dim).map(|_| rng.random_range(-2000..2000)).collect();
        let mut fast = vec![0; 9];
        let mut plain = vec![0; 9];
        kernels::dots(&rows, dim, &query, &mut fast);
        kernels::dots_portable(&rows, dim, &query, &mut plain);
        assert_eq!(fast, plain, "dim {dim}");
        // source: by hand: the dot product written out for the first row.
        let first: i32 = (0..dim)
            .map(|j| i32::from(rows[j]) * i32::from(query[j]))
            .sum();
        assert_eq!(fast[0], first);
    }
    for words in 1..=6 {
        let hashes: Vec<u64> = (0..words * 9).map(|_| rng.random()).collect();
        let query: Vec<u64> = (0..words).map(|_| rng.random()).collect();
        let mut fast = vec![0; 9];
        let mut plain = vec![0; 9];
        kernels::hamming(&hashes, words, &query, &mut fast);
        kernels::hamming_portable(&hashes, words, &query, &mut plain);
        assert_eq!(fast, plain, "words {words}");
        // source: by hand: count differing bits one at a time.
        let first: u16 = (0..words * 64)
            .filter(|&b| (hashes[b / 64] >> (b % 64)) & 1 != (query[b / 64] >> (b % 64)) & 1)
            .count() as u16;
        assert_eq!(fast[0], first);
    }
}

#[test]
fn vectors_of_kind_returns_only_that_kind_in_id_order_and_loads() {
    let temp = tempfile::tempdir().unwrap();
    let store = Store::open_or_create(&temp.path().join(".tagweave"), temp.path()).unwrap();
    let (n, dim) = (30, 12);
    let codes = clustered(n, dim, 12);
    let mut rows: Vec<(String, Vec<f32>)> = ids(n)
        .into_iter()
        .zip(codes.chunks(dim).map(<[f32]>::to_vec))
        .collect();
    rows.reverse();
    store.put_vectors("code", &rows).unwrap();
    store
        .put_vectors("features", &[(ids(1)[0].clone(), vec![9.0; 5])])
        .unwrap();
    store
        .put_vectors("code_extra", &[("zz".into(), vec![1.0])])
        .unwrap();
    // A kind names a file: anything but lower-case letters and `_` is refused.
    assert!(store
        .put_vectors("x/code", &[("zz".into(), vec![1.0])])
        .is_err());
    let read: Vec<(String, Vec<f32>)> = store
        .vectors_of_kind("code")
        .collect::<Result<_>>()
        .unwrap();
    rows.reverse();
    // Codes are kept as the bytes the search uses: round(v · 255) / 255.
    let on_the_byte_grid: Vec<(String, Vec<f32>)> = rows
        .iter()
        .map(|(id, code)| {
            let grid = code.iter().map(|v| (v * 255.0).round() / 255.0).collect();
            (id.clone(), grid)
        })
        .collect();
    assert_eq!(read, on_the_byte_grid);
    assert_eq!(store.vectors_of_kind("features").count(), 1);
    assert_eq!(store.vectors_of_kind("nothing").count(), 0);

    let thresholds = medians(&codes, dim);
    let loaded = CodeIndex::load(&store, "code", &thresholds).unwrap();
    let grid_codes: Vec<f32> = on_the_byte_grid
        .iter()
        .flat_map(|(_, code)| code.iter().copied())
        .collect();
    assert_eq!(
        loaded,
        CodeIndex::build(ids(n), &grid_codes, dim, &thresholds).unwrap()
    );
    assert!(
        CodeIndex::load(&store, "features", &thresholds).is_err(),
        "wrong length"
    );
}

#[test]
fn codes_loaded_as_bytes_hash_as_their_values_even_on_the_thresholds() {
    // Every byte in every unit, with thresholds on the byte grid and between its steps:
    // loading takes the stored bytes as they are, and must give the index that building
    // from the values gives.
    let temp = tempfile::tempdir().unwrap();
    let store = Store::open_or_create(&temp.path().join(".tagweave"), temp.path()).unwrap();
    let dim = 64;
    let n = 256;
    let thresholds: Vec<f32> = (0..dim)
        .map(|j| {
            let step = (j * 4) as f32;
            if j % 2 == 0 {
                step / 255.0
            } else {
                (step + 0.5) / 255.0
            }
        })
        .collect();
    let codes: Vec<f32> = (0..n)
        .flat_map(|i| (0..dim).map(move |j| ((i + j) % 256) as f32 / 255.0))
        .collect();
    let rows: Vec<(String, Vec<f32>)> = ids(n)
        .into_iter()
        .zip(codes.chunks(dim).map(<[f32]>::to_vec))
        .collect();
    store.put_vectors("code", &rows).unwrap();
    let loaded = CodeIndex::load(&store, "code", &thresholds).unwrap();
    assert_eq!(
        loaded,
        CodeIndex::build(ids(n), &codes, dim, &thresholds).unwrap()
    );
}

#[test]
fn a_saved_index_is_read_back_only_while_the_codes_and_thresholds_are_unchanged() {
    let temp = tempfile::tempdir().unwrap();
    let store = Store::open_or_create(&temp.path().join(".tagweave"), temp.path()).unwrap();
    let (n, dim) = (40, 70);
    let codes = clustered(n, dim, 5);
    let rows: Vec<(String, Vec<f32>)> = ids(n)
        .into_iter()
        .zip(codes.chunks(dim).map(<[f32]>::to_vec))
        .collect();
    store.put_vectors("code", &rows).unwrap();
    let thresholds = medians(&codes, dim);
    let saved = super::saved_path(store.dir(), "code");
    assert!(!saved.exists());
    let built = CodeIndex::load(&store, "code", &thresholds).unwrap();
    assert!(saved.exists(), "the first load saves the index");
    assert_eq!(CodeIndex::load(&store, "code", &thresholds).unwrap(), built);
    assert_eq!(super::saved::read(&saved, &thresholds), Some(built.clone()));

    // Other thresholds (another model): not taken from the file.
    let other: Vec<f32> = thresholds.iter().map(|t| t * 0.5).collect();
    assert_eq!(super::saved::read(&saved, &other), None);
    assert_eq!(
        CodeIndex::load(&store, "code", &other).unwrap(),
        CodeIndex::build(ids(n), &on_grid(&codes), dim, &other).unwrap()
    );

    // A changed code deletes the file first; the next load sees the change.
    let mut changed = rows.clone();
    changed[3].1 = vec![1.0; dim];
    store.put_vectors("code", &changed[3..4]).unwrap();
    assert!(!saved.exists(), "a change deletes the saved index");
    let after: Vec<f32> = changed.iter().flat_map(|(_, c)| c.clone()).collect();
    let expected = CodeIndex::build(ids(n), &on_grid(&after), dim, &thresholds).unwrap();
    assert_eq!(
        CodeIndex::load(&store, "code", &thresholds).unwrap(),
        expected
    );

    // A file cut short is read past, and written whole again.
    let bytes = std::fs::read(&saved).unwrap();
    std::fs::write(&saved, &bytes[..bytes.len() - 1]).unwrap();
    assert_eq!(
        CodeIndex::load(&store, "code", &thresholds).unwrap(),
        expected
    );
    assert_eq!(std::fs::read(&saved).unwrap(), bytes);

    // Clearing the codes deletes it too.
    store.clear_vectors("code").unwrap();
    assert!(!saved.exists());
}

fn on_grid(codes: &[f32]) -> Vec<f32> {
    codes.iter().map(|v| (v * 255.0).round() / 255.0).collect()
}
