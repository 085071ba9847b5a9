"""Timing of profile analysis for thickness (not part of the CI run).

    python tests/benchmarks/bench_thickness.py

1. A 10^4-sample two-beam profile: disk and fringe detection plus the
   Kelly-Allen fit, median of 21, against a plain scipy.signal.find_peaks
   pass over the same profile as the simplest baseline.
2. The many-beam fit of a 1000-sample nine-beam profile of a 180 nm Si foil
   (220, 200 kV; the coupled equations of the tests), including the model
   variants, median of 5, against one call of the Bloch-wave engine on the
   fit's tilt grid (what every evaluation would cost if the fit solved the
   eigen-problem anew for each thickness it tries).
"""

import sys
from pathlib import Path

import numpy as np
from scipy.signal import find_peaks

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_thickness import (D_SI220, G220, KV, SI, many_beam_profile,  # noqa: E402
                            synthetic_profile)

from laueline.thickness import (detect_profile, fit_profile, row_intensities,  # noqa: E402
                                thickness_from_fringes)
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

    pos, inten, _ = many_beam_profile(np.random.default_rng(0))
    fit = fit_profile(pos, inten, SI, G220, kv=KV)
    t_fit = median_time(lambda: fit_profile(pos, inten, SI, G220, kv=KV), 5)
    grid = np.arange(-7.2, 7.2, 0.02)
    t_engine = median_time(lambda: row_intensities(SI, G220, grid, 180.0, kv=KV), 5)
    print(f"many-beam profile of {len(pos)} samples: {fit.thickness_nm:.2f} +- "
          f"{fit.thickness_sigma_nm:.2f} nm (true 180), Kelly-Allen "
          f"{fit.kelly_allen.thickness_nm:.1f} nm")
    print(f"  many-beam fit with 3 model variants (median of 5): {t_fit:6.2f} s")
    print(f"  one engine call on {len(grid)} tilts (median of 5):  {t_engine * 1e3:6.1f} ms   "
          f"ratio {t_fit / t_engine:.0f}x")


if __name__ == "__main__":
    main()
