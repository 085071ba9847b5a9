"""Strain fits corrected for the dynamical shifts of HOLZ lines, and the kinematic bias.

The fit itself stays kinematic (:func:`laueline.refine.refine` and
:func:`laueline.refine.refine_image`); what changes is the data it sees.
At the current fitted state the Bloch-wave engine gives, for every line,
the shift of its deficit minimum from the exact kinematic locus (along the
locus normal, interpolated along the line).  The observations are moved
back by those shifts, so that the kinematic model describes them, and the
fit is repeated; the shifts are recomputed at the new state until the
strain changes by less than a tenth of its uncertainty.

* A crossing of lines a and b moves by the d (mrad) that solves
  n_a . d = shift_a, n_b . d = shift_b, with n the unit normals; a crossing
  that would move by more than 0.25 mrad (lines meeting at a grazing angle)
  is left out of the corrected fit.
* A detected line moves along its normal by the shift, fitted as a
  constant plus a linear change along the line (an offset and a small
  rotation of the detected line).

The systematic uncertainty of the dynamical model is how much the result
moves when the thickness changes by its stated uncertainty and when the
absorption ratio is halved and doubled (one correction step from the
converged state each).  Both parts, and their sum, are reported as Voigt
covariances of the Green-Lagrange strain (order xx yy zz yz xz xy).
"""

from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from .beams import DEFAULT_ZOLZ_GMAX
from .bloch import DEFAULT_ABSORPTION_RATIO, check_absorption_ratio, check_thickness
from .minima import IMAGE_ZOLZ_GMAX, dynamical_lines

__all__ = ["DynamicalFit", "refine_dynamical", "KinematicBias", "kinematic_bias",
           "KINEMATIC_BIAS_FLOOR", "thickness_from_document", "dynamical_fit_document",
           "dynamical_fit_text"]

#: Fractional thickness uncertainty assumed when none is given.
DEFAULT_THICKNESS_FRACTION = 0.1
_MAX_ROUNDS = 6
#: A round whose change is not below this fraction of the previous one ends the
#: iteration (from the third round on): the correction has reached its noise.
_CONTRACTION = 0.7
#: ... provided the change is below this many sigma (larger changes are not noise).
_NOISE_FLOOR = 1.0
_SETTLED = 0.1  # strain change below this fraction of its sigma ends the iteration
_STRAIN_FLOOR = 1e-6
#: A crossing the shifts would move further than this (mrad) is left out of a
#: corrected fit: its lines meet at too grazing an angle.
_MAX_CROSSING_MOVE_MRAD = 0.25
#: Conservative 1-sigma bias of a kinematic strain component (Green-Lagrange), used
#: when the engine would take too long: independent many-beam calculations (Si
#: [2 3 0] and [3 4 0], 200 kV, 150-300 nm) give 1.5e-4 to 1.9e-4 for
#: well-determined combinations with a calibration held, and of order 1e-3 for a
#: pattern fitted without one.
KINEMATIC_BIAS_FLOOR = {"calibrated": 2e-4, "uncalibrated": 1e-3}


