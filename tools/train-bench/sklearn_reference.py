#!/usr/bin/env python3
"""Times scikit-learn's BernoulliRBM on the digits rows that `train-bench` uses.

Run by hand (not in CI), on an idle machine, beside `cargo run -p train-bench --release
-- --only digits`:

    python3 tools/train-bench/sklearn_reference.py [--repeats 3]

Same data and sizes as the bench's digits cases: crates/model/testdata/digits.csv scaled to
[0, 1], 256 hidden units, batch 64, learning rate 0.05, 20 epochs (n_iter), random_state 0.
BernoulliRBM is persistent CD-1 without momentum or weight decay (the bench's "digits-pcd"
case uses the same settings). Prints ms/epoch (median of the repeats, total fit time / 20)
in float64 and float32, on 1 BLAS thread and on the default thread count, with the
mean-field reconstruction MSE and the mean pseudo-likelihood over the training rows.
"""

import argparse
import os
import statistics
import sys
import time

import numpy as np
import sklearn
from sklearn.neural_network import BernoulliRBM
from threadpoolctl import threadpool_limits

HERE = os.path.dirname(os.path.abspath(__file__))
DIGITS = os.path.join(HERE, "..", "..", "crates", "model", "testdata", "digits.csv")
EPOCHS = 20


def load_digits_csv():
    data = np.loadtxt(DIGITS, delimiter=",", skiprows=1)
    return data[:, :64] / 16.0  # drop the label column; pixels 0–16 → [0, 1]


def reconstruction_mse(rbm, x):
    """Mean-field v → p(h|v) → E[v|h], the measure tagweave's trainer reports."""
    sig = lambda z: 1.0 / (1.0 + np.exp(-z))
    h = sig(x @ rbm.components_.T + rbm.intercept_hidden_)
    r = sig(h @ rbm.components_ + rbm.intercept_visible_)
    return float(np.mean((x - r) ** 2))


def measure(x, repeats):
    times, rbm = [], None
    for _ in range(repeats):
        rbm = BernoulliRBM(
            n_components=256,
            batch_size=64,
            learning_rate=0.05,
            n_iter=EPOCHS,
            random_state=0,
        )
        start = time.perf_counter()
        rbm.fit(x)
        times.append((time.perf_counter() - start) * 1e3 / EPOCHS)
    # score_samples flips one random pixel per row: fix its generator for repeatability.
    rbm.random_state_ = np.random.RandomState(0)
    pseudo_ll = float(np.mean(rbm.score_samples(x)))
    return statistics.median(times), min(times), reconstruction_mse(rbm, x), pseudo_ll


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    x64 = load_digits_csv()
    print(
        f"scikit-learn {sklearn.__version__}, numpy {np.__version__}, "
        f"python {sys.version.split()[0]}; digits {x64.shape[0]}×{x64.shape[1]}, "
        f"256 hidden, batch 64, lr 0.05, {EPOCHS} epochs, random_state 0"
    )
    print("| dtype | BLAS threads | ms/epoch (median) | ms/epoch (best) | recon. MSE | pseudo-LL |")
    print("| --- | --- | --- | --- | --- | --- |")
    for dtype in (np.float64, np.float32):
        x = x64.astype(dtype)
        for threads in (1, None):
            if threads is None:
                median, best, mse, pll = measure(x, args.repeats)
                label = "default"
            else:
                with threadpool_limits(limits=threads):
                    median, best, mse, pll = measure(x, args.repeats)
                label = str(threads)
            print(
                f"| {np.dtype(dtype).name} | {label} | {median:.1f} | {best:.1f} "
                f"| {mse:.4f} | {pll:.2f} |"
            )


if __name__ == "__main__":
    main()
