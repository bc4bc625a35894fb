//! The trainer's tests: small structured data, determinism, options, and a reference run
//! on the UCI digits.

use ndarray::{Array1, Array2, Axis};
use rand::Rng;

use super::*;
use crate::{log_likelihood_exact, BinaryRbm, GaussianBernoulliRbm};

/// `rows` noisy copies of three 16-bit prototypes, each bit flipped with probability 5%.
fn prototype_data(rows: usize, seed: u64) -> Array2<f32> {
    let prototypes = [
        0b1111_0000_1111_0000u16,
        0b0000_1111_0000_1111,
        0b1100_1100_0011_0011,
    ];
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut data = Array2::zeros((rows, 16));
    for mut row in data.rows_mut() {
        let p = prototypes[rng.random_range(0..3)];
        for (i, x) in row.iter_mut().enumerate() {
            let bit = p >> i & 1 == 1;
            *x = f32::from(bit ^ (rng.random::<f32>() < 0.05));
        }
    }
    data
}

fn fit(rbm: &mut BinaryRbm, data: &Array2<f32>, opts: &RbmTrainingOptions) -> Vec<EpochReport> {
    let mut reports = Vec::new();
    train(rbm, data.view(), None, opts, &mut |r| reports.push(r)).unwrap();
    reports
}

// Prototype data's own entropy is 16·H(0.05) + ln 3 ≈ 3.18 + 1.10 = 4.28 nats per row
// (by hand), so a good model's mean log-likelihood approaches −4.3.
// Measured (these seeds): CD-1 reconstruction error 0.227 → 0.043, log-likelihood
// −11.09 → −4.86; PCD 0.234 → 0.051, −11.09 → −4.73.
#[test]
fn cd1_and_pcd_learn_prototype_structure() {
    let data = prototype_data(300, 1);
    let init = BinaryRbm::new(16, 8, 0.01, 2);
    let ll_init = log_likelihood_exact(&init, data.view()).unwrap();
    let cd1 = RbmTrainingOptions {
        epochs: 30,
        batch_size: 20,
        learning_rate: 0.1,
        ..RbmTrainingOptions::default()
    };
    // PCD with momentum 0.9 oscillated here (log-likelihood −21 after 30 epochs): keep
    // momentum low and let the rate decay.
    let pcd = RbmTrainingOptions {
        persistent: true,
        learning_rate: 0.05,
        final_momentum: 0.5,
        schedule: LearningRateSchedule::LinearDecay {
            from_epoch: 10,
            final_fraction: 0.05,
        },
        ..cd1.clone()
    };
    for opts in [cd1, pcd] {
        let mut rbm = init.clone();
        let reports = fit(&mut rbm, &data, &opts);
        let (first, last) = (
            reports[0].reconstruction_error,
            reports[29].reconstruction_error,
        );
        assert!(last < 0.5 * first, "{opts:?}: {first} → {last}");
        let ll = log_likelihood_exact(&rbm, data.view()).unwrap();
        assert!(
            ll > -5.0 && ll > ll_init + 5.0,
            "{opts:?}: {ll_init} → {ll}"
        );
    }
}

#[test]
fn same_seed_same_weights_on_one_or_two_threads() {
    let data = prototype_data(200, 3);
    let opts = RbmTrainingOptions {
        epochs: 3,
        gibbs_steps: 2,
        sparsity: Some(Sparsity {
            target: 0.1,
            cost: 0.01,
            decay: 0.9,
        }),
        ..RbmTrainingOptions::default()
    };
    let run = |threads, seed| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        let mut rbm = BinaryRbm::new(16, 10, 0.01, 4);
        pool.install(|| {
            fit(
                &mut rbm,
                &data,
                &RbmTrainingOptions {
                    seed,
                    ..opts.clone()
                },
            )
        });
        rbm
    };
    let one = run(1, 7);
    assert_eq!(one, run(2, 7));
    assert_ne!(one, run(2, 8));
}

#[test]
fn models_built_from_transposed_weights_train() {
    let data = prototype_data(50, 9);
    // 16 × 8 weights stored column-major.
    let w = BinaryRbm::new(8, 16, 0.01, 1).weights.reversed_axes();
    let mut rbm = BinaryRbm::from_parts(w, Array1::zeros(16), Array1::zeros(8));
    let before = rbm.hidden_probabilities(data.view());
    let opts = RbmTrainingOptions {
        epochs: 2,
        ..RbmTrainingOptions::default()
    };
    fit(&mut rbm, &data, &opts);
    assert!(rbm.weights.is_standard_layout());
    assert_ne!(rbm.hidden_probabilities(data.view()), before);
}

#[test]
fn early_stopping_keeps_the_best_validation_model() {
    // Validation rows from other patterns: fitting the training prototypes harder
    // makes their reconstruction worse after a while.
    let data = prototype_data(200, 5);
    let validation = prototype_data(50, 6).mapv(|x| 1.0 - x);
    let opts = RbmTrainingOptions {
        epochs: 200,
        patience: 3,
        learning_rate: 0.1,
        ..RbmTrainingOptions::default()
    };
    let mut rbm = BinaryRbm::new(16, 8, 0.01, 2);
    let mut reports = Vec::new();
    let summary = train(
        &mut rbm,
        data.view(),
        Some(validation.view()),
        &opts,
        &mut |r| reports.push(r),
    )
    .unwrap();
    assert!(summary.stopped_early, "{summary:?}");
    assert_eq!(summary.epochs_run, reports.len());
    let errors: Vec<f32> = reports
        .iter()
        .map(|r| r.validation_error.unwrap())
        .collect();
    let best = errors.iter().copied().fold(f32::INFINITY, f32::min);
    assert_eq!(errors[summary.kept_epoch], best);
    assert_eq!(rbm.reconstruction_error(validation.view()), best);
    assert_eq!(summary.epochs_run, summary.kept_epoch + opts.patience + 1);
}