@dataclass
class DynamicalFit:
    """A fit corrected for dynamical line shifts.

    Attributes
    ----------
    result : laueline.refine.FitResult
        The corrected fit (its ``strain`` holds the statistical uncertainty).
    kinematic : laueline.refine.FitResult
        The uncorrected fit of the same data.
    covariance_voigt_statistical, covariance_voigt_systematic, covariance_voigt : ndarray (6, 6)
        Green-Lagrange strain covariances: the fit's, the dynamical model's
        (thickness and absorption), and their sum.
    systematic_shifts : dict
        Change of the six strain components for each variation of the model
        (``thickness+``, ``thickness-``, ``absorption/2``, ``absorption*2``).
    parameter_systematic_sigma : dict
        Systematic 1-sigma of every refined parameter (for example kv).
    line_shifts_mrad : dict
        Mean dynamical shift of each line used (``'h k l'`` -> mrad) at the
        final state.
    rounds : int
        Correction rounds until the strain settled.
    round_changes : list of float
        Largest change of the result in each round, in units of its sigma.
    settled : bool
    thickness_nm, thickness_sigma_nm, absorption_ratio : float
    n_beams : int
    warnings : list of str
    """

    result: object
    kinematic: object
    covariance_voigt_statistical: np.ndarray
    covariance_voigt_systematic: np.ndarray
    covariance_voigt: np.ndarray
    systematic_shifts: dict
    parameter_systematic_sigma: dict
    line_shifts_mrad: dict
    rounds: int
    settled: bool
    thickness_nm: float
    thickness_sigma_nm: float
    absorption_ratio: float
    n_beams: int
    warnings: list = field(default_factory=list)
    variant_results: dict = field(default_factory=dict, repr=False)
    calibration_changes_held: dict | None = None
    round_changes: list = field(default_factory=list)

    def calibration_changes(self):
        """How each variation of the dynamical model moves the voltage and scale.

        For a calibration made with the correction: ``{variant: {"kv": dkv,
        "scale_px_per_mrad": ds, "rotation_deg": dr}}``, the change of the
        calibration when the thickness or the absorption is varied.  A later
        fit of the same foil holding this calibration takes these changes in
        the same variations (:func:`refine_dynamical`, ``calibration_changes``),
        so the systematic part counts the thickness error once, in the
        reference and the strained region alike.
        """
        base = self.result
        out = {}
        for name, res in self.variant_results.items():
            out[name] = {"kv": float(res.kv - base.kv),
                         "scale_px_per_mrad": float(res.detector.scale_px_per_mrad
                                                    - base.detector.scale_px_per_mrad),
                         "rotation_deg": float(res.detector.rotation_deg
                                               - base.detector.rotation_deg)}
        return out

    @property
    def strain_voigt(self):
        return _voigt(self.result)

    @property
    def strain_voigt_kinematic(self):
        return _voigt(self.kinematic)

    @property
    def sigma_voigt(self):
        """Total 1-sigma of the six strain components."""
        return np.sqrt(np.maximum(np.diag(self.covariance_voigt), 0.0))

    def summary(self):
        """Dictionary for documents."""
        return {
            "thickness_nm": self.thickness_nm, "thickness_sigma_nm": self.thickness_sigma_nm,
            "absorption_ratio": self.absorption_ratio, "n_beams": self.n_beams,
            "rounds": self.rounds, "settled": self.settled,
            "round_changes_sigma": list(self.round_changes),
            "strain_voigt": self.strain_voigt, "strain_voigt_kinematic":
                self.strain_voigt_kinematic,
            "covariance_voigt": self.covariance_voigt,
            "covariance_voigt_statistical": self.covariance_voigt_statistical,
            "covariance_voigt_systematic": self.covariance_voigt_systematic,
            "systematic_shifts": self.systematic_shifts,
            "parameter_systematic_sigma": self.parameter_systematic_sigma,
            "line_shifts_mrad": self.line_shifts_mrad,
            "calibration_changes": self.calibration_changes(),
            "calibration_changes_held": self.calibration_changes_held,
            "voigt_order": "xx yy zz yz xz xy (Green-Lagrange)",
        }


def _voigt(result):
    e = result.strain.green_lagrange
    return np.array([e[0, 0], e[1, 1], e[2, 2], e[1, 2], e[0, 2], e[0, 1]])


def thickness_from_document(doc):
    """(thickness_nm, thickness_sigma_nm) from a ``laueline.thickness`` document."""
    try:
        t = float(doc["thickness_nm"])
        s = doc.get("thickness_sigma_nm")
        return t, (None if s is None else float(s))
    except (KeyError, TypeError, ValueError):
        raise InputError("the thickness document lacks thickness_nm") from None


# ---------------------------------------------------------------------------
# shifts at a fitted state
# ---------------------------------------------------------------------------

