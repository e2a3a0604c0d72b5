#!/usr/bin/env python3
"""Reference phase-mapping pipeline as a practitioner would write it with scikit-learn.

Needs: pip install numpy scipy pillow scikit-learn

    sklearn_reference.py INPUT -o OUT --phases K --method kmeans|gmm

INPUT holds one grayscale PNG per element (stem = element).  Steps: stack the
maps to (pixels x elements) float32, Gaussian-smooth each map (sigma 1), scale
each element to unit variance, cluster with KMeans(K, n_init=1,
random_state=0) or GaussianMixture(K, covariance_type='full',
random_state=0), predict every pixel, compute area fractions and per-phase
mean raw counts.  Writes OUT/labels.png (ids 1..K, largest phase first) and
OUT/report.json (same core fields as modalmap's report).

Prints 'compute time: X.XXX s' for the compute part (smoothing through the
per-phase statistics; file reading and writing excluded).
"""
import argparse
import json
import os
import sys
import time

import numpy as np
from PIL import Image
from scipy import ndimage


def load_gray(path):
    """Grayscale PNG (8/16-bit) -> int64 array."""
    with Image.open(path) as im:
        if im.mode not in ("L", "I", "I;16", "I;16B", "I;16L"):
            raise ValueError(f"{path}: expected a grayscale PNG, got mode {im.mode}")
        return np.array(im).astype(np.int64)


def save_gray8(path, a):
    Image.fromarray(np.ascontiguousarray(a, dtype=np.uint8)).save(path)


def main():
    ap = argparse.ArgumentParser(description="scikit-learn reference phase mapping")
    ap.add_argument("input")
    ap.add_argument("-o", "--out", required=True)
    ap.add_argument("--phases", type=int, required=True)
    ap.add_argument("--method", choices=["kmeans", "gmm"], default="kmeans")
    a = ap.parse_args()

    from sklearn.cluster import KMeans
    from sklearn.mixture import GaussianMixture

    # The element maps only: the BSE image is not clustered.
    files = sorted(f for f in os.listdir(a.input)
                   if f.lower().endswith(".png") and not f.upper().startswith("BSE"))
    if not files:
        sys.exit(f"no PNG maps in {a.input}")
    elements = [os.path.splitext(f)[0] for f in files]
    raw = np.stack([load_gray(os.path.join(a.input, f)).astype(np.float32)
                    for f in files], axis=-1)              # (H, W, E)
    H, W, E = raw.shape

    t0 = time.perf_counter()
    X = raw.reshape(-1, E)                                 # raw counts, pixels x elements
    S = np.stack([ndimage.gaussian_filter(raw[..., e], 1.0) for e in range(E)],
                 axis=-1).reshape(-1, E)
    S /= S.std(axis=0) + 1e-12                             # unit variance per element
    if a.method == "kmeans":
        model = KMeans(n_clusters=a.phases, n_init=1, random_state=0).fit(S)
    else:
        model = GaussianMixture(a.phases, covariance_type="full", random_state=0).fit(S)
    lab = model.predict(S)
    counts = np.bincount(lab, minlength=a.phases)
    order = np.argsort(-counts)                            # id 1 = largest phase
    remap = np.empty(a.phases, dtype=np.int64)
    remap[order] = np.arange(1, a.phases + 1)
    ids = remap[lab]
    sums = np.zeros((a.phases + 1, E))
    for e in range(E):
        sums[:, e] = np.bincount(ids, weights=X[:, e], minlength=a.phases + 1)
    n = np.bincount(ids, minlength=a.phases + 1)
    compute_s = time.perf_counter() - t0

    os.makedirs(a.out, exist_ok=True)
    save_gray8(os.path.join(a.out, "labels.png"), ids.reshape(H, W))
    phases = [{"id": i, "pixels": int(n[i]), "area_fraction": n[i] / (H * W),
               "mean": {el: float(sums[i, e] / max(n[i], 1))
                        for e, el in enumerate(elements)}}
              for i in range(1, a.phases + 1)]
    rep = {"elements": elements, "width": W, "height": H, "phases": phases,
           "unassigned_fraction": 0.0, "method": f"sklearn-{a.method}",
           "compute_s": compute_s, "n_iter": int(model.n_iter_),
           "converged": bool(getattr(model, "converged_", True))}
    with open(os.path.join(a.out, "report.json"), "w") as f:
        json.dump(rep, f, indent=1)
    print(f"compute time: {compute_s:.3f} s ({a.method}, {H}x{W}x{E}, K={a.phases}, "
          f"{model.n_iter_} iterations)")


if __name__ == "__main__":
    main()
