"""Write profile.csv, an invented two-beam intensity profile for the README.

    python examples/make_profile.py [--force]

Silicon 2 2 0 (d = 1.9202 A) at 200 kV, a foil 180 nm thick with an
extinction distance of 76 nm (invented for the example, near the kinematic
value), disks 380 px wide and 400 px apart, sampled every 0.5 px along +g
through the direct and then the diffracted disk, with Poisson noise at 2000
counts.  ``laueline thickness --d-spacing-A 1.9202 --profile profile.csv``
measures it back.
"""

import argparse
from pathlib import Path

import numpy as np

from laueline.optics import wavelength_A
from laueline.report import write_csv
from laueline.thickness import two_beam_intensity

D_SPACING_NM = 0.19202
SEPARATION_PX = 400.0
THICKNESS_NM, EXTINCTION_NM = 180.0, 76.0


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--force", action="store_true", help="overwrite an existing file")
    args = parser.parse_args()
    position = np.arange(0.0, 1000.0, 0.5)
    # x = s d^2 L / lambda with the camera length L = separation * d / lambda in px
    px_per_inv_nm = D_SPACING_NM ** 2 * SEPARATION_PX / (wavelength_A(200.0) / 10)
    intensity = np.full_like(position, 0.03)
    for centre, diffracted in [(250.0, False), (250.0 + SEPARATION_PX, True)]:
        u = position - centre
        inside = np.abs(u) <= 190.0
        ig = two_beam_intensity(u / px_per_inv_nm, THICKNESS_NM, EXTINCTION_NM)
        intensity[inside] = 0.15 + 0.85 * (ig[inside] if diffracted else 1 - ig[inside])
    counts = np.random.default_rng(7).poisson(intensity * 2000.0) / 2000.0
    path = Path(__file__).resolve().parent / "profile.csv"
    write_csv(path, ["position_px", "intensity"], zip(position, counts), force=args.force)
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