def _fitted_pattern(result, crystal, hkl_needed):
    """The fitted state's pattern, holding at least the lines ``hkl_needed``."""
    from ..lines import predict

    fitted = crystal.with_basis(result.basis)
    threshold = 0.05
    for _ in range(3):
        pattern = predict(fitted, result.zone, result.kv, result.disk_mrad,
                          x_axis=result.x_axis, min_strength=threshold,
                          inner_potential=result.inner_potential)
        have = {tuple(h) for h in pattern.hkl.tolist()}
        missing = [h for h in hkl_needed if tuple(h) not in have]
        if not missing:
            return pattern
        threshold /= 4
    raise InputError(f"lines {missing[:3]} of the fit are not predicted in the disk")


def _line_shift_model(pattern, hkl_needed, thickness_nm, absorption_ratio, check,
                      zolz_gmax=DEFAULT_ZOLZ_GMAX, n_points=None, fractions=None):
    """Per needed line: (along-line coordinates, shifts, normal, along, smooth curve),
    and the run.

    ``fractions`` (from :func:`_points_used` of an earlier run) keeps the points
    of that run, so that the shifts at a slightly changed state, or for a
    variation of the model, are computed at the same places along the lines.
    """
    index = {tuple(h): i for i, h in enumerate(pattern.hkl.tolist())}
    wanted = sorted({index[tuple(h)] for h in hkl_needed})
    given = None
    if fractions is not None:
        given = {index[h]: f for h, f in fractions.items() if h in index and len(f)}
    run = dynamical_lines(pattern, thickness_nm, absorption_ratio=absorption_ratio,
                          lines=wanted, check_convergence=check, zolz_gmax=zolz_gmax,
                          n_points=_SHIFT_POINTS if n_points is None else n_points,
                          fractions=given)
    model = {}
    for i in wanted:
        normal = pattern.normal[i]
        along = np.array([-normal[1], normal[0]])
        ok = np.isfinite(run.shift_mrad[i])
        q = run.locus_mrad[i][ok] @ along
        order = np.argsort(q)
        q, shift = q[order], run.shift_mrad[i][ok][order]
        model[tuple(pattern.hkl[i])] = (q, shift, normal, along, _smooth_shift(q, shift))
    return model, run


def _points_used(run):
    """'h k l' -> chord fractions of the points of a run (lines computed only)."""
    return {tuple(int(v) for v in h): f for h, f in zip(run.hkl, run.fractions) if len(f)}


#: Points per line where the shifts are computed: a cubic through nine points
#: puts a crossing within a few 1e-3 mrad of one through fifteen (Si [2 3 0],
#: 200 kV, 200 nm); through five or seven it moves by up to 0.05 mrad.
_SHIFT_POINTS = 9
#: Largest degree of the polynomial through a line's shifts.
_SHIFT_DEGREE = 3


def _smooth_shift(q, shift):
    """Polynomial coefficients of a smooth curve through a line's shifts along it.

    The minima are sought away from the other lines, where each line is free
    of its neighbours; near a crossing the two lines' minima bend toward each
    other, and a crossing is where the smooth continuations of both lines
    meet.  A least-squares polynomial in the along-line coordinate (degree 3
    from seven points or more, a straight line from fewer) describes that continuation; piecewise
    linear interpolation would follow the last sampled bend instead.
    """
    if len(q) == 0:
        return np.zeros(1)
    # fewer than seven points (an estimate, or lines crossed by many others) give
    # a straight trend: a cubic through five points follows every bend
    degree = _SHIFT_DEGREE if len(q) >= _SHIFT_POINTS - 2 else min(1, len(q) - 1)
    return np.polyfit(q, shift, degree) if len(q) > 1 else np.array([shift[0]])


def _shift_at(model, hkl, points_mrad):
    """Shift (mrad) of line hkl at points (k, 2), and the line normal."""
    q, shift, normal, along, coef = model[tuple(hkl)]
    if not len(q):
        return np.zeros(len(points_mrad)), normal
    # beyond the first and last point the curve is held at its end values: a
    # cubic extrapolated past its points can run off by tenths of a mrad
    inside = np.clip(np.asarray(points_mrad) @ along, q[0], q[-1])
    return np.polyval(coef, inside), normal


