"""Dynamical diffraction: the Bloch-wave engine and what is built on it.

``bloch``      potentials, structure matrices, batched exact eigen-solves
``beams``      beam sets of a disk: exact beams per group of directions, Bethe beams
``minima``     dynamical deficit minima of the lines, the bright-field disk
``correction`` strain fits corrected for the dynamical shifts, kinematic-bias estimate
"""

from .beams import DEFAULT_HOLZ_EXCITATION, DEFAULT_ZOLZ_GMAX, BeamSet, select_beams
from .bloch import (DEFAULT_ABSORPTION_RATIO, MAX_BEAMS, MAX_THICKNESS_NM, bloch_amplitudes,
                    bloch_intensities, check_absorption_ratio, check_thickness,
                    coupling_matrix, excitation_matrices, potential_coefficients)
from .correction import (KINEMATIC_BIAS_FLOOR, DynamicalFit, KinematicBias,
                         dynamical_fit_document, dynamical_fit_text, kinematic_bias,
                         refine_dynamical, thickness_from_document)
from .minima import (IMAGE_HOLZ_EXCITATION, IMAGE_ZOLZ_GMAX, DynamicalLines, disk_intensity, disk_intensity_grid,
                     dynamical_lines)

__all__ = [
    "MAX_BEAMS", "MAX_THICKNESS_NM", "DEFAULT_ABSORPTION_RATIO", "DEFAULT_ZOLZ_GMAX",
    "DEFAULT_HOLZ_EXCITATION", "IMAGE_ZOLZ_GMAX", "IMAGE_HOLZ_EXCITATION",
    "check_thickness", "check_absorption_ratio", "potential_coefficients", "coupling_matrix",
    "excitation_matrices", "bloch_amplitudes", "bloch_intensities",
    "BeamSet", "select_beams", "DynamicalLines", "dynamical_lines", "disk_intensity",
    "disk_intensity_grid", "DynamicalFit", "refine_dynamical", "KinematicBias",
    "kinematic_bias", "KINEMATIC_BIAS_FLOOR", "thickness_from_document",
    "dynamical_fit_document", "dynamical_fit_text",
]
