"""Which picture-description levers lift kNN tag transfer, measured outside the Rust code.

Reads what `feature-bench quality --dump DIR` writes (each set's 3,700 features per picture as
little-endian f32, and a TSV of paths and tags), rebuilds candidate extra blocks from the same
pictures with numpy / scikit-image, and prints leave-one-out kNN LRAP (k = 10, cosine on
standardised features, tags on >= 2 pictures; the same measure as `feature-bench quality`) and
ridge / kNN LRAP on 75/25 splits.

    pip install numpy scikit-learn scikit-image pillow
    target/release/feature-bench quality --dump /tmp/fb            # shared sets
    cp -r demo-collection /tmp/d/demo && target/release/feature-bench quality \
        --eval /tmp/d --sets demo --dump /tmp/fb
    python3 tools/feature-bench/study/levers.py /tmp/fb demo emoji-twemoji tuxpaint-stamps

Levers (sources beside each):
- second layer: sum-pooled 2x2 first-layer maps (square-rooted), 3x3 neighbourhoods of them
  whitened and clustered like the first layer, pyramid-pooled (Coates & Ng 2011, "Selecting
  receptive fields in deep networks");
- HOG: scikit-image `hog` (Dalal & Triggs 2005), 9 orientations, 2x2-cell blocks, L2-Hys, on
  the working image padded to a white 128 px square; cell 8 or 16 px; "mirror-summed" adds
  the descriptor of the left-right mirrored picture;
- patches at a second scale: the first layer again on a 64 px working image, stride 1;
- PCA whitening fitted on all pictures (no tags): d = n/4 components (at most 256), each
  divided by singular value ** (2 p), p = 0.25 (Jegou & Chum 2012, "Negative evidence and
  co-occurrences in image retrieval"); d and p were chosen on the demo archive, not on the
  shared sets.
"""
import sys
import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from PIL import Image
from sklearn.linear_model import Ridge
from sklearn.metrics import label_ranking_average_precision_score as lrap
from skimage.feature import hog


def load(folder, name):
    meta = open(f'{folder}/{name}.tsv').read().splitlines()
    n, d, cd = map(int, meta[0].split())
    x = np.fromfile(f'{folder}/{name}.f32', dtype='<f4').reshape(n, d)
    paths, tags = [], []
    for line in meta[1:]:
        p, t = line.split('\t')
        paths.append(p)
        tags.append(t.split(','))
    return x, cd, paths, tags


def standardise(x, fit=None):
    fit = x if fit is None else fit
    m, s = fit.mean(0), fit.std(0)
    s[s < 1e-6] = 1.0
    return (x - m) / s


def tag_matrix(tags):
    vocab = sorted({t for ts in tags for t in ts})
    idx = {t: i for i, t in enumerate(vocab)}
    y = np.zeros((len(tags), len(vocab)))
    for i, ts in enumerate(tags):
        for t in ts:
            y[i, idx[t]] = 1
    return y


def unit(a):
    return a / np.maximum(np.linalg.norm(a, axis=1, keepdims=True), 1e-12)


def knn_scores(sims, y_train, k=10):
    near = np.argsort(-sims, 1)[:, :k]
    return np.array([(y_train[near[i]] * np.maximum(sims[i, near[i]], 0)[:, None]).sum(0)
                     for i in range(len(sims))]) + y_train.mean(0) * 1e-3


def loo_lrap(z, y):
    """z already scaled; leave-one-out kNN, tags on >= 2 pictures."""
    s = unit(z) @ unit(z).T
    np.fill_diagonal(s, -np.inf)
    counts = y.sum(0)
    scores = knn_scores(s, y) - y * 1e-3 / len(y)  # own tags out of the tie-break
    keep = counts >= 2
    rows = y[:, keep].any(1)
    return lrap(y[rows][:, keep], scores[rows][:, keep])


def pca_whiten(z, d, power, fit=None):
    fit = z if fit is None else fit
    m = fit.mean(0)
    _, s, vt = np.linalg.svd(fit - m, full_matrices=False)
    d = min(d, len(s))
    return ((z - m) @ vt[:d].T) / (s[:d] + 1e-9) ** (2 * power)


def working_images(paths, long_side):
    out = []
    for p in paths:
        im = Image.open(p).convert('RGBA')
        im = Image.alpha_composite(Image.new('RGBA', im.size, (255,) * 4), im).convert('RGB')
        w, h = im.size
        s = long_side / max(w, h)
        im = im.resize((max(1, round(w * s)), max(1, round(h * s))), Image.BILINEAR)
        out.append(np.asarray(im, dtype=np.float32) / 255.0)
    return out


def pad_square(im, side=128):
    h, w, _ = im.shape
    out = np.ones((side, side, 3), np.float32)
    y0, x0 = (side - h) // 2, (side - w) // 2
    out[y0:y0 + h, x0:x0 + w] = im
    return out


def hog_of(im, cell):
    return hog(pad_square(im).mean(2), orientations=9, pixels_per_cell=(cell, cell),
               cells_per_block=(2, 2), block_norm='L2-Hys')