def _crossing_corrections_px(state, model, ha, hb):
    """Pixel displacements of crossings (ha, hb) predicted by the shifts at a state."""
    from ..lines import crossing_positions

    xy = crossing_positions(state.basis, state.zone, state.x_axis, state.wave_number, ha, hb)
    d = np.zeros((len(ha), 2))
    for k in range(len(ha)):
        sa, na = _shift_at(model, ha[k], xy[k:k + 1])
        sb, nb = _shift_at(model, hb[k], xy[k:k + 1])
        d[k] = np.linalg.solve(np.array([na, nb]), np.array([sa[0], sb[0]]))
    det = state.detector
    return det.to_pixels(xy + d) - det.to_pixels(xy)


def _corrected_points(points, measured, state, model):
    """Measured crossings (the rows of fit ``measured``) moved back by the shifts
    computed at fit ``state`` (its crossing positions and detector)."""
    from ..points import Points

    used = np.array([r["used"] for r in measured.points])
    xy = np.array([[r["x_px"], r["y_px"]] for r in measured.points])[used]
    ha = np.array([r["hkl_a"] for r in measured.points])[used]
    hb = np.array([r["hkl_b"] for r in measured.points])[used]
    sigma = None if points.sigma_px is None else np.asarray(points.sigma_px)[used]
    estimated = getattr(getattr(measured, "line_sigma", None), "point_sigma_px", None)
    if sigma is None and estimated:
        # the point noise estimated on the measured crossings is held, like the
        # line sigma, so the weights do not move between rounds
        sigma = np.full(len(xy), float(estimated))
    d = _crossing_corrections_px(state, model, ha, hb)
    # lines meeting at a grazing angle leave their crossing undefined to within the
    # shifts: such crossings are left out of the corrected fit
    keep = np.hypot(d[:, 0], d[:, 1]) <= _MAX_CROSSING_MOVE_MRAD * state.detector.scale_px_per_mrad
    return Points(xy[keep] - d[keep], ha[keep], hb[keep],
                  None if sigma is None else sigma[keep])


def _corrected_detection(detection, measured, state, model):
    """The detection with every line assigned in fit ``measured`` moved back by its
    dynamical shift, converted to pixels with the detector of fit ``state``."""
    result = measured
    det = state.detector
    centre = np.asarray(detection.disk.center_px, dtype=float)
    lines = list(detection.lines)
    for entry in result.lines or []:
        if not entry["used"] or tuple(entry["hkl"]) not in model:
            continue
        ln = lines[entry["index"]]
        ang = math.radians(ln.normal_angle_deg)
        n_px = np.array([math.cos(ang), math.sin(ang)])
        m_px = np.array([-n_px[1], n_px[0]])
        pts_mrad = det.to_mrad(np.asarray(ln.points_px, dtype=float))
        shift, normal = _shift_at(model, entry["hkl"], pts_mrad)
        moved = det.to_pixels(pts_mrad + shift[:, None] * normal[None, :]) \
            - det.to_pixels(pts_mrad)
        delta = moved @ n_px                      # displacement along the detected normal
        s = (np.asarray(ln.points_px) - centre) @ m_px
        coef = np.polyfit(s, delta, 1) if len(s) >= 2 else np.array([0.0, delta.mean()])
        lines[entry["index"]] = dataclasses.replace(
            ln, offset_px=ln.offset_px - coef[1],
            normal_angle_deg=ln.normal_angle_deg + math.degrees(coef[0]),
            points_px=np.asarray(ln.points_px) - delta[:, None] * n_px[None, :])
    return dataclasses.replace(detection, lines=lines)


def _line_shift_table(model):
    return {" ".join(map(str, h)): float(np.mean(v[1])) if len(v[1]) else None
            for h, v in model.items()}


# ---------------------------------------------------------------------------
# the corrected fit
# ---------------------------------------------------------------------------

def _hkl_used(result):
    if result.lines is not None:
        return [tuple(e["hkl"]) for e in result.lines if e["used"]]
    rows = [r for r in result.points if r["used"]]
    return sorted({tuple(r["hkl_a"]) for r in rows} | {tuple(r["hkl_b"]) for r in rows})


