"""Typed records and the result of a fit."""

from __future__ import annotations

from dataclasses import dataclass, field, fields

import numpy as np

from .calibration import Calibration, PixelFrame

__all__ = ["PointRecord", "LineRecord", "LineResidual", "Check", "PatternResult", "FitResult",
           "CAUTIONS", "SYSTEMATIC_NOTE"]

CAUTIONS = (
    "A TEM lamella relaxes at its free surfaces: the strain measured here is that of the "
    "thin foil and may differ from the strain in the bulk device.",
    "The model is kinematic: dynamical shifts of HOLZ lines are ignored; an effective "
    "voltage calibrated on a reference region absorbs them only in part.",
)
SYSTEMATIC_NOTE = ("the statistical part includes per-line errors (line_sigma_px); the "
                   "systematic part is the one given to the fit (for example a kinematic-bias "
                   "estimate of dynamical line shifts) and is zero when none was given")


class _Record:
    """Mapping-style read access to the fields, mirroring the JSON document."""

    def __getitem__(self, key):
        if key not in {f.name for f in fields(self)}:
            raise KeyError(key)
        return getattr(self, key)

    def __contains__(self, key):
        return key in {f.name for f in fields(self)} and getattr(self, key) is not None

    def to_dict(self):
        return {f.name: getattr(self, f.name) for f in fields(self)}


@dataclass
class PointRecord(_Record):
    """One measured crossing (internal y-down px) and its fate in the fit."""

    x_px: float
    y_px: float
    hkl_a: list
    hkl_b: list
    residual_px: list        # measured minus fitted (x, y), px; NaN when unassigned
    used: bool
    note: str = ""


@dataclass
class LineRecord(_Record):
    """One detected line and its fate in the fit."""

    index: int
    hkl: list
    residual_px: float | None   # rms distance of its sample points from the fitted locus
    used: bool
    note: str
    normal_angle_deg: float
    points_px: list | None = None
    point_residuals_px: list | None = None  # signed distances, fitted minus measured


@dataclass
class LineResidual(_Record):
    """Residuals gathered by reflection: how well each line fits.

    For crossings, the residual of a crossing is projected on the line's
    normal; for detected lines, the signed distances of its sample points.
    ``normalised_rms`` divides by the observation's sigma (stated, or
    estimated from the scatter).
    """

    hkl: list
    n: int
    mean_px: float
    rms_px: float
    normalised_rms: float


@dataclass
class Check(_Record):
    """A plausibility check after a fit."""

    name: str
    passed: bool
    value: float | None
    limit: float | None
    detail: str = ""   # why it failed: the worst points and the remedy


@dataclass
class PatternResult:
    """What the fit made of one pattern.

    Attributes
    ----------
    zone, x_axis : tuple of int
    detector : Detector
        Fitted detector (internal y-down px).
    detector_sigma : dict
        1-sigma of centre (px, [x, y]), scale (px/mrad), rotation (deg) and
        distortion ([e1, e2]); None where held.
    kv, kv_sigma : float, float or None
    wave_number : float
        1/angstrom, inside the crystal when the inner potential is used.
    disk_mrad : float
    points : list of PointRecord
    lines : list of LineRecord or None
        For image fits.
    line_table : list of LineResidual
    rms_px : float
        Rms residual of the used observations, px.
    n_points, n_used : int
        Groups measured and used (crossings or detected lines).
    """

    index: int
    zone: tuple
    x_axis: tuple
    detector: object
    detector_sigma: dict
    kv: float
    kv_sigma: float | None
    wave_number: float
    disk_mrad: float
    points: list
    lines: list | None
    line_table: list
    rms_px: float
    n_points: int
    n_used: int
    assigned: bool = False
    tilt_deg: tuple | None = None
    source: str = ""
    pixel_frame: PixelFrame = field(default_factory=PixelFrame)
    calibration: Calibration | None = None
    excluded: tuple = ()
    hexagonal: bool = False
    image_shape: tuple | None = None   # (rows, columns) of an image fit

    @property
    def observations(self):
        return "lines" if self.lines is not None else "crossings"


