//! Lloyd's k-means with two metrics: Euclidean (the textbook algorithm, checked against a
//! reference library) and spherical (unit-length centres, assignment by largest dot
//! product; Dhillon & Modha 2001, as used for patch dictionaries by Coates & Ng 2012).

use ndarray::{Array2, ArrayView2, Axis};
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::linalg::BLOCK_ROWS;
use crate::ProgressFn;

#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Metric {
    Euclidean,
    Spherical,
}

pub(crate) struct KMeansFit {
    pub centres: Array2<f32>,
    /// Centre updates made before the assignment settled (or the limit was hit).
    pub iterations: usize,
}

/// One block's share of an assignment pass.
struct BlockStats {
    labels: Vec<usize>,
    sums: Array2<f64>,
    counts: Vec<usize>,
}

fn assign_block(block: ArrayView2<f32>, centres: &Array2<f32>, metric: Metric) -> BlockStats {
    let (k, d) = centres.dim();
    let mut scores = block.dot(&centres.t());
    if metric == Metric::Euclidean {
        // argmin ‖x − c‖² = argmax (2 x·c − ‖c‖²)
        let norms: Vec<f32> = centres.rows().into_iter().map(|c| c.dot(&c)).collect();
        for mut row in scores.rows_mut() {
            row.iter_mut()
                .zip(&norms)
                .for_each(|(s, n)| *s = 2.0 * *s - n);
        }
    }
    let mut stats = BlockStats {
        labels: Vec::with_capacity(block.nrows()),
        sums: Array2::zeros((k, d)),
        counts: vec![0; k],
    };
    for (x, row) in block.rows().into_iter().zip(scores.rows()) {
        // First best on ties, so the result never depends on anything but the data.
        let best = row
            .iter()
            .enumerate()
            .fold(
                (0, f32::NEG_INFINITY),
                |acc, (j, &s)| if s > acc.1 { (j, s) } else { acc },
            )
            .0;
        stats.labels.push(best);
        stats.counts[best] += 1;
        let mut sum = stats.sums.row_mut(best);
        sum.iter_mut()
            .zip(x.iter())
            .for_each(|(s, &v)| *s += f64::from(v));
    }
    stats
}

/// Labels, per-centre sums and counts for the whole data set; blocks are
/// fixed-size and merged in order, so the outcome is independent of the thread count.
fn assign(data: ArrayView2<f32>, centres: &Array2<f32>, metric: Metric) -> BlockStats {
    let blocks: Vec<BlockStats> = data
        .axis_chunks_iter(Axis(0), BLOCK_ROWS)
        .collect::<Vec<_>>()
        .into_par_iter()
        .map(|block| assign_block(block, centres, metric))
        .collect();
    let mut total = BlockStats {
        labels: Vec::with_capacity(data.nrows()),
        sums: Array2::zeros(centres.dim()),
        counts: vec![0; centres.nrows()],
    };
    for b in blocks {
        total.labels.extend(b.labels);
        total.sums += &b.sums;
        total
            .counts
            .iter_mut()
            .zip(b.counts)
            .for_each(|(t, c)| *t += c);
    }
    total
}

fn normalise_row(mut row: ndarray::ArrayViewMut1<f32>) {
    let norm = row.dot(&row).sqrt();
    if norm > 0.0 {
        row /= norm;
    }
}

