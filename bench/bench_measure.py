"""Benchmark: exact distances of many candidates to long critical curves.

100,000 points against polylines with 50,000 vertices in all
(`lensview.geometry.nearest_on_polylines`, a KD-tree on segments with
vectorised exact distances) against a plain reference that loops over the
points and computes the distance to every segment with numpy. The reference
is timed on a subset and scaled, since a full run would take minutes; both
answers are compared on that subset.
"""

import statistics
import time

import numpy as np

from lensview.geometry import nearest_on_polylines

N_POINTS = 100_000
N_VERTICES = 50_000
REFERENCE_SUBSET = 300


def make_curves(rng):
    """Wiggly closed loops (a big ring and small member loops), 50,000 vertices."""
    curves = []
    n_big = 40_000
    t = np.linspace(0, 2 * np.pi, n_big, endpoint=False)
    r = 900 + 25 * np.sin(7 * t) + 10 * np.cos(23 * t)
    curves.append(np.column_stack([2048 + r * np.cos(t), 2048 + 0.8 * r * np.sin(t)]))
    for _ in range(20):
        n = (N_VERTICES - n_big) // 20
        t = np.linspace(0, 2 * np.pi, n, endpoint=False)
        cx, cy = rng.uniform(300, 3800, 2)
        rr = rng.uniform(5, 40)
        curves.append(np.column_stack([cx + rr * np.cos(t), cy + rr * np.sin(t)]))
    return curves


def reference(points, curves):
    """Plain per-point loop over all segments."""
    segments_a = np.concatenate([c for c in curves])
    segments_b = np.concatenate([np.roll(c, -1, axis=0) for c in curves])
    d = segments_b - segments_a
    length2 = np.einsum("ij,ij->i", d, d)
    out = np.empty(len(points))
    for k, p in enumerate(points):
        t = np.clip(np.einsum("ij,ij->i", p - segments_a, d) / length2, 0, 1)
        foot = segments_a + t[:, None] * d
        out[k] = np.sqrt(np.min(np.einsum("ij,ij->i", p - foot, p - foot)))
    return out


def main():
    rng = np.random.default_rng(7)
    curves = make_curves(rng)
    points = rng.uniform(0, 4096, (N_POINTS, 2))
    closed = [True] * len(curves)
    times = []
    for _ in range(5):
        start = time.perf_counter()
        result = nearest_on_polylines(points, curves, closed)
        times.append(time.perf_counter() - start)
    ours = statistics.median(times)
    start = time.perf_counter()
    ref = reference(points[:REFERENCE_SUBSET], curves)
    ref_time = (time.perf_counter() - start) * N_POINTS / REFERENCE_SUBSET
    error = np.abs(np.asarray(result.distance)[:REFERENCE_SUBSET] - ref).max()
    print(f"nearest critical-curve point, {N_POINTS} points vs {sum(map(len, curves))} vertices")
    print(f"  lensview {ours * 1e3:8.1f} ms   per-point reference {ref_time:8.1f} s (scaled from "
          f"{REFERENCE_SUBSET} points)   ratio {ref_time / ours:7.0f}x   max difference {error:.1e} px")
    return dict(ratio=ref_time / ours, seconds=ours)


if __name__ == "__main__":
    main()
