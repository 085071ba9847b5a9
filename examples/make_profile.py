"""Write profile.csv, an invented two-beam intensity profile for the README.

    python examples/make_profile.py [--force]

Silicon 2 2 0 (d = 1.9202 A) at 200 kV in a foil 180 nm thick (invented for
the example): the intensities of the direct and the diffracted disk are
those of the nine-beam systematic row computed by laueline's Bloch-wave
engine (absorption ratio 0.1), with disks of 5 mrad semi-angle centred on
the Bragg condition, 30 px per mrad (the disks 392 px apart), a little
blur, a dark background between the disks and Poisson noise at 2000
counts, sampled every 0.5 px along +g through the direct and then the
diffracted disk.  ``laueline thickness --d-spacing-A 1.9202 --profile
profile.csv`` measures it back with the two-beam construction and
``laueline thickness Si --hkl 2 2 0 --profile profile.csv --dynamical`` with
the many-beam fit.
"""

import argparse
from pathlib import Path

import numpy as np
from scipy.ndimage import gaussian_filter1d

from laueline import read_crystal
from laueline.optics import wavelength_A
from laueline.report import write_csv
from laueline.thickness import row_intensities

THICKNESS_NM, KV, HKL = 180.0, 200.0, (2, 2, 0)
SEMI_ANGLE_MRAD, PX_PER_MRAD, STEP_PX = 5.0, 30.0, 0.5


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--force", action="store_true", help="overwrite an existing file")
    args = parser.parse_args()
    si = read_crystal("Si")
    separation_mrad = 1e3 * wavelength_A(KV) / float(si.d_spacing(HKL))  # 2 theta_B
    position = np.arange(0.0, 1100.0, STEP_PX)
    centre = 150.0 + SEMI_ANGLE_MRAD * PX_PER_MRAD
    tilt = (position - centre) / PX_PER_MRAD  # mrad from the Bragg condition, in the direct disk
    both = row_intensities(si, HKL, tilt, THICKNESS_NM, kv=KV)
    direct = np.where(np.abs(tilt) <= SEMI_ANGLE_MRAD, both[:, 0], 0.0)
    tilt_g = tilt - separation_mrad
    diffracted_both = row_intensities(si, HKL, tilt_g, THICKNESS_NM, kv=KV)
    diffracted = np.where(np.abs(tilt_g) <= SEMI_ANGLE_MRAD, diffracted_both[:, 1], 0.0)
    # the proportional absorption takes most of the beam at 180 nm; a camera
    # records the rest at whatever gain, so the disks are scaled to 0.9
    disks = gaussian_filter1d(direct + diffracted, 1.5 / STEP_PX)
    intensity = 0.03 + 0.9 * disks / disks.max()
    counts = np.random.default_rng(7).poisson(intensity * 2000.0) / 2000.0
    path = Path(__file__).resolve().parent / "profile.csv"
    write_csv(path, ["position_px", "intensity"], zip(position, counts), force=args.force)
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