/// Runs Lloyd iterations from `init` until the assignment stops changing or `max_iter`
/// updates were made. An emptied centre is re-seeded on a random data row drawn from `rng`.
/// Reports `(iterations done, max_iter)` through `progress`.
pub(crate) fn lloyd(
    data: ArrayView2<f32>,
    init: Array2<f32>,
    metric: Metric,
    max_iter: usize,
    rng: &mut ChaCha8Rng,
    progress: ProgressFn,
) -> KMeansFit {
    let mut centres = init;
    if metric == Metric::Spherical {
        centres.rows_mut().into_iter().for_each(normalise_row);
    }
    let mut previous: Option<Vec<usize>> = None;
    let mut iterations = 0;
    let mut stats = assign(data, &centres, metric);
    while iterations < max_iter && previous.as_ref() != Some(&stats.labels) {
        for (j, mut centre) in centres.rows_mut().into_iter().enumerate() {
            if stats.counts[j] == 0 {
                centre.assign(&data.row(rng.random_range(0..data.nrows())));
            } else {
                let count = stats.counts[j] as f64;
                centre
                    .iter_mut()
                    .zip(stats.sums.row(j))
                    .for_each(|(c, &s)| *c = (s / count) as f32);
            }
            if metric == Metric::Spherical {
                normalise_row(centre);
            }
        }
        iterations += 1;
        progress(iterations, max_iter);
        previous = Some(std::mem::take(&mut stats.labels));
        stats = assign(data, &centres, metric);
    }
    KMeansFit {
        centres,
        iterations,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;
    use rand::SeedableRng;

    /// Fisher's Iris data (Fisher 1936), 150 × 4: sepal length, sepal width, petal length,
    /// petal width (cm). source: UCI Machine Learning Repository "Iris" (public domain), as
    /// shipped in scikit-learn 1.9.1 `sklearn.datasets.load_iris()` (with UCI's two noted
    /// corrections to rows 35 and 38).
    #[rustfmt::skip]
    const IRIS: [[f32; 4]; 150] = [
        [5.1,3.5,1.4,0.2],[4.9,3.0,1.4,0.2],[4.7,3.2,1.3,0.2],[4.6,3.1,1.5,0.2],[5.0,3.6,1.4,0.2],
        [5.4,3.9,1.7,0.4],[4.6,3.4,1.4,0.3],[5.0,3.4,1.5,0.2],[4.4,2.9,1.4,0.2],[4.9,3.1,1.5,0.1],
        [5.4,3.7,1.5,0.2],[4.8,3.4,1.6,0.2],[4.8,3.0,1.4,0.1],[4.3,3.0,1.1,0.1],[5.8,4.0,1.2,0.2],
        [5.7,4.4,1.5,0.4],[5.4,3.9,1.3,0.4],[5.1,3.5,1.4,0.3],[5.7,3.8,1.7,0.3],[5.1,3.8,1.5,0.3],
        [5.4,3.4,1.7,0.2],[5.1,3.7,1.5,0.4],[4.6,3.6,1.0,0.2],[5.1,3.3,1.7,0.5],[4.8,3.4,1.9,0.2],
        [5.0,3.0,1.6,0.2],[5.0,3.4,1.6,0.4],[5.2,3.5,1.5,0.2],[5.2,3.4,1.4,0.2],[4.7,3.2,1.6,0.2],
        [4.8,3.1,1.6,0.2],[5.4,3.4,1.5,0.4],[5.2,4.1,1.5,0.1],[5.5,4.2,1.4,0.2],[4.9,3.1,1.5,0.2],
        [5.0,3.2,1.2,0.2],[5.5,3.5,1.3,0.2],[4.9,3.6,1.4,0.1],[4.4,3.0,1.3,0.2],[5.1,3.4,1.5,0.2],
        [5.0,3.5,1.3,0.3],[4.5,2.3,1.3,0.3],[4.4,3.2,1.3,0.2],[5.0,3.5,1.6,0.6],[5.1,3.8,1.9,0.4],
        [4.8,3.0,1.4,0.3],[5.1,3.8,1.6,0.2],[4.6,3.2,1.4,0.2],[5.3,3.7,1.5,0.2],[5.0,3.3,1.4,0.2],
        [7.0,3.2,4.7,1.4],[6.4,3.2,4.5,1.5],[6.9,3.1,4.9,1.5],[5.5,2.3,4.0,1.3],[6.5,2.8,4.6,1.5],
        [5.7,2.8,4.5,1.3],[6.3,3.3,4.7,1.6],[4.9,2.4,3.3,1.0],[6.6,2.9,4.6,1.3],[5.2,2.7,3.9,1.4],
        [5.0,2.0,3.5,1.0],[5.9,3.0,4.2,1.5],[6.0,2.2,4.0,1.0],[6.1,2.9,4.7,1.4],[5.6,2.9,3.6,1.3],
        [6.7,3.1,4.4,1.4],[5.6,3.0,4.5,1.5],[5.8,2.7,4.1,1.0],[6.2,2.2,4.5,1.5],[5.6,2.5,3.9,1.1],
        [5.9,3.2,4.8,1.8],[6.1,2.8,4.0,1.3],[6.3,2.5,4.9,1.5],[6.1,2.8,4.7,1.2],[6.4,2.9,4.3,1.3],
        [6.6,3.0,4.4,1.4],[6.8,2.8,4.8,1.4],[6.7,3.0,5.0,1.7],[6.0,2.9,4.5,1.5],[5.7,2.6,3.5,1.0],
        [5.5,2.4,3.8,1.1],[5.5,2.4,3.7,1.0],[5.8,2.7,3.9,1.2],[6.0,2.7,5.1,1.6],[5.4,3.0,4.5,1.5],
        [6.0,3.4,4.5,1.6],[6.7,3.1,4.7,1.5],[6.3,2.3,4.4,1.3],[5.6,3.0,4.1,1.3],[5.5,2.5,4.0,1.3],
        [5.5,2.6,4.4,1.2],[6.1,3.0,4.6,1.4],[5.8,2.6,4.0,1.2],[5.0,2.3,3.3,1.0],[5.6,2.7,4.2,1.3],
        [5.7,3.0,4.2,1.2],[5.7,2.9,4.2,1.3],[6.2,2.9,4.3,1.3],[5.1,2.5,3.0,1.1],[5.7,2.8,4.1,1.3],
        [6.3,3.3,6.0,2.5],[5.8,2.7,5.1,1.9],[7.1,3.0,5.9,2.1],[6.3,2.9,5.6,1.8],[6.5,3.0,5.8,2.2],
        [7.6,3.0,6.6,2.1],[4.9,2.5,4.5,1.7],[7.3,2.9,6.3,1.8],[6.7,2.5,5.8,1.8],[7.2,3.6,6.1,2.5],
        [6.5,3.2,5.1,2.0],[6.4,2.7,5.3,1.9],[6.8,3.0,5.5,2.1],[5.7,2.5,5.0,2.0],[5.8,2.8,5.1,2.4],
        [6.4,3.2,5.3,2.3],[6.5,3.0,5.5,1.8],[7.7,3.8,6.7,2.2],[7.7,2.6,6.9,2.3],[6.0,2.2,5.0,1.5],
        [6.9,3.2,5.7,2.3],[5.6,2.8,4.9,2.0],[7.7,2.8,6.7,2.0],[6.3,2.7,4.9,1.8],[6.7,3.3,5.7,2.1],
        [7.2,3.2,6.0,1.8],[6.2,2.8,4.8,1.8],[6.1,3.0,4.9,1.8],[6.4,2.8,5.6,2.1],[7.2,3.0,5.8,1.6],
        [7.4,2.8,6.1,1.9],[7.9,3.8,6.4,2.0],[6.4,2.8,5.6,2.2],[6.3,2.8,5.1,1.5],[6.1,2.6,5.6,1.4],
        [7.7,3.0,6.1,2.3],[6.3,3.4,5.6,2.4],[6.4,3.1,5.5,1.8],[6.0,3.0,4.8,1.8],[6.9,3.1,5.4,2.1],
        [6.7,3.1,5.6,2.4],[6.9,3.1,5.1,2.3],[5.8,2.7,5.1,1.9],[6.8,3.2,5.9,2.3],[6.7,3.3,5.7,2.5],
        [6.7,3.0,5.2,2.3],[6.3,2.5,5.0,1.9],[6.5,3.0,5.2,2.0],[6.2,3.4,5.4,2.3],[5.9,3.0,5.1,1.8],
    ];

    fn iris() -> Array2<f32> {
        Array2::from_shape_fn((150, 4), |(i, j)| IRIS[i][j])
    }

    #[test]
    fn euclidean_matches_scikit_learn_on_iris() {
        let data = iris();
        let init = ndarray::stack![Axis(0), data.row(0), data.row(50), data.row(100)];
        let mut rng = ChaCha8Rng::seed_from_u64(0);
        let fit = lloyd(
            data.view(),
            init,
            Metric::Euclidean,
            300,
            &mut rng,
            &|_, _| {},
        );
        // source: scikit-learn 1.9.1 (numpy 2.4.6), run for this test:
        //   X = load_iris().data
        //   KMeans(n_clusters=3, init=X[[0, 50, 100]], n_init=1, algorithm="lloyd",
        //          max_iter=300, tol=0.0).fit(X)
        //   → inertia_ 78.851441426146, n_iter_ 4, cluster sizes 50 / 62 / 38,
        //     cluster_centers_ below.
        let expected: Array2<f64> = array![
            [5.006, 3.428, 1.462, 0.246],
            [
                5.901_612_903_2,
                2.748_387_096_8,
                4.393_548_387_1,
                1.433_870_967_7
            ],
            [6.85, 3.073_684_210_5, 5.742_105_263_2, 2.071_052_631_6],
        ];
        let err = (&fit.centres.mapv(f64::from) - &expected)
            .iter()
            .fold(0f64, |m, x| m.max(x.abs()));
        assert!(err < 1e-4, "centres differ by {err}: {}", fit.centres);
        let inertia: f64 = data
            .rows()
            .into_iter()
            .map(|x| {
                let dist = |c: ndarray::ArrayView1<f32>| {
                    x.iter()
                        .zip(c)
                        .map(|(a, b)| f64::from(a - b).powi(2))
                        .sum::<f64>()
                };
                fit.centres
                    .rows()
                    .into_iter()
                    .map(dist)
                    .fold(f64::INFINITY, f64::min)
            })
            .sum();
        assert!((inertia - 78.851_441_426_146).abs() < 1e-3, "{inertia}");
        // scikit-learn also counts the pass that finds the labels unchanged; we count
        // centre updates, one fewer.
        assert_eq!(fit.iterations, 3);
    }

    #[test]
    fn spherical_centres_are_unit_and_separate_directions() {
        // Two bundles of directions, around +x and around +y, at very different lengths.
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let data = Array2::from_shape_fn((400, 2), |(i, j)| {
            let len = if i % 3 == 0 { 10.0 } else { 0.5 };
            let main = (i < 200) == (j == 0);
            len * if main { 1.0 } else { rng.random::<f32>() * 0.2 }
        });
        let init = ndarray::stack![Axis(0), data.row(198), data.row(201)];
        let fit = lloyd(
            data.view(),
            init,
            Metric::Spherical,
            50,
            &mut rng,
            &|_, _| {},
        );
        for c in fit.centres.rows() {
            assert!((c.dot(&c) - 1.0).abs() < 1e-5);
        }
        let (a, b) = (fit.centres.row(0), fit.centres.row(1));
        assert!(
            a[0].max(b[0]) > 0.97 && a[1].max(b[1]) > 0.97,
            "{}",
            fit.centres
        );
    }
}