def _settled(new, old):
    """Largest change of the strain (or of every parameter for a cell held fixed)
    relative to its sigma."""
    if new.model == "fixed":
        sig = np.where(new.sigmas > 0, new.sigmas, np.inf)
        return float(np.max(np.abs(new.values - old.values) / sig)) if len(sig) else 0.0
    sig = np.sqrt(np.maximum(np.diag(new.strain.covariance_voigt), 0.0))
    change = np.abs(_voigt(new) - _voigt(old))
    # noise-free data make sigma vanish: changes below 1e-6 count as settled
    return float(np.max(change / np.maximum(sig, _STRAIN_FLOOR / _SETTLED)))


def refine_dynamical(crystal, zone, observations, *, thickness_nm, thickness_sigma_nm=None,
                     absorption_ratio=DEFAULT_ABSORPTION_RATIO, zolz_gmax=DEFAULT_ZOLZ_GMAX,
                     calibration_changes=None, **fit_options):
    """Fit crossings or detected lines with the dynamical shifts corrected.

    Parameters
    ----------
    crystal : Crystal
        The reference crystal, as for :func:`laueline.refine.refine`.
    zone : sequence of 3 int
    observations : laueline.points.Points or laueline.images.detect.Detection
        Measured crossings (fitted by :func:`~laueline.refine.refine`) or
        detected lines (fitted by :func:`~laueline.refine.refine_image`).
    thickness_nm : float
        Foil thickness, (0, 2000] nm.
    thickness_sigma_nm : float, optional
        Its 1-sigma; 10 % of the thickness by default.
    absorption_ratio : float
        a in U'_g = a U_g, [0, 1).
    zolz_gmax : float
        Zero-layer beams taken exactly (1/angstrom), see :func:`dynamical_lines`.
    calibration_changes : dict, optional
        With a calibration held that was itself made with the correction on
        the same foil: its :meth:`DynamicalFit.calibration_changes` (or the
        ``dynamical.calibration_changes`` of its document).  Each variation
        of the model then holds the calibration moved by the same variation,
        so a thickness error that shifts the calibrated voltage and the
        strained region's lines together is counted once, with its sign.
        Without it the calibration is held unchanged in every variation.
    **fit_options
        Passed to the fit (kv, model, calibration, disk_mrad, ...).

    Returns
    -------
    DynamicalFit
    """
    from ..refine import refine, refine_image

    t = check_thickness(thickness_nm)
    a = check_absorption_ratio(absorption_ratio)
    if thickness_sigma_nm is None:
        t_sigma = DEFAULT_THICKNESS_FRACTION * t
    else:
        t_sigma = float(thickness_sigma_nm)
        if not math.isfinite(t_sigma) or t_sigma < 0 or t_sigma >= t:
            raise InputError(f"thickness_sigma_nm must lie in [0, thickness), got "
                             f"{thickness_sigma_nm}")
    image = hasattr(observations, "good_lines")
    if image:
        kinematic = refine_image(crystal, zone, observations, **fit_options)
    else:
        kinematic = refine(crystal, zone, observations, **fit_options)
    # later fits keep the kinematic fit's assignment and orientation
    options = dict(fit_options)
    options.update(rotation_deg=kinematic.detector.rotation_deg,
                   mirror=kinematic.detector.mirror)
    for key in ("match_mrad",):
        options.pop(key, None)
    # the error model is held through the rounds: a per-line sigma estimated
    # afresh from slightly moved points would change the weights, and with
    # them the strain, by more than the correction settles to
    line_sigma = getattr(kinematic, "line_sigma", None)
    if line_sigma is not None and line_sigma.source in ("estimated", "default"):
        options.setdefault("line_sigma_px", line_sigma.value)

    def fit(data, changes=None):
        opts = options if changes is None else dict(
            options, calibration=_moved_calibration(options["calibration"], changes))
        return refine_image(crystal, zone, data, **opts) if image else \
            refine(crystal, zone, data, **opts)

    def correct(state, model):
        if image:
            return _corrected_detection(observations, kinematic, state, model)
        return _corrected_points(observations, kinematic, state, model)

    hkl_needed = _hkl_used(kinematic)
    warnings = []
    current, settled, rounds, n_beams = kinematic, False, 0, 0
    changes = []
    model = None
    states = []
    points_used = None      # chosen at the kinematic state, then kept
    for rounds in range(1, _MAX_ROUNDS + 1):
        pattern = _fitted_pattern(current, crystal, hkl_needed)
        model, run = _line_shift_model(pattern, hkl_needed, t, a, check=False,
                                       zolz_gmax=zolz_gmax, fractions=points_used)
        points_used = _points_used(run) if points_used is None else points_used
        n_beams = max(n_beams, run.n_beams)
        new = fit(correct(current, model))
        change = _settled(new, current)
        changes.append(change)
        current = new
        states.append(current)
        if change < _SETTLED:
            settled = True
            break
        if rounds >= 3 and change < _NOISE_FLOOR and change >= _CONTRACTION * changes[-2]:
            # the rounds no longer contract: what is left is the numerical noise of
            # the shifts (minima found to about 1e-4 mrad, points that move along
            # the lines), which directions the data barely fix amplify
            settled = True
            break
    if not settled:
        warnings.append(f"the dynamical correction did not settle in {_MAX_ROUNDS} rounds")
    cov_rounds = np.zeros((6, 6))
    if len(states) >= 3 and changes[-1] >= _SETTLED and current.model != "fixed":
        # the scatter of the strain over the rounds after the first is part of the
        # correction's uncertainty
        spread = np.array([_voigt(r) for r in states[1:]])
        cov_rounds = np.cov(spread.T)
        warnings.append(f"the dynamical correction settled to its numerical noise after "
                        f"{rounds} rounds (changes up to {max(changes[1:]):.2g} sigma); the "
                        "scatter over the rounds is part of the systematic uncertainty")

    # systematic part: one correction step per variation of the model
    pattern = _fitted_pattern(current, crystal, hkl_needed)
    variants = {"thickness+": (t + t_sigma, a), "thickness-": (max(t - t_sigma, 1e-3), a),
                "absorption/2": (t, a / 2), "absorption*2": (t, min(2 * a, 0.99))}
    held = None
    if calibration_changes and fit_options.get("calibration") is not None:
        held = {name: dict(calibration_changes.get(name) or {}) for name in variants}
    moved, params, results = {}, {}, {}
    for name, (tv, av) in variants.items():
        vmodel, _ = _line_shift_model(pattern, hkl_needed, tv, av, check=False,
                                      zolz_gmax=zolz_gmax, fractions=points_used)
        res = fit(correct(current, vmodel), None if held is None else held[name])
        moved[name] = _voigt(res) - _voigt(current)
        params[name] = res.values - current.values
        results[name] = res
    d_t = 0.5 * (moved["thickness+"] - moved["thickness-"])
    d_a = 0.5 * (moved["absorption*2"] - moved["absorption/2"])
    cov_sys = np.outer(d_t, d_t) + np.outer(d_a, d_a) + cov_rounds
    p_t = 0.5 * (params["thickness+"] - params["thickness-"])
    p_a = 0.5 * (params["absorption*2"] - params["absorption/2"])
    p_sig = np.sqrt(p_t ** 2 + p_a ** 2)
    cov_stat = np.asarray(current.strain.covariance_voigt, dtype=float)
    return DynamicalFit(
        result=current, kinematic=kinematic, covariance_voigt_statistical=cov_stat,
        covariance_voigt_systematic=cov_sys, covariance_voigt=cov_stat + cov_sys,
        systematic_shifts=moved,
        parameter_systematic_sigma=dict(zip(current.parameters, p_sig.tolist())),
        line_shifts_mrad=_line_shift_table(model), rounds=rounds, settled=settled,
        thickness_nm=t, thickness_sigma_nm=t_sigma, absorption_ratio=a, n_beams=n_beams,
        warnings=warnings, variant_results=results, calibration_changes_held=held,
        round_changes=changes)