class Layer:
    """Patch layer like tagweave's: per-channel mean out, contrast-normalised, ZCA, spherical
    k-means, soft threshold 0.25."""

    def __init__(self, size, stride, atoms, channels, rng):
        self.p, self.stride, self.k, self.c, self.rng = size, stride, atoms, channels, rng

    def patches(self, img):
        h, w = img.shape[:2]
        if h < self.p or w < self.p:
            img = np.pad(img, ((0, max(0, self.p - h)), (0, max(0, self.p - w)), (0, 0)))
        v = sliding_window_view(img, (self.p, self.p), axis=(0, 1))[::self.stride, ::self.stride]
        ny, nx = v.shape[:2]
        q = v.transpose(0, 1, 3, 4, 2).reshape(ny, nx, self.p * self.p, self.c)
        q = (q - q.mean(2, keepdims=True)).reshape(ny, nx, -1)
        return q / np.sqrt(q.var(2, keepdims=True) + 0.01)

    def learn(self, imgs, samples=200):
        rows = []
        for im in imgs:
            q = self.patches(im).reshape(-1, self.p * self.p * self.c)
            rows.append(q[self.rng.choice(len(q), min(samples, len(q)), replace=False)])
        x = np.concatenate(rows)
        self.m = x.mean(0)
        e, v = np.linalg.eigh(np.cov(x - self.m, rowvar=False))
        w = v @ np.diag(1 / np.sqrt(e + 0.1)) @ v.T
        z = (x - self.m) @ w
        d = z[self.rng.choice(len(z), self.k, replace=False)]
        for _ in range(30):
            d = d / (np.linalg.norm(d, axis=1, keepdims=True) + 1e-8)
            s = z @ d.T
            a = s.argmax(1)
            for j in range(self.k):
                d[j] = (s[a == j, j, None] * z[a == j]).sum(0) if (a == j).any() else z[self.rng.integers(len(z))]
        d = d / (np.linalg.norm(d, axis=1, keepdims=True) + 1e-8)
        self.proj = w @ d.T
        return self

    def maps(self, img):
        return np.maximum((self.patches(img) - self.m) @ self.proj - 0.25, 0)


def pyramid(maps, grids=(1, 2, 4, 8)):
    ny, nx, k = maps.shape
    out = []
    for g in grids:
        for gy in range(g):
            for gx in range(g):
                c = maps[gy * ny // g:(gy + 1) * ny // g, gx * nx // g:(gx + 1) * nx // g].reshape(-1, k).sum(0)
                n = np.linalg.norm(c)
                out.append(c / (n + 1e-3) if n > 0 else c)
    return np.concatenate(out)


def pooled_2x2(maps):
    ny, nx, k = maps.shape
    if ny < 2 or nx < 2:
        maps = np.pad(maps, ((0, max(0, 2 - ny)), (0, max(0, 2 - nx)), (0, 0)))
        ny, nx = maps.shape[:2]
    return np.sqrt(maps[:ny // 2 * 2, :nx // 2 * 2].reshape(ny // 2, 2, nx // 2, 2, k).sum((1, 3)))


def main(folder, names):
    rng = np.random.default_rng(7)
    for name in names:
        x, cd, paths, tags = load(folder, name)
        y = tag_matrix(tags)
        n = len(x)
        imgs = working_images(paths, 128)
        mirrors = [im[:, ::-1].copy() for im in imgs]
        hog8 = np.array([hog_of(im, 8) for im in imgs])
        hog16 = np.array([hog_of(im, 16) for im in imgs])
        hog16m = hog16 + np.array([hog_of(im, 16) for im in mirrors])
        first = Layer(6, 2, 32, 3, rng).learn(imgs)
        pooled = [pooled_2x2(first.maps(im)) for im in imgs]
        second = Layer(3, 1, 64, 32, rng).learn(pooled)
        layer2 = np.array([pyramid(second.maps(p)) for p in pooled])
        small = working_images(paths, 64)
        scale2 = Layer(6, 1, 32, 3, rng).learn(small)
        patches64 = np.array([pyramid(scale2.maps(im), (1, 2, 4)) for im in small])
        d = min(n // 4, 256)
        variants = [
            ('today (colour + patches)', x),
            ('+ second layer', np.hstack([x, layer2])),
            ('+ HOG cell 8', np.hstack([x, hog8])),
            ('+ HOG cell 16, mirror-summed', np.hstack([x, hog16m])),
            ('+ patches at 64 px', np.hstack([x, patches64])),
            ('+ second layer + HOG 16 mirror-summed', np.hstack([x, layer2, hog16m])),
        ]
        base = None
        for label, f in variants:
            z = standardise(f)
            plain = loo_lrap(z, y)
            whitened = loo_lrap(pca_whiten(z, d, 0.25), y)
            base = base or plain
            print(f'{name:16} {label:40} {f.shape[1]:5} values  LOO {plain:.3f} ({plain / base:.2f}x)'
                  f'  PCA-whitened {whitened:.3f} ({whitened / base:.2f}x)', flush=True)
        for label, f, whiten in [('today', x, False), ('+ HOG 16 mirror-summed', np.hstack([x, hog16m]), False),
                                 ('today, PCA-whitened', x, True)]:
            cells = []
            for seed in [7, 1, 2]:
                perm = np.random.RandomState(seed).permutation(n)
                tr, te = perm[:3 * n // 4], perm[3 * n // 4:]
                z = standardise(f, f[tr])
                if whiten:
                    z = pca_whiten(z, min(len(tr) // 4, 256), 0.25, z[tr])
                    alpha = 1.0
                else:
                    alpha = 1000.0 * f.shape[1] / 3700
                keep = y[tr].sum(0) > 0
                rows = y[te][:, keep].any(1)
                score = lambda s: lrap(y[te][rows][:, keep], s[rows][:, keep])
                ridge = Ridge(alpha=alpha).fit(z[tr], y[tr]).predict(z[te])
                knn = knn_scores(unit(z[te]) @ unit(z[tr]).T, y[tr])
                cells.append(f'seed {seed}: ridge {score(ridge):.3f} kNN {score(knn):.3f}')
            print(f'{name:16} split {label:28} ' + ' | '.join(cells), flush=True)


if __name__ == '__main__':
    main(sys.argv[1], sys.argv[2:])