@dataclass
class FitResult:
    """Outcome of a fit (like scipy's ``OptimizeResult``: check ``success``).

    Attributes
    ----------
    success : bool
        The least-squares fit converged and the assignment settled.
    message : str
        Why not, or a short summary.
    model : str
    parameters : list of str
        Names of the refined parameters; per-pattern ones carry ``[j]`` in
        a fit of several patterns.
    values, sigmas : ndarray (p,)
        In the units of :data:`laueline.fit.PARAMETER_UNITS`.
    covariance, correlation : ndarray (p, p)
    condition_number : float
        Of the column-scaled, whitened Jacobian.
    strain : laueline.strain.StrainReport
        Green-Lagrange strain (crystal Cartesian frame; sample frame when
        asked), its Voigt covariance, stress when elastic constants are
        given.  Components fixed by the model or a constraint have sigma 0
        and are listed in ``fixed_components``.
    strain_voigt : ndarray (6,)
        exx eyy ezz eyz exz exy of the Green-Lagrange strain, crystal frame.
    strain_covariance : ndarray (6, 6)
        Total covariance (statistical + systematic) of ``strain_voigt``.
    strain_covariance_statistical, strain_covariance_systematic : ndarray (6, 6)
    cell, cell_sigma, reference_cell : ndarray (6,)
        Angstrom and degrees.
    basis : ndarray (3, 3)
        Fitted direct basis.
    patterns : list of PatternResult
    chi2, dof : float or None, int
    checks : list of Check
        Plausibility checks; ``plausible`` is True when all passed.
    constraints : list of str
    warnings : list of str
    """

    success: bool
    message: str
    model: str
    parameters: list
    values: np.ndarray
    sigmas: np.ndarray
    covariance: np.ndarray
    correlation: np.ndarray
    condition_number: float
    strain: object
    strain_voigt: np.ndarray
    strain_covariance: np.ndarray
    strain_covariance_statistical: np.ndarray
    strain_covariance_systematic: np.ndarray
    fixed_components: dict
    cell: np.ndarray
    cell_sigma: np.ndarray
    reference_cell: np.ndarray
    basis: np.ndarray
    patterns: list
    chi2: float | None
    dof: int
    checks: list
    constraints: list
    warnings: list
    structure: dict
    unique_axis: str | None = None
    inner_potential: bool = False
    crystal: object = field(default=None, repr=False)
    poorly_separated: list = field(default_factory=list)
    line_sigma: object = None   # laueline.fit.engine.LineSigma: per-line error used

    # -- the first (often only) pattern -----------------------------------------
    converged = property(lambda self: self.success)
    zone = property(lambda self: self.patterns[0].zone)
    x_axis = property(lambda self: self.patterns[0].x_axis)
    detector = property(lambda self: self.patterns[0].detector)
    detector_sigma = property(lambda self: self.patterns[0].detector_sigma)
    kv = property(lambda self: self.patterns[0].kv)
    kv_sigma = property(lambda self: self.patterns[0].kv_sigma)
    wave_number = property(lambda self: self.patterns[0].wave_number)
    disk_mrad = property(lambda self: self.patterns[0].disk_mrad)
    points = property(lambda self: self.patterns[0].points)
    lines = property(lambda self: self.patterns[0].lines)
    assigned = property(lambda self: self.patterns[0].assigned)

    @property
    def rms_px(self):
        """Rms residual over all patterns' used observations, px."""
        if len(self.patterns) == 1:
            return self.patterns[0].rms_px
        r = [(p.rms_px, p.n_used) for p in self.patterns if np.isfinite(p.rms_px)]
        total = sum(n for _, n in r)
        return float(np.sqrt(sum(v * v * n for v, n in r) / total)) if total else float("nan")

    @property
    def n_used(self):
        return sum(p.n_used for p in self.patterns)

    @property
    def n_points(self):
        return sum(p.n_points for p in self.patterns)

    @property
    def converged_fit(self):
        """The least-squares fit converged and the assignment settled (checks aside)."""
        return all(c.passed for c in self.checks if c.name == "converged")

    @property
    def plausible(self):
        """All plausibility checks passed (chi-square, residuals, orientation, calibration)."""
        return all(c.passed for c in self.checks)

    @property
    def implausibility(self):
        """One sentence naming the failed checks, the worst points and the remedy, or ''."""
        failed = [c for c in self.checks if not c.passed]
        return "; ".join(c.detail or (c.name.replace("_", " ") + (
            f" {c.value:.3g} (limit {c.limit:.3g})" if c.value is not None else " failed"))
            for c in failed)

    def parameter(self, name):
        """(value, sigma) of a refined parameter."""
        i = self.parameters.index(name)
        return float(self.values[i]), float(self.sigmas[i])

    def calibration(self, pattern=0):
        """The Calibration this fit provides (voltage and detector of one pattern)."""
        p = self.patterns[pattern]
        return Calibration(p.kv, p.detector, self.structure.get("name", ""),
                           self.structure.get("formula", ""), p.zone, p.x_axis,
                           {"model": self.model, "parameters": list(self.parameters),
                            "inner_potential": self.inner_potential,
                            "disk_mrad": p.disk_mrad,
                            "image_shape": None if p.image_shape is None
                            else list(p.image_shape)}, self.success, p.source)

    def fitted_pattern(self, pattern=0, crystal=None, min_strength=0.05):
        """The pattern predicted with the fitted basis and wave number (for figures)."""
        from ..lines import predict

        p = self.patterns[pattern]
        crystal = crystal if crystal is not None else self.crystal
        return predict(crystal.with_basis(self.basis), p.zone, p.kv, p.disk_mrad,
                       x_axis=p.x_axis, min_strength=min_strength, wave_number=p.wave_number)

    def to_dict(self):
        """The ``laueline.fit/2`` document, as written by ``--json``."""
        from ..report import fit_document

        return fit_document(self)

    def plot(self, pattern=0, image=None):
        """Figure of the measured points over the fitted loci (matplotlib Figure)."""
        from ..plot import fit_figure

        return fit_figure(self, image=image, pattern=pattern)

    def __repr__(self):
        e = self.strain_voigt
        s = np.sqrt(np.maximum(np.diag(self.strain_covariance), 0))
        comps = ", ".join(f"{n}={v:+.2e}" + (f"+-{d:.0e}" if d > 0 else "")
                          for n, v, d in zip(("exx", "eyy", "ezz", "eyz", "exz", "exy"), e, s))
        zones = "; ".join(" ".join(map(str, p.zone)) for p in self.patterns)
        return (f"<FitResult success={self.success} model={self.model} zones=[{zones}] "
                f"rms={self.rms_px:.3g}px {comps}>")
