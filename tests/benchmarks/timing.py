"""Shared timing helper of the benchmark scripts."""

import statistics
import time


def median_time(fn, repeat):
    """Median wall time of ``repeat`` calls of ``fn``, seconds."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)