#[test]
fn gaussian_rbm_learns_cluster_structure() {
    // Standardised 10-dimensional data from three well separated cluster centres.
    let mut rng = ChaCha8Rng::seed_from_u64(8);
    let centres =
        Array2::from_shape_simple_fn((3, 10), || 1.3 * crate::rbm::standard_normal(&mut rng));
    let data = Array2::from_shape_fn((300, 10), |(r, d)| {
        centres[[r % 3, d]] + 0.3 * crate::rbm::standard_normal(&mut rng)
    });
    let opts = RbmTrainingOptions {
        epochs: 30,
        batch_size: 30,
        learning_rate: 0.005,
        ..RbmTrainingOptions::default()
    };
    let mut rbm = GaussianBernoulliRbm::new(10, 12, 0.01, 1);
    let mut reports = Vec::new();
    train(&mut rbm, data.view(), None, &opts, &mut |r| reports.push(r)).unwrap();
    let (first, last) = (
        reports[0].reconstruction_error,
        reports[29].reconstruction_error,
    );
    // Measured: 1.53 → 0.11.
    assert!(last < 0.3 * first, "{first} → {last}");
}

// lr 1.0 decaying from epoch 2 to 0.1 at epoch 11 (the last of 12): by hand,
// epoch e ≥ 2 gets 1 − 0.9 · (e − 2)/9, so epoch 5 → 0.7, epoch 11 → 0.1.
#[test]
fn linear_decay_schedule() {
    let opts = RbmTrainingOptions {
        epochs: 12,
        learning_rate: 1.0,
        schedule: LearningRateSchedule::LinearDecay {
            from_epoch: 2,
            final_fraction: 0.1,
        },
        ..RbmTrainingOptions::default()
    };
    let got: Vec<f32> = [0, 2, 5, 11]
        .iter()
        .map(|&e| opts.learning_rate_at(e))
        .collect();
    for (g, w) in got.iter().zip([1.0, 1.0, 0.7, 0.1]) {
        assert!((g - w).abs() < 1e-6, "{got:?}");
    }
}

#[test]
fn bad_options_and_divergence_are_errors() {
    let data = prototype_data(10, 0);
    let mut rbm = BinaryRbm::new(16, 4, 0.01, 0);
    let opts = RbmTrainingOptions {
        batch_size: 0,
        ..RbmTrainingOptions::default()
    };
    let e = train(&mut rbm, data.view(), None, &opts, &mut |_| {}).unwrap_err();
    assert!(matches!(
        e,
        ModelError::InvalidOption {
            name: "batch_size",
            ..
        }
    ));
    let mut g = GaussianBernoulliRbm::new(16, 4, 0.01, 0);
    let opts = RbmTrainingOptions {
        learning_rate: 1e3,
        ..RbmTrainingOptions::default()
    };
    let e = train(&mut g, (data * 100.0).view(), None, &opts, &mut |_| {}).unwrap_err();
    assert!(matches!(e, ModelError::Diverged { .. }), "{e:?}");
}

mod digits {
    use super::*;

    /// The 1,797 UCI optical digits (8×8, values 0–16) scaled to [0, 1]; see testdata/README.md.
    fn digits() -> Array2<f32> {
        let text = include_str!("../../testdata/digits.csv");
        let rows: Vec<f32> = text
            .lines()
            .skip(1)
            .flat_map(|line| {
                line.split(',')
                    .take(64)
                    .map(|x| x.parse::<f32>().unwrap() / 16.0)
            })
            .collect();
        Array2::from_shape_vec((rows.len() / 64, 64), rows).unwrap()
    }

    // source: scikit-learn 1.9.1 (numpy 2.4.6) on the same rows, run for this test:
    //   X = load_digits().data / 16; train = X[:1500], held out = X[1500:]
    //   BernoulliRBM(n_components=64, learning_rate=0.06, n_iter=10, random_state=0).fit(train)
    //   held-out MSE of the mean-field reconstruction σ(σ(x Wᵀ + c) W + b): 0.0439
    //   (0.0434 with n_components=100); predicting each pixel's training mean: 0.0739.
    // BernoulliRBM is PCD-1, batch 10, no momentum, no weight decay; the same settings here
    // measured 0.0428. Our CD-1 with momentum (lr 0.1, batch 32, 10 epochs) measured 0.0158.
    #[test]
    fn digits_reconstruction_matches_reference_and_bound() {
        let data = digits();
        assert_eq!(data.dim(), (1797, 64));
        let (train_rows, held_out) = data.view().split_at(Axis(0), 1500);
        let like_reference = RbmTrainingOptions {
            epochs: 10,
            batch_size: 10,
            learning_rate: 0.06,
            persistent: true,
            initial_momentum: 0.0,
            final_momentum: 0.0,
            weight_decay: 0.0,
            ..RbmTrainingOptions::default()
        };
        let cd1 = RbmTrainingOptions {
            epochs: 10,
            batch_size: 32,
            learning_rate: 0.1,
            ..RbmTrainingOptions::default()
        };
        let mut errors = Vec::new();
        for opts in [like_reference, cd1] {
            let mut rbm = BinaryRbm::new(64, 64, 0.01, 0);
            train(&mut rbm, train_rows, None, &opts, &mut |_| {}).unwrap();
            errors.push(rbm.reconstruction_error(held_out));
        }
        assert!(
            (errors[0] - 0.0439).abs() < 0.004,
            "PCD like the reference: {}",
            errors[0]
        );
        assert!(errors[1] < 0.018, "CD-1 with momentum: {}", errors[1]);
    }
}
