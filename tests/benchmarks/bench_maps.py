"""Timing and memory of strain maps over scans (not part of the CI run).

    OMP_NUM_THREADS=1 python tests/benchmarks/bench_maps.py [--big]

1. Per pattern, one core, calibration held: median over a rendered scan of
   Si [2 3 0] patterns at 256 x 256 and 512 x 512, against a baseline of
   reading the same pattern from a .npy file plus one Gaussian filter over it
   (scipy.ndimage.gaussian_filter, sigma 1 px), measured in the same run.
2. Scaling: a 384-pattern line scan with one and with two worker processes.
3. With --big: a synthetic 128 x 128 x 256 x 256 map generated chunk by chunk
   inside the run (never stored whole), written to a zarr store; wall time
   and the peak resident memory of this process and its workers.
"""

import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from timing import median_time  # noqa: E402

from laueline import read_crystal  # noqa: E402
from laueline.detector import Detector  # noqa: E402
from laueline.images.render import RenderSettings, render_pattern  # noqa: E402
from laueline.maps import fit_pattern, map_strain, plan_scan, scan_from_array  # noqa: E402

ZONE, X_AXIS, KV, DISK = (2, 3, 0), (0, 0, 4), 198.6, 6.0


def _setup(size, n):
    si = read_crystal("Si")
    ref, truth = render_pattern(si, ZONE, KV, DISK,
                                RenderSettings(shape=(size, size), rotation_deg=23, seed=1),
                                x_axis=X_AXIS)
    d = truth["detector"]
    det = Detector(tuple(d["center_px"]), d["scale_px_per_mrad"], d["rotation_deg"], d["mirror"])
    plan = plan_scan(si, ZONE, (KV, det), (size, size), disk_mrad=DISK, x_axis=X_AXIS,
                     reference=ref)
    rng = np.random.default_rng(0)
    images = []
    for k in range(n):
        e = rng.normal(0, 5e-4, 6)
        images.append(render_pattern(si, ZONE, KV, DISK,
                                     RenderSettings(shape=(size, size), rotation_deg=23,
                                                    seed=10 + k), x_axis=X_AXIS, strain=e)[0])
    return plan, np.array(images, dtype=np.float32)


def per_pattern(size):
    from scipy.ndimage import gaussian_filter

    plan, images = _setup(size, 12)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "p.npy"
        np.save(path, images[0])
        t_base = median_time(lambda: gaussian_filter(np.load(path), 1.0), 21)
        t_read = median_time(lambda: np.load(path), 21)
    times = []
    for image in images:
        times.append(median_time(lambda: fit_pattern(image, plan), 3))
    t_fit = float(np.median(times))
    print(f"  {size} x {size}: {plan.n_lines} lines, {plan.n_points} profiles; "
          f"fit {t_fit * 1e3:.1f} ms + read {t_read * 1e3:.2f} ms per pattern; baseline "
          f"read + Gaussian filter {t_base * 1e3:.2f} ms; ratio "
          f"{(t_fit + t_read) / t_base:.1f}")


def scaling():
    plan, images = _setup(256, 8)
    scan = scan_from_array(np.concatenate([images] * 48), chunk_patterns=16)
    walls = {}
    for workers in (1, 2):
        t = time.perf_counter()
        map_strain(scan, plan, n_workers=workers, progress=False)
        walls[workers] = time.perf_counter() - t
    print(f"  384 patterns 256 x 256: 1 worker {walls[1]:.2f} s, 2 workers {walls[2]:.2f} s, "
          f"speed-up {walls[1] / walls[2]:.2f} (load average {os.getloadavg()[0]:.2f})")


def big():
    import dask.array as da

    plan, images = _setup(256, 4)
    template = images.mean(axis=0)

    def block(block_info=None):
        loc = block_info[None]["array-location"]
        shape = tuple(b - a for a, b in loc)
        rng = np.random.default_rng(loc[0][0] * 1000 + loc[1][0])
        return rng.poisson(np.broadcast_to(template, shape)).astype(np.float32)

    data = da.map_blocks(block, dtype=np.float32, chunks=((1,) * 128, (64, 64), (256,), (256,)))
    scan = scan_from_array(data, chunk_patterns=64)
    with tempfile.TemporaryDirectory() as tmp:
        t = time.perf_counter()
        ds = map_strain(scan, plan, out=Path(tmp) / "big.zarr", progress=True)
        wall = time.perf_counter() - t
        ok = int(ds["ok"].sum())
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"  128 x 128 x 256 x 256: {wall:.0f} s, {ok} of 16384 fitted; peak resident "
          f"memory {own:.0f} MB (main), {kids:.0f} MB (largest worker)")


if __name__ == "__main__":
    print("1. per pattern, one core")
    per_pattern(256)
    per_pattern(512)
    print("2. scaling")
    scaling()
    if "--big" in sys.argv:
        print("3. a 128 x 128 map of 256 x 256 patterns")
        big()
