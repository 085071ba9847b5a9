"""laueline: HOLZ deficit lines in convergent-beam electron diffraction.

Predict the higher-order Laue zone lines of a zone axis on their exact loci,
fit measured crossings to lattice parameters and strain, rank zone axes by
the strain precision they can deliver, and measure foil thickness from
two-beam fringes.

The main entry points:

>>> from laueline import read_crystal, predict
>>> si = read_crystal("Si")
>>> pattern = predict(si, zone=[2, 3, 0], kv=200, disk_mrad=6)
>>> pattern.n_lines > 10
True
"""

from .crystal import Crystal, bundled_structures, read_crystal
from .errors import FitError, InputError
from .lines import Pattern, predict
from .optics import make_beam, wavelength_A

__version__ = "0.1.0"

__all__ = ["Crystal", "read_crystal", "bundled_structures", "predict", "Pattern",
           "make_beam", "wavelength_A", "InputError", "FitError", "__version__"]
