"""Former home of the fit; the engine now lives in :mod:`laueline.fit`."""

from .fit import (CAUTIONS, MODELS, PARAMETER_UNITS, STRAIN_COMPONENTS, Calibration,  # noqa: F401
                  FitResult, refine, refine_image)

__all__ = ["refine", "refine_image", "FitResult", "Calibration", "MODELS", "CAUTIONS",
           "PARAMETER_UNITS", "STRAIN_COMPONENTS"]
