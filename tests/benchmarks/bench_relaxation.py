"""Timing of the thin-lamella profile fit (not part of the CI run).

    python tests/benchmarks/bench_relaxation.py

Ten line profiles of 200 samples each (silicon [2 3 0], 300 nm foil, made
by dense quadrature of the profile integral with noise) fitted with the
three-parameter cosh relaxation plus the six mid-foil strain components and
the instrument blur, on one core (BLAS threads limited to one), median of 5.
Baseline in the same run: ten independent single-Gaussian dip fits of the
same profiles with scipy.optimize.least_squares, the simplest profile
analysis there is.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")   # one core
os.environ.setdefault("OMP_NUM_THREADS", "1")

import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
from scipy.optimize import least_squares  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_relaxation import _synthetic_profiles  # noqa: E402

from laueline import read_crystal  # noqa: E402
from laueline.relaxation import fit_profiles  # noqa: E402
from timing import median_time  # noqa: E402


def main():
    si = read_crystal("Si")
    truth = {"strain": np.array([1.2e-3, -0.6e-3, 0.8e-3, 0.2e-3, -0.3e-3, 0.4e-3]),
             "u": np.array([0.045, 0.015]), "length": 45.0}
    data, clean = _synthetic_profiles(si, 10, truth, 300.0, 1.2, half_width_px=9.95,
                                      step_px=0.1)
    noise = 0.004
    data.intensity = 1.0 - 0.6 * clean + np.random.default_rng(1).normal(0, noise, clean.shape)
    data.sigma = np.full_like(clean, noise)
    hold = ("center_x", "center_y", "rotation")

    def ours():
        return fit_profiles(data, 300.0, "cosh", hold=hold)

    def baseline():
        d = data.offset_px
        for y in data.intensity:
            def res(p, y=y):
                return p[0] - p[1] * np.exp(-0.5 * ((d - p[2]) / p[3]) ** 2) - y
            least_squares(res, [1.0, 0.3, d[np.argmin(y)], 1.5])

    fit = ours()
    t_ours = median_time(ours, 5)
    t_base = median_time(baseline, 5)
    print(f"{data.intensity.shape[0]} profiles x {data.intensity.shape[1]} samples, "
          f"{len(fit.names)} parameters (cosh: ux, uy, decay length; 6 strain; blur)")
    for name, want in (("ux_nm", 0.045), ("uy_nm", 0.015), ("decay_length_nm", 45.0)):
        v, s = fit.value(name)
        print(f"  {name:16} {v:9.4f} +- {s:.4f}   (true {want})")
    print(f"  relaxation fit (median of 5):        {t_ours:7.3f} s   (target <= 2 s)")
    print(f"  10 single-Gaussian fits (median of 5): {t_base:7.3f} s   ratio "
          f"{t_ours / t_base:.1f}x")


if __name__ == "__main__":
    main()
