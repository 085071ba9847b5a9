"""Timing of the zone-axis survey (not part of the CI run).

    python tests/benchmarks/bench_survey.py

1. Survey of all symmetry-distinct axes of Si at 200 kV, 6 mrad disk, for
   --max-index 3, 5, 7 and 9, one process on one core, against a baseline
   of predicting the same axes without the precision analysis.
2. The cost of evaluating every member of each family (sample frame
   x' = [110], z' = [001], ranked by ezz) against the survey of
   representatives only, and against predicting every member directly
   (what evaluating members without the symmetry shortcut would cost).
3. The per-line GLS covariance for ~600 crossings of ~50 lines (Si [2 3 0],
   every line counted) through the Woodbury form, against a dense
   Cholesky solve of the full residual covariance.
"""

import numpy as np

from laueline import predict, read_crystal
from laueline.strain import sample_axes
from laueline.survey import candidate_axes, family_members, survey
from laueline.uncertainty import (crossing_loading_of_lines, gls_covariance,
                                  residual_covariance)
from timing import median_time  # noqa: E402


def main():
    si = read_crystal("Si")
    survey(si, max_index=2)  # warm
    print("1. survey of representatives (crystal frame)")
    print("max index   axes   survey s   predict-only s   ratio")
    for m in (3, 5, 7, 9):
        zones, _ = candidate_axes(si, m)
        repeat = 3 if m <= 7 else 1
        t_survey = median_time(lambda: survey(si, max_index=m), repeat)
        t_base = median_time(lambda: [predict(si, z, 200, 6) for z in zones], repeat)
        print(f"{m:9d} {len(zones):6d} {t_survey:10.2f} {t_base:16.2f} {t_survey / t_base:7.2f}")

    print("\n2. every family member in a sample frame (max index 5)")
    axes = sample_axes(si.basis, (1, 1, 0), (0, 0, 1))
    zones, _ = candidate_axes(si, 5)
    members = np.concatenate([family_members(si, z)[0] for z in zones])
    t_members = median_time(lambda: survey(si, max_index=5, axes=axes, component="ezz"), 3)
    t_plain = median_time(lambda: survey(si, max_index=5), 3)
    t_direct = median_time(lambda: [predict(si, z, 200, 6) for z in members], 1)
    print(f"families {len(zones)}, members {len(members)}")
    print(f"survey with members {t_members:.2f} s, representatives only {t_plain:.2f} s "
          f"(ratio {t_members / t_plain:.2f}); predicting every member directly "
          f"{t_direct:.2f} s (ratio {t_direct / t_members:.1f})")

    print("\n3. GLS covariance, Woodbury against dense")
    p = predict(si, (2, 3, 0), 200, 6)
    ha, hb = p.crossing_hkl()
    loading, lines = crossing_loading_of_lines(si.basis, p.zone, p.x_axis,
                                               p.beam.wave_number, ha, hb, p.crossing_mrad)
    jac = np.random.default_rng(0).normal(size=(loading.shape[0], 9))
    cov = residual_covariance(loading, 0.005, 0.002)
    t_wood = median_time(lambda: gls_covariance(jac, cov), 7)
    t_dense = median_time(lambda: gls_covariance(jac, cov.dense()), 7)
    print(f"{p.n_crossings} crossings, {len(lines)} lines: Woodbury {t_wood * 1e3:.1f} ms, "
          f"dense {t_dense * 1e3:.1f} ms, ratio {t_dense / t_wood:.1f}")


if __name__ == "__main__":
    main()
