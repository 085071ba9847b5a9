"""Accuracy of the dynamical correction on crossings from a converged many-beam truth.

    OMP_NUM_THREADS=1 python tests/benchmarks/bench_dynamical_accuracy.py [ZONE THICKNESS ...]

For each case (by default Si [2 3 0] and [3 4 0] at 150 and 250 nm, 200 kV):
crossings of the 16 strongest HOLZ lines made from a larger beam set than the
fit uses (tests/dynamical_truth.py: minima along each line, a cubic
through them, intersections), 0.15 px noise, an unstrained reference and a
strained region (tetragonal 1e-3 plus shears of a few 1e-4).  The effective
voltage is calibrated on the reference and held on the strained region,
kinematically and with the correction (thickness given 7 % too large).
Printed per strain combination (eigenvectors of the corrected fit's
statistical covariance, best determined first): its statistical sigma, the
kinematic error and sigma, the corrected error, the total sigma (statistical
plus systematic) and their ratio.  "well" marks combinations with a
statistical sigma below 5e-5.  Several minutes per case on one core.
"""

import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
from dynamical_truth import STRAIN, WELL_DETERMINED, accuracy_case  # noqa: E402

from laueline import read_crystal  # noqa: E402


def main(argv):
    cases = [((2, 3, 0), 150.0), ((2, 3, 0), 250.0), ((3, 4, 0), 150.0), ((3, 4, 0), 250.0)]
    if argv:
        cases = [(tuple(int(v) for v in argv[i].split(",")), float(argv[i + 1]))
                 for i in range(0, len(argv), 2)]
    si = read_crystal("Si")
    print("zone     t_nm  combo  sig_stat   err_kin   sig_kin   err_dyn  sig_total  "
          "|err_dyn|/sig_total  kv_cal_kin  kv_cal_dyn  rounds  cpu_s")
    for zone, thickness in cases:
        start = time.process_time()
        c = accuracy_case(si, zone, thickness, STRAIN, rng=np.random.default_rng(5))
        cpu = time.process_time() - start
        for k in range(6):
            well = "well" if c.sigma_statistical[k] < WELL_DETERMINED else "    "
            print(f"[{''.join(map(str, zone))}]  {thickness:5.0f}  {k} {well} "
                  f"{c.sigma_statistical[k]:9.2e} {c.error_kinematic[k]:9.2e} "
                  f"{c.sigma_kinematic[k]:9.2e} {c.error_dynamical[k]:9.2e} "
                  f"{c.sigma_total[k]:9.2e}  {abs(c.error_dynamical[k]) / c.sigma_total[k]:6.2f}"
                  f"  {c.calibration_kv[0]:9.3f}  {c.calibration_kv[1]:9.3f}  "
                  f"{c.dynamical.rounds:3d}  {cpu:6.0f}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