def _moved_calibration(calibration, changes):
    """A held calibration (Calibration or (kv, Detector)) moved by ``changes``."""
    if isinstance(calibration, tuple):
        kv, det = calibration
    else:
        kv, det = calibration.kv, calibration.detector
    det = dataclasses.replace(
        det, scale_px_per_mrad=det.scale_px_per_mrad + changes.get("scale_px_per_mrad", 0.0),
        rotation_deg=det.rotation_deg + changes.get("rotation_deg", 0.0))
    kv = kv + changes.get("kv", 0.0)
    if isinstance(calibration, tuple):
        return kv, det
    return dataclasses.replace(calibration, kv=kv, detector=det)


# ---------------------------------------------------------------------------
# kinematic bias of a kinematic fit
# ---------------------------------------------------------------------------

@dataclass
class KinematicBias:
    """Estimated bias of a kinematic strain from the dynamical shifts it ignores.

    Attributes
    ----------
    covariance_voigt : ndarray (6, 6)
        Green-Lagrange strain covariance to add to the fit's as its systematic
        part (order xx yy zz yz xz xy).
    sigma_voigt : ndarray (6,)
    method : str
        ``'engine'`` (computed for the fit's lines at ``thickness_nm``) or
        ``'floor'`` (:data:`KINEMATIC_BIAS_FLOOR`, when the engine would take
        longer than allowed).
    thickness_nm : float
    note : str
    """

    covariance_voigt: np.ndarray
    sigma_voigt: np.ndarray
    method: str
    thickness_nm: float
    note: str

    def summary(self):
        return {"covariance_voigt": self.covariance_voigt, "sigma_voigt": self.sigma_voigt,
                "method": self.method, "thickness_nm": self.thickness_nm, "note": self.note}


