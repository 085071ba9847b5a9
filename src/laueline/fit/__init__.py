"""Fitting HOLZ line observations: one engine for one or several patterns.

>>> from laueline.fit import refine, refine_patterns, PatternSpec, Calibration

* :func:`refine` -- crossings of one pattern; :func:`refine_image` -- lines
  detected in one image; :func:`refine_patterns` -- several patterns of one
  region, one crystal and one strain;
* :class:`FitResult` with :class:`PatternResult` per pattern and typed
  records; :class:`Calibration` from a reference fit;
* :class:`DistortionMeasurement` and :func:`combine_distortion` -- the
  projector's elliptical distortion from the disk outline and the line fit;
* :func:`strain_constraints` -- exact constraints in the crystal or sample
  frame; :func:`parameter_covariance` -- the one covariance step.
"""

from .calibration import (Calibration, DistortionEstimate, DistortionMeasurement, PixelFrame,
                          combine_distortion)
from .constraints import STRAIN_COMPONENTS, StrainConstraints, strain_constraints
from .covariance import parameter_covariance
from .engine import PatternSpec, refine, refine_image, refine_patterns
from .indices import is_hexagonal
from .orientation import orientation_from_tilts, tilt_rotation
from .parameters import MODELS, PARAMETER_UNITS
from .result import (CAUTIONS, Check, FitResult, LineRecord, LineResidual, PatternResult,
                     PointRecord)

__all__ = ["refine", "refine_image", "refine_patterns", "PatternSpec", "FitResult",
           "PatternResult", "PointRecord", "LineRecord", "LineResidual", "Check",
           "Calibration", "PixelFrame", "DistortionMeasurement", "DistortionEstimate",
           "combine_distortion", "StrainConstraints", "strain_constraints",
           "parameter_covariance", "tilt_rotation", "orientation_from_tilts", "is_hexagonal",
           "MODELS", "PARAMETER_UNITS", "STRAIN_COMPONENTS", "CAUTIONS"]
