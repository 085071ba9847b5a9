"""laueline: HOLZ deficit lines in convergent-beam electron diffraction.

Predict the higher-order Laue zone lines of a zone axis on their exact loci,
fit measured crossings or the lines of an image to lattice parameters and
strain, rank zone axes by the strain precision they can deliver, and measure
foil thickness from two-beam fringes.

Every command of the ``laueline`` program has a function here that takes and
returns Python objects.  They are loaded on first use, so ``import laueline``
stays cheap and a notebook pays only for what it calls:

>>> import laueline
>>> pattern = laueline.predict(laueline.read_crystal("Si"), zone=[2, 3, 0], kv=200,
...                            disk_mrad=6)
>>> pattern.n_lines > 10
True

================================  ==========================================
``read_crystal``                  a CIF file or bundled structure -> Crystal
``predict``                       deficit lines and crossings -> Pattern
``read_points``                   digitised crossings (CSV) -> Points
``refine``, ``refine_image``      cell / strain fits to points or an image
``survey``                        zone axes ranked by strain precision
``thickness_from_fringes``        two-beam foil thickness
``read_profile``, ``detect_profile``  two-beam intensity profiles
``read_image``, ``detect_lines``  pattern images and their lines
``render_pattern``                synthetic pattern images with their truth
``cubic_stiffness``               elastic constants for the stress
================================  ==========================================
"""

import sys
import types
from importlib import import_module

__version__ = "0.1.0"

# public name -> module that defines it (relative to this package)
_LAZY = {
    "Crystal": ".crystal", "read_crystal": ".crystal", "bundled_structures": ".crystal",
    "predict": ".lines", "Pattern": ".lines",
    "make_beam": ".optics", "wavelength_A": ".optics",
    "read_points": ".points", "Points": ".points",
    "refine": ".refine", "refine_image": ".refine", "FitResult": ".refine",
    "survey": ".survey", "SurveyResult": ".survey",
    "thickness_from_fringes": ".thickness", "read_profile": ".thickness",
    "detect_profile": ".thickness", "ThicknessResult": ".thickness",
    "read_image": ".images.io", "write_image": ".images.io",
    "detect_lines": ".images.detect", "Detection": ".images.detect",
    "render_pattern": ".images.render", "RenderSettings": ".images.render",
    "Detector": ".detector",
    "cubic_stiffness": ".strain", "sample_axes": ".strain",
    "run_demo": ".demo",
    "InputError": ".errors", "FitError": ".errors",
}

__all__ = sorted(_LAZY) + ["__version__"]

# Functions named like the module that defines them (laueline.survey.survey):
# importing the module must not replace the function on the package.
_FUNCTION_OVER_MODULE = {name for name, module in _LAZY.items() if module == "." + name}


class _Package(types.ModuleType):
    def __setattr__(self, name, value):
        if name in _FUNCTION_OVER_MODULE and isinstance(value, types.ModuleType):
            return  # the module stays reachable in sys.modules and by 'from .x import'
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package


def __getattr__(name):
    """Load a public name from its module on first use (PEP 562)."""
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'laueline' has no attribute {name!r}")
    value = getattr(import_module(module, __name__), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