def kinematic_bias(result, crystal, points=None, *, thickness_nm=200.0,
                   absorption_ratio=DEFAULT_ABSORPTION_RATIO, max_seconds=5.0,
                   calibrated=None):
    """Kinematic-bias estimate of a finished kinematic fit.

    The engine computes the dynamical shifts of the fit's lines at a typical
    thickness (zero layer exact to 1.5 1/A, enough for an estimate) and the
    fit is repeated on observations moved by them; the
    change of the strain, e, gives the covariance e e^T (its diagonal is the
    bias squared).  When the first line alone shows that all of them would
    take longer than ``max_seconds``, or the observations are not given, a
    conservative floor is used instead: (2e-4)^2 per component with a
    calibration held, (1e-3)^2 without (:data:`KINEMATIC_BIAS_FLOOR`).

    Parameters
    ----------
    result : laueline.refine.FitResult
        A kinematic fit.
    crystal : Crystal
        Its reference crystal.
    points : laueline.points.Points, optional
        The crossings it was fitted to (for their sigma_px); by default the
        fit's own table of points.  Detected-line fits use the floor.
    thickness_nm, absorption_ratio : float
        The typical foil for the estimate (200 nm, 0.1).
    max_seconds : float
        Time allowed for the engine.
    calibrated : bool, optional
        Whether voltage and scale were held from a calibration (chooses the
        floor); by default, whether kv is among the fitted parameters.

    Returns
    -------
    KinematicBias
    """
    from ..refine import refine

    t = check_thickness(thickness_nm)
    a = check_absorption_ratio(absorption_ratio)
    if calibrated is None:
        calibrated = "kv" not in result.parameters
    floor = KINEMATIC_BIAS_FLOOR["calibrated" if calibrated else "uncalibrated"]

    def from_floor(why):
        cov = np.diag(np.full(6, floor ** 2))
        return KinematicBias(cov, np.full(6, floor), "floor", t,
                             f"conservative floor {floor:.0e} per component ({why})")

    if result.lines is not None:
        return from_floor("the engine estimate is made for crossing fits")
    if points is None:
        from ..points import Points

        rows = result.points
        points = Points(np.array([[r["x_px"], r["y_px"]] for r in rows], dtype=float),
                        np.array([r["hkl_a"] for r in rows]),
                        np.array([r["hkl_b"] for r in rows]))
    hkl_needed = _hkl_used(result)
    pattern = _fitted_pattern(result, crystal, hkl_needed)
    start = time.perf_counter()
    _line_shift_model(pattern, hkl_needed[:1], t, a, check=False, zolz_gmax=IMAGE_ZOLZ_GMAX,
                      n_points=5)
    spent = time.perf_counter() - start
    if spent * len(hkl_needed) > max_seconds:
        return from_floor(f"the engine would take about {spent * len(hkl_needed):.0f} s for "
                          f"{len(hkl_needed)} lines")
    model, _ = _line_shift_model(pattern, hkl_needed, t, a, check=False,
                                 zolz_gmax=IMAGE_ZOLZ_GMAX, n_points=5)
    det = result.detector
    options = dict(kv=result.kv, model=result.model, x_axis=result.x_axis,
                   rotation_deg=det.rotation_deg, mirror=det.mirror, center_px=det.center_px,
                   scale_px_per_mrad=det.scale_px_per_mrad, disk_mrad=result.disk_mrad,
                   inner_potential=result.inner_potential,
                   calibration=(result.kv, det) if calibrated else None)
    moved = refine(crystal, result.zone, _corrected_points(points, result, result, model),
                   **options)
    e = _voigt(moved) - _voigt(result)
    return KinematicBias(np.outer(e, e), np.abs(e), "engine", t,
                         f"strain change when the lines are moved by their dynamical shifts "
                         f"at {t:g} nm (absorption ratio {a:g})")


