"""Shared helpers for the benchmarks (medians of repeated runs, peak memory)."""

from __future__ import annotations

import statistics
import threading
import time

import numpy as np


def median_time(fn, repeat: int = 5, warmup: int = 1):
    for _ in range(warmup):
        fn()
    ts = []
    out = None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        ts.append(time.perf_counter() - t)
    return statistics.median(ts), out


class PeakRSS:
    """Peak resident memory of this process while the block runs (psutil, sampled every 20 ms)."""

    def __enter__(self):
        import psutil

        self.proc = psutil.Process()
        self.base = self.proc.memory_info().rss
        self.peak = self.base
        self._stop = False
        self._t = threading.Thread(target=self._run, daemon=True)
        self._t.start()
        return self

    def _run(self):
        while not self._stop:
            self.peak = max(self.peak, self.proc.memory_info().rss)
            time.sleep(0.02)

    def __exit__(self, *a):
        self._stop = True
        self._t.join()
        self.peak = max(self.peak, self.proc.memory_info().rss)

    @property
    def peak_gib(self):
        return self.peak / 2**30


def star_polygons(rng, n, lon0, lon1, lat0, lat1, dmin, dmax):
    import shapely

    out = []
    for _ in range(n):
        d = rng.uniform(dmin, dmax)
        cx, cy = rng.uniform(lon0 + d / 2, lon1 - d / 2), rng.uniform(lat0 + d / 2, lat1 - d / 2)
        k = rng.integers(8, 20)
        th = np.sort(rng.uniform(0, 2 * np.pi, k))
        r = d / 2 * rng.uniform(0.5, 1.0, k)
        out.append(shapely.Polygon(np.c_[cx + r * np.cos(th), cy + r * np.sin(th)]).buffer(0))
    return out
