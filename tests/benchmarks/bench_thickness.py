"""Timing of profile analysis for thickness (not part of the CI run).

    python tests/benchmarks/bench_thickness.py

A 10^4-sample two-beam profile: disk and fringe detection plus the
thickness fit, median of 21, against a plain scipy.signal.find_peaks pass
over the same profile as the simplest baseline.
"""

import sys
from pathlib import Path

import numpy as np
from scipy.signal import find_peaks

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_thickness import D_SI220, KV, synthetic_profile  # noqa: E402

from laueline.thickness import detect_profile, thickness_from_fringes  # noqa: E402
from timing import median_time  # noqa: E402



def main():
    pos, inten = synthetic_profile(180.0, 76.0, np.random.default_rng(0), samples=10_000)

    def ours():
        det = detect_profile(pos, inten)
        return thickness_from_fringes(det.fringes, det.separation, kv=KV, d_spacing_A=D_SI220,
                                      fringes_sigma=det.fringes_sigma,
                                      separation_sigma=det.separation_sigma)

    r = ours()
    t_ours = median_time(ours, 21)
    t_base = median_time(lambda: find_peaks(-inten, prominence=0.05), 21)
    print(f"profile of {len(pos)} samples: thickness {r.thickness_nm:.1f} +- "
          f"{r.thickness_sigma_nm:.2f} nm (true 180)")
    print(f"  detect + fit (median of 21):      {t_ours * 1e3:7.1f} ms")
    print(f"  find_peaks alone (median of 21):  {t_base * 1e3:7.1f} ms   ratio {t_ours / t_base:.1f}x")


if __name__ == "__main__":
    main()
