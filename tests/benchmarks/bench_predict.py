"""Timing of the forward model (not part of the CI run).

    python tests/benchmarks/bench_predict.py

1. ``predict`` of Si [2 3 0] at 200 kV, 6 mrad disk, gmax 4 1/A, warm, median.
2. A brute-force baseline on the same lines at equal accuracy (1e-4 mrad):
   trace each locus by bisecting the excitation error along scan lines, then
   intersect the traced polylines pairwise.  Measured in the same run.
3. ``laueline predict Si --zone 2 3 0 --json out.json`` as a whole process.
"""

import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

from laueline import predict, read_crystal
from timing import median_time  # noqa: E402



def brute_force(crystal, pattern, n_scan=200, tol_mrad=1e-4):
    """Loci by bisection of s_g on scan lines, crossings by polyline intersection."""
    frame = pattern.frame.rotation
    K = pattern.beam.wave_number
    radius = pattern.disk_mrad * 1e-3
    g_all = crystal.g_vectors(pattern.hkl)
    traced = []
    for g, normal in zip(g_all, pattern.normal):
        along = np.array([-normal[1], normal[0]])
        q = np.linspace(-1.1 * radius, 1.1 * radius, n_scan)
        lo, hi = np.full(n_scan, -radius), np.full(n_scan, radius)

        def s(p):
            t = p[:, None] * normal + q[:, None] * along
            tz = -np.sqrt(np.maximum(1 - np.sum(t * t, axis=1), 0))
            k = K * (t @ frame[:2] + tz[:, None] * frame[2])
            return K * K - np.sum((k + g) ** 2, axis=1)

        s_lo = s(lo)
        # a position error dp across a line moves a crossing at angle phi by
        # dp / sin(phi); the smallest angle kept is 5 deg
        while np.max(hi - lo) > tol_mrad * 1e-3 * np.sin(np.radians(5)):
            mid = 0.5 * (lo + hi)
            s_mid = s(mid)
            same = np.sign(s_mid) == np.sign(s_lo)
            lo = np.where(same, mid, lo)
            s_lo = np.where(same, s_mid, s_lo)
            hi = np.where(same, hi, mid)
        p = 0.5 * (lo + hi)
        traced.append(p[:, None] * normal + q[:, None] * along)
    crossings = []
    for i in range(len(traced)):
        a0, a1 = traced[i][:-1], traced[i][1:]
        for j in range(i + 1, len(traced)):
            b0, b1 = traced[j][:-1], traced[j][1:]
            da = a1 - a0
            db = b1 - b0
            denom = da[:, None, 0] * db[None, :, 1] - da[:, None, 1] * db[None, :, 0]
            diff = b0[None] - a0[:, None]
            with np.errstate(divide="ignore", invalid="ignore"):
                u = (diff[..., 0] * db[None, :, 1] - diff[..., 1] * db[None, :, 0]) / denom
                v = (diff[..., 0] * da[:, None, 1] - diff[..., 1] * da[:, None, 0]) / denom
            hit = np.argwhere((u >= 0) & (u < 1) & (v >= 0) & (v < 1))
            for a, _ in hit:
                crossings.append(a0[a] + u[a, _] * da[a])
    crossings = np.array(crossings)
    return crossings[np.sum(crossings ** 2, axis=1) <= radius ** 2] * 1e3


def main():
    si = read_crystal("Si")
    args = dict(kv=200, disk_mrad=6, gmax=4)
    predict(si, [2, 3, 0], **args)  # warm caches
    t_ours = median_time(lambda: predict(si, [2, 3, 0], **args), 30)
    pattern = predict(si, [2, 3, 0], **args)
    t_brute = median_time(lambda: brute_force(si, pattern), 3)
    brute = brute_force(si, pattern)
    # equal accuracy: every exact crossing has a brute-force one within 1e-4 mrad
    d = np.min(np.linalg.norm(pattern.crossing_mrad[:, None] - brute[None], axis=2), axis=1)
    print(f"predict Si [2 3 0], 200 kV, 6 mrad, gmax 4: {pattern.n_lines} lines, "
          f"{pattern.n_crossings} crossings")
    print(f"  laueline predict (warm, median of 30): {t_ours * 1e3:8.2f} ms")
    print(f"  brute-force scan  (median of 3):       {t_brute * 1e3:8.1f} ms"
          f"  (largest distance to exact crossings {d.max():.1e} mrad)")
    print(f"  ratio brute / laueline:                {t_brute / t_ours:8.0f}x")

    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "out.json"
        cmd = [sys.executable, "-m", "laueline.cli", "predict", "Si", "--zone", "2", "3", "0",
               "--json", str(out), "--force"]
        t_proc = median_time(lambda: subprocess.run(cmd, check=True, capture_output=True), 5)
    print(f"  whole process 'laueline predict Si --zone 2 3 0 --json out.json' "
          f"(median of 5): {t_proc:.2f} s")


if __name__ == "__main__":
    main()
