"""The three-class probability simplex drawn in the plane: a raster of posteriors and exact region boundaries."""

from __future__ import annotations

import itertools
import math

import numpy as np

from policyc.geometry.decisions import margin_tolerance

__all__ = ["HEIGHT", "VERTICES", "boundary_segments", "simplex_raster", "to_plane"]

HEIGHT = math.sqrt(3.0) / 2.0
VERTICES = np.array([[0.0, 0.0], [1.0, 0.0], [0.5, HEIGHT]])


def to_plane(posteriors: np.ndarray) -> np.ndarray:
    # barycentric -> plane: point = Σ_k p_k v_k for the triangle's vertices v_k
    return posteriors @ VERTICES


def simplex_raster(resolution: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Pixel centres of the triangle's bounding box, their posteriors (NaN outside) and the inside mask."""
    xs = np.linspace(0.0, 1.0, resolution)
    ys = np.linspace(0.0, HEIGHT, round(resolution * HEIGHT))
    gx, gy = np.meshgrid(xs, ys)
    p3 = gy / HEIGHT  # weight of the top vertex
    p2 = gx - 0.5 * p3  # weight of the right vertex
    p1 = 1.0 - p2 - p3
    posteriors = np.stack([p1, p2, p3], axis=-1).reshape(-1, 3)
    inside = np.asarray((posteriors >= -1e-12).all(axis=1))
    return xs, ys, np.clip(posteriors, 0.0, 1.0), inside


def boundary_segments(loss: np.ndarray, samples: int = 600) -> list[np.ndarray]:
    """Exact boundaries between decision regions on the 2-simplex, as plane polylines (NaN at gaps).

    For rows a < b the boundary lies on {p : (λ_a − λ_b)·p = 0}; it crosses the edge from vertex i to
    vertex j at s = g_i / (g_i − g_j) with g = λ_a − λ_b. The part where a and b are both minimal is kept.
    """
    segments = []
    for a, b in itertools.combinations(range(loss.shape[0]), 2):
        g = loss[a] - loss[b]
        if np.allclose(g, 0.0):
            continue
        ends = []
        for i, j in ((0, 1), (1, 2), (2, 0)):
            if g[i] == g[j] or g[i] * g[j] > 0:
                continue
            s = g[i] / (g[i] - g[j])  # (1 - s) g_i + s g_j = 0
            if 0.0 <= s <= 1.0:
                ends.append((1.0 - s) * np.eye(3)[i] + s * np.eye(3)[j])
        if len(ends) < 2:
            continue
        t = np.linspace(0.0, 1.0, samples)[:, None]
        line = (1.0 - t) * ends[0] + t * ends[-1]
        risks = line @ loss.T
        least = risks.min(axis=1)
        tolerance = margin_tolerance(loss)
        on = (risks[:, a] <= least + tolerance) & (risks[:, b] <= least + tolerance)
        if on.any():
            plane = to_plane(line)
            plane[~on] = np.nan
            segments.append(plane)
    return segments