# ---------------------------------------------------------------------------
# output
# ---------------------------------------------------------------------------

_NAMES = ("xx", "yy", "zz", "yz", "xz", "xy")


def dynamical_fit_document(document, fit, kinematic_document):
    """A fit document with the dynamical correction (``laueline.fit/2`` keys).

    ``strain`` holds the corrected strain with ``covariance_voigt`` the total
    (statistical plus systematic) covariance and the two parts beside it;
    ``strain_kinematic`` the uncorrected strain; ``dynamical`` the settings,
    the systematic shifts and the per-line shifts.
    """
    doc = dict(document)
    doc["schema"] = "laueline.fit/2"
    strain = dict(doc["strain"])
    strain["covariance_voigt"] = fit.covariance_voigt.tolist()
    strain["covariance_voigt_statistical"] = fit.covariance_voigt_statistical.tolist()
    strain["covariance_voigt_systematic"] = fit.covariance_voigt_systematic.tolist()
    strain["sigma_voigt_total"] = fit.sigma_voigt.tolist()
    doc["strain"] = strain
    doc["strain_kinematic"] = kinematic_document["strain"]
    summary = fit.summary()
    doc["dynamical"] = {k: (v.tolist() if isinstance(v, np.ndarray) else
                            {n: (w.tolist() if isinstance(w, np.ndarray) else w)
                             for n, w in v.items()} if isinstance(v, dict) else v)
                        for k, v in summary.items()}
    doc["warnings"] = list(doc.get("warnings", [])) + list(fit.warnings)
    return doc


def dynamical_fit_text(fit):
    """Readable comparison of the corrected and kinematic strain."""
    stat = np.sqrt(np.maximum(np.diag(fit.covariance_voigt_statistical), 0.0))
    syst = np.sqrt(np.maximum(np.diag(fit.covariance_voigt_systematic), 0.0))
    out = ["", f"dynamical correction: {fit.thickness_nm:g} +- {fit.thickness_sigma_nm:g} nm, "
               f"absorption ratio {fit.absorption_ratio:g} (halved and doubled for the "
               f"systematic part), up to {fit.n_beams} exact beams, {fit.rounds} round(s)"
               + ("" if fit.settled else ", NOT settled"),
           "  E (Green-Lagrange)    corrected    kinematic   sigma stat   sigma syst",]
    for k, name in enumerate(_NAMES):
        out.append(f"  {name:>18} {fit.strain_voigt[k]:12.3e} {fit.strain_voigt_kinematic[k]:12.3e}"
                   f" {stat[k]:12.2e} {syst[k]:12.2e}")
    out.extend(f"note: {w}" for w in fit.warnings)
    return "\n".join(out)
