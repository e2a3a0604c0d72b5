#!/usr/bin/env python3
"""Markdown tables of the kernel benchmarks (`cargo bench --bench kernels`).

Reads criterion's results under target/criterion (median of each benchmark), and prints
per kernel: time per pass, bytes of data read per second, that as a share of the
measured streaming read bandwidth (`bandwidth/read`), and for the Gaussian mixture the
achieved floating-point rate.

FLOPs of one Gaussian EM iteration per row, counted as k(d² + 3d) for the E-step (the
difference to each mean, the triangular solve, the squared norm) plus d² + 4d for the
M-step sums of the one component a row mostly belongs to: a lower bound on the work
done, so the rate is a lower bound too.

    python3 benches/kernel_table.py [CRITERION_DIR]
"""
import json
import os
import re
import sys

root = sys.argv[1] if len(sys.argv) > 1 else "target/criterion"


def median_ns(group, bench):
    path = os.path.join(root, group, bench, "new", "estimates.json")
    with open(path) as f:
        return json.load(f)["median"]["point_estimate"]


def throughput_bytes(group, bench):
    with open(os.path.join(root, group, bench, "new", "benchmark.json")) as f:
        return json.load(f)["throughput"]["Bytes"]


def bandwidth(name):
    return throughput_bytes("bandwidth", name) / (median_ns("bandwidth", name) * 1e-9)


bw = bandwidth("read_1GiB")
print(f"Streaming read bandwidth, both cores: {bw / 1e9:.1f} GB/s from memory (1 GiB), "
      f"{bandwidth('read_32MiB') / 1e9:.1f} GB/s from the last-level cache (32 MiB). "
      "Shares below are of the memory figure.\n")

pattern = re.compile(r"(?:(\w+)_)?(\d+)Mpx_d(\d+)_k(\d+)$")
titles = {
    "kmeans_iteration": "k-means assignment pass (one Lloyd iteration)",
    "gmm_em_iteration": "Gaussian mixture, one EM iteration (full covariances)",
    "poisson_em_iteration": "Poisson mixture, one EM iteration",
    "label_pass": "Labelling pass (most probable phase of every pixel), d = 10",
}
for group, title in titles.items():
    gdir = os.path.join(root, group)
    if not os.path.isdir(gdir):
        continue
    rows = {}
    for dirpath, _, files in os.walk(gdir):
        if "benchmark.json" not in files or os.path.basename(dirpath) != "new":
            continue
        bench = os.path.relpath(os.path.dirname(dirpath), gdir)
        m = pattern.search(bench.replace(os.sep, "_"))
        if not m:
            continue
        kind, mpx, d, k = m.group(1) or "", int(m.group(2)), int(m.group(3)), int(m.group(4))
        ns = median_ns(group, bench)
        b = throughput_bytes(group, bench)
        rows.setdefault((kind, mpx, d), {})[k] = (ns, b)
    if not rows:
        continue
    print(f"### {title}\n")
    flops = group == "gmm_em_iteration"
    head = "| method | Mpixel | d |" if any(r[0] for r in rows) else "| Mpixel | d |"
    cells = " | ".join(f"k = {k}" for k in (4, 8, 16))
    print(f"{head} {cells} |")
    print("|" + "---|" * (head.count("|") - 1 + 3))
    for (kind, mpx, d), by_k in sorted(rows.items()):
        out = []
        for k in (4, 8, 16):
            if k not in by_k:
                out.append("—")
                continue
            ns, b = by_k[k]
            rate = b / (ns * 1e-9)
            cell = f"{ns / 1e6:.1f} ms, {rate / 1e9:.2f} GB/s ({100 * rate / bw:.0f} %)"
            if flops:
                n = mpx * 2**20
                f = n * (k * (d * d + 3 * d) + d * d + 4 * d)
                cell += f", ≥ {f / (ns * 1e-9) / 1e9:.1f} GFLOP/s"
            out.append(cell)
        lead = f"| {kind} | {mpx} | {d} |" if kind else f"| {mpx} | {d} |"
        print(f"{lead} {' | '.join(out)} |")
    print()
