"""Thin lamellae: HOLZ line profiles with a displacement field varying through the foil.

In a strained device thinned to a TEM lamella the lattice relaxes towards the
two free surfaces; the displacement then varies along the beam and HOLZ lines
broaden or split into parallel components.  This package models, measures and
fits those line profiles:

``depth``     the relaxation families and user tables of u(z) or e(z)
``profile``   the kinematic profile integral, excitation errors, strain shifts
``measure``   profiles across lines in an image; split or broadened lines
``fit``       the joint fit of mid-foil strain and relaxation (variable projection)
``analysis``  image to result: the ``relaxation`` pipeline, result, document, text

Profile model (kinematic, column approximation)
-----------------------------------------------
For reflection g the intensity scattered out of the central disk at
excitation error s is (Hirsch et al. 1977, ch. 7 and 8)

    I(s) = | integral_0^t exp(2 pi i (s z + g . u(z))) dz |^2 / t^2,

normalised to 1 at the Bragg condition of a perfect foil, with z the depth
below the entrance surface and u(z) the displacement of the column.  The
deficit line in the disk is proportional to I.  Here

    g . u(z) = ds_mid (z - t/2) + g . w(z),

where ``ds_mid`` is the shift of the excitation error produced by the
uniform strain at mid-foil e_mid (computed through the one forward model,
:mod:`laueline.lines`, for the strained basis (I + e_mid) A: the line moves
to where the strained lattice satisfies 2 K_in.g + |g|^2 = 0), and w(z) is
the relaxation displacement, zero in value and slope at mid-foil, so that
e_mid is the strain in the middle of the foil.  Uniform strain (w = 0) gives
the familiar sinc^2 line of width ~1/t centred on the exact locus.

The excitation error of a disk point t is s = -(2 K_in.g + |g|^2) / (2K) =
-G r(t), with r the Bragg-condition residual of
:func:`laueline.lines.locus_residual` (a distance in radians across the line)
and G the in-plane length of g: the local derivative of s across the line.

Relaxation families (w in the disk frame x, y, B):

``uniform``
    w = 0.
``cosh``
    w(z) = (ux, uy, 0) [cosh((z - t/2)/L) - 1] / [cosh(t/(2L)) - 1]: the
    lattice at both surfaces is displaced by (ux, uy) with respect to the
    mid-plane, the displacement decaying as cosh from the mid-plane with
    length L.  This is the form of the free-surface (boundary-layer)
    relaxation of a thin strained plate, symmetric about its mid-plane, as
    used in kinematic analyses of HOLZ line splitting in lamellae
    (Clement, Pantel, Kwakman and Rouviere 2004; Houdellier et al. 2006;
    both from memory).  Parameters ``ux_nm``, ``uy_nm``, ``decay_length_nm``.
``relaxed-strain``
    No displacement family but the strain itself relaxing towards both
    surfaces: e(z) = e_mid f(z), f = 1 - r [cosh((z - t/2)/L) - 1] /
    [cosh(t/(2L)) - 1], so the local excitation error is s + ds_mid f(z) and
    g.u(z) = ds_mid integral_0^z f dz' (the surface layers draw a line nearer
    the unstrained locus).  Parameters ``relaxed_fraction`` (r: 0 none, 1
    fully relaxed surfaces) and ``decay_length_nm``.
``table``
    w(z) from a CSV table (:func:`read_displacement_table`), for example a
    finite-element model, times a fitted ``scale`` (1 = as given).

What the kinematic model cannot see, and says: (1) dynamical effects (line
positions and shapes of strong reflections, absorption) are ignored; (2) the
profile is unchanged when the foil is turned over (z -> t - z with u -> -u):
the two surfaces are not told apart; (3) a displacement along the beam (uz)
hardly affects HOLZ lines whose g lies almost in the disk plane and is not
fitted by the ``cosh`` family.

References
----------
Hirsch, P. B., Howie, A., Nicholson, R. B., Pashley, D. W. and Whelan, M. J.
(1977). Electron Microscopy of Thin Crystals, 2nd ed. Krieger (kinematic
theory of imperfect crystals; sinc^2 rocking curve).
Clement, L., Pantel, R., Kwakman, L. F. Tz. and Rouviere, J. L. (2004).
Strain measurements by convergent-beam electron diffraction: the importance
of stress relaxation in lamella preparations. Appl. Phys. Lett. 85, 651
(from memory).
Houdellier, F., Roucau, C., Clement, L., Rouviere, J. L. and Casanove, M. J.
(2006). Quantitative analysis of HOLZ line splitting in CBED patterns of
epitaxially strained layers. Ultramicroscopy 106, 951 (from memory).
"""

from .analysis import (CAUTIONS, RELAXATION_SCHEMA, RelaxationResult, profile_data,
                       relaxation, relaxation_text)
from .depth import (MODELS, PARAMETER_UNITS, PARAMETERS, STRAIN_COMPONENTS, DisplacementTable,
                    read_displacement_table, relaxation_displacement, relaxed_strain_fraction,
                    relaxed_strain_phase_depth)
from .fit import ProfileData, ProfileFit, fit_profiles
from .measure import (LineAssessment, LineProfiles, assess_line_profiles, line_shape_warning,
                      measure_line_profiles)
from .profile import excitation_errors, kinematic_profile, strain_shifts

__all__ = ["MODELS", "PARAMETERS", "PARAMETER_UNITS", "STRAIN_COMPONENTS", "RELAXATION_SCHEMA",
           "CAUTIONS", "DisplacementTable", "read_displacement_table",
           "relaxation_displacement", "relaxed_strain_fraction", "relaxed_strain_phase_depth",
           "kinematic_profile", "excitation_errors", "strain_shifts", "LineProfiles",
           "measure_line_profiles", "ProfileData", "ProfileFit", "fit_profiles",
           "profile_data", "RelaxationResult", "relaxation", "relaxation_text",
           "LineAssessment", "assess_line_profiles", "line_shape_warning"]
