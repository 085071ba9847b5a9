"""The pixel convention of user files, the Calibration a reference fit yields,
and the projector distortion it holds.

Internally every pixel position is y-down (image rows, :mod:`laueline.detector`).
A user's point file may count y upward; :class:`PixelFrame` is the one place
where such coordinates are converted, on the way in (points, a start centre,
a calibration's centre) and on the way out (reports).

The elliptical projector distortion (e1, e2) of :class:`laueline.detector.Detector`
is measured twice on a reference pattern: from the outline of the central
disk (:func:`laueline.images.detect.find_disk`) and, when freed, from the
line fit.  :func:`combine_distortion` weighs the measurements by their
inverse covariances, checks that they agree and tests the result against
zero: with q = e^T C^-1 e chi-square distributed with 2 degrees of freedom
when there is no distortion, the detector keeps a plain similarity unless
q exceeds its 99 % quantile, -2 ln(0.01) = 9.21.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..detector import Detector
from ..errors import InputError

__all__ = ["PixelFrame", "Calibration", "DistortionMeasurement", "DistortionEstimate",
           "combine_distortion", "DISTORTION_SIGNIFICANCE"]

DISTORTION_SIGNIFICANCE = 0.99
# chi-square quantile with 2 degrees of freedom: P(q > x) = exp(-x / 2)
_CHI2_2DOF = -2.0 * math.log(1.0 - DISTORTION_SIGNIFICANCE)


def _quadratic(value, covariance):
    """e^T C^-1 e, or 0 when C is singular or not finite."""
    value, covariance = np.asarray(value, float), np.asarray(covariance, float)
    if not np.all(np.isfinite(covariance)) or np.linalg.det(covariance) <= 0:
        return 0.0
    return float(value @ np.linalg.solve(covariance, value))


@dataclass(frozen=True)
class DistortionMeasurement:
    """One measurement of the elliptical distortion (e1, e2).

    Attributes
    ----------
    source : str
        ``"disk outline"``, ``"line fit"`` or ``"calibration"``.
    value : (e1, e2)
    covariance : ndarray (2, 2)
    """

    source: str
    value: tuple
    covariance: np.ndarray

    @property
    def sigma(self):
        return tuple(float(v) for v in np.sqrt(np.maximum(np.diag(self.covariance), 0.0)))

    @property
    def chi2(self):
        """q = e^T C^-1 e against no distortion (2 degrees of freedom)."""
        return _quadratic(self.value, self.covariance)

    @property
    def significant(self):
        return self.chi2 > _CHI2_2DOF

    @classmethod
    def from_disk(cls, disk):
        """From a :class:`laueline.images.detect.Disk` (its ellipse fit), or None."""
        sigma = np.asarray(getattr(disk, "distortion_sigma", (0.0, 0.0)), float)
        if disk is None or not np.all(sigma > 0):
            return None
        return cls("disk outline", tuple(float(v) for v in disk.distortion), np.diag(sigma ** 2))

    @classmethod
    def from_fit(cls, result, pattern=0):
        """From a fit that freed the distortion (``e1``, ``e2``), or None when it held it."""
        names = list(result.parameters)
        suffix = "" if len(result.patterns) == 1 else f"[{pattern + 1}]"
        try:
            i, j = names.index("e1" + suffix), names.index("e2" + suffix)
        except ValueError:
            return None
        cov = np.asarray(result.covariance, float)[np.ix_([i, j], [i, j])]
        value = tuple(float(v) for v in result.patterns[pattern].detector.distortion)
        return cls("line fit", value, cov)

    def to_dict(self):
        return {"source": self.source, "value": list(self.value), "sigma": list(self.sigma),
                "covariance": np.asarray(self.covariance).tolist(), "chi2": self.chi2,
                "significant": self.significant}


@dataclass(frozen=True)
class DistortionEstimate:
    """The elliptical projector distortion of a pattern: measurements, their
    combination, and what the detector holds.

    Attributes
    ----------
    measurements : tuple of DistortionMeasurement
    value, covariance : (e1, e2), ndarray (2, 2)
        Inverse-covariance weighted mean of the measurements.
    chi2 : float
        q = e^T C^-1 e of the combined value against no distortion.
    significant : bool
        q above the chi-square quantile of ``DISTORTION_SIGNIFICANCE``.
    agreement_chi2 : float or None
        Scatter of the measurements about their mean (chi-square with
        2 (n - 1) degrees of freedom), None for a single measurement.
    used : (e1, e2)
        The distortion the detector holds.
    note : str
        How ``used`` was chosen.
    """

    measurements: tuple
    value: tuple
    covariance: np.ndarray
    chi2: float
    significant: bool
    agreement_chi2: float | None
    used: tuple
    note: str

    @property
    def sigma(self):
        return tuple(float(v) for v in np.sqrt(np.maximum(np.diag(self.covariance), 0.0)))

    @property
    def consistent(self):
        """The measurements agree at the 99.9 % level (True for one measurement)."""
        if self.agreement_chi2 is None:
            return True
        dof = 2 * (len(self.measurements) - 1)
        # chi-square survival for even dof: exp(-x/2) sum_k<dof/2 (x/2)^k / k!
        x = 0.5 * self.agreement_chi2
        tail = math.exp(-x) * sum(x ** k / math.factorial(k) for k in range(dof // 2))
        return tail > 1e-3

    def to_dict(self):
        return {"value": list(self.value), "sigma": list(self.sigma),
                "covariance": np.asarray(self.covariance).tolist(), "chi2": self.chi2,
                "significance_level": DISTORTION_SIGNIFICANCE,
                "significant": self.significant, "agreement_chi2": self.agreement_chi2,
                "consistent": self.consistent, "used": list(self.used), "note": self.note,
                "measurements": [m.to_dict() for m in self.measurements]}

    def text(self):
        """Lines for people: each measurement, the combination and what is held."""
        def pair(value, sigma):
            return (f"e1 {value[0]:+.5f} +- {sigma[0]:.5f}, e2 {value[1]:+.5f} +- "
                    f"{sigma[1]:.5f}")

        out = ["projector distortion (elliptical)"]
        for m in self.measurements:
            out.append(f"  {m.source:13} {pair(m.value, m.sigma)}  (q = {m.chi2:.1f})")
        if len(self.measurements) > 1:
            out.append(f"  {'combined':13} {pair(self.value, self.sigma)}  (q = "
                       f"{self.chi2:.1f}; agreement chi2 {self.agreement_chi2:.1f}"
                       + ("" if self.consistent else ", the measurements DISAGREE") + ")")
        out.append(f"  held          e1 {self.used[0]:+.5f}, e2 {self.used[1]:+.5f}: "
                   f"{self.note}")
        return "\n".join(out)


def combine_distortion(measurements, used=None, note=""):
    """Combine distortion measurements and decide what the detector holds.

    Parameters
    ----------
    measurements : sequence of DistortionMeasurement (None items are skipped)
    used : (e1, e2), optional
        What the detector holds; by default the combined value when it is
        significant, else (0, 0) (a plain similarity).
    note : str, optional
        Why ``used`` was chosen (a default note otherwise).

    Returns
    -------
    DistortionEstimate
    """
    ms = tuple(m for m in measurements if m is not None)
    if not ms:
        zero = np.zeros((2, 2))
        return DistortionEstimate((), (0.0, 0.0), zero, 0.0, False, None,
                                  tuple(used or (0.0, 0.0)),
                                  note or "not measured: plain similarity")
    weights = [np.linalg.inv(m.covariance) for m in ms]
    covariance = np.linalg.inv(sum(weights))
    value = covariance @ sum(w @ np.asarray(m.value) for w, m in zip(weights, ms))
    agreement = None
    if len(ms) > 1:
        agreement = float(sum((np.asarray(m.value) - value) @ w @ (np.asarray(m.value) - value)
                              for w, m in zip(weights, ms)))
    chi2 = _quadratic(value, covariance)
    significant = chi2 > _CHI2_2DOF
    if used is None:
        used = tuple(float(v) for v in value) if significant else (0.0, 0.0)
        note = note or ("significant at the 99 % level: held" if significant else
                        "not significant at the 99 % level: plain similarity")
    return DistortionEstimate(ms, tuple(float(v) for v in value), covariance, chi2,
                              significant, agreement, tuple(float(v) for v in used), note)


@dataclass(frozen=True)
class PixelFrame:
    """The y direction of a user's pixel coordinates.

    Attributes
    ----------
    y_up : bool
        y grows upward; internal coordinates are y-down, so y is negated
        (the detector centre absorbs the offset).
    """

    y_up: bool = False

    def to_internal(self, xy):
        """User (x, y) px (..., 2) -> internal y-down px; None passes through."""
        if xy is None:
            return None
        out = np.array(xy, dtype=float)
        if self.y_up:
            out[..., 1] = -out[..., 1]
        return out

    def to_user(self, xy):
        """Internal y-down px (..., 2) -> the user's convention."""
        return self.to_internal(xy)  # negating y is its own inverse


@dataclass(frozen=True)
class Calibration:
    """Effective voltage and detector from a fit to an unstrained reference.

    Attributes
    ----------
    kv : float
        Effective voltage, kV.
    detector : Detector
        Centre (internal y-down px), scale, rotation, mirror and distortion.
    structure : str
        Name of the reference structure.
    formula : str
    zone, x_axis : tuple of int or None
        The reference pattern's zone axis and disk x axis.
    settings : dict
        What the reference fit freed and assumed (model, free parameters,
        inner potential, disk radius).
    distortion_covariance : ndarray (2, 2), optional
        Covariance of the detector's distortion (e1, e2) as measured on the
        reference; None when it was not measured.
    converged : bool
        Whether the reference fit converged.
    source : str
        File it was read from, if any.
    """

    kv: float
    detector: Detector
    structure: str = ""
    formula: str = ""
    zone: tuple | None = None
    x_axis: tuple | None = None
    settings: dict = field(default_factory=dict)
    converged: bool = True
    source: str = ""
    distortion_covariance: object = None

    @classmethod
    def coerce(cls, value, name="calibration"):
        """A Calibration from itself or from a (kv, Detector) pair."""
        if value is None or isinstance(value, cls):
            return value
        try:
            kv, det = value
        except (TypeError, ValueError):
            raise InputError(f"{name}: give a Calibration (or a (kv, Detector) pair)") from None
        if not isinstance(det, Detector):
            raise InputError(f"{name}: the second item must be a Detector")
        return cls(float(kv), det)

    @classmethod
    def from_document(cls, doc, source=""):
        """Read a ``laueline.fit`` document (versions 1 and 2) made on a reference."""
        if isinstance(doc.get("patterns"), list) and "detector" not in doc:
            if len(doc["patterns"]) != 1:
                raise InputError(f"{source or 'calibration'}: a fit of "
                                 f"{len(doc['patterns'])} patterns is not one calibration")
            part = doc["patterns"][0]
        else:
            part = doc
        try:
            det = part["detector"]
            frame = PixelFrame(bool(det.get("y_up", False)))
            centre = frame.to_internal([float(v) for v in det["center_px"]])
            detector = Detector(tuple(float(v) for v in centre),
                                float(det["scale_px_per_mrad"]), float(det["rotation_deg"]),
                                bool(det["mirror"]),
                                tuple(float(v) for v in det.get("distortion", (0.0, 0.0))))
            kv = float(part["kv"])
        except (KeyError, TypeError, ValueError):
            raise InputError(f"{source or 'calibration'}: the document lacks kv or detector "
                             "fields") from None
        structure = doc.get("structure") or {}
        converged = doc.get("success", doc.get("converged", True))
        settings = {k: doc[k] for k in ("model", "parameters", "inner_potential", "disk_mrad")
                    if k in doc}
        if part.get("image_shape"):
            settings["image_shape"] = [int(v) for v in part["image_shape"]]
        zone = part.get("zone")
        x_axis = part.get("x_axis")
        covariance = _distortion_covariance(doc, part)
        return cls(kv, detector, str(structure.get("name", "")),
                   str(structure.get("formula", "")), tuple(zone) if zone else None,
                   tuple(x_axis) if x_axis else None, settings, bool(converged), str(source),
                   covariance)

    def to_dict(self, pixel_frame=PixelFrame()):
        det = self.detector.as_dict()
        det["center_px"] = [float(v) for v in pixel_frame.to_user(self.detector.center_px)]
        det["y_up"] = pixel_frame.y_up
        return {"kv": self.kv, "detector": det, "structure": self.structure,
                "formula": self.formula,
                "zone": list(self.zone) if self.zone else None,
                "x_axis": list(self.x_axis) if self.x_axis else None,
                "settings": self.settings, "converged": self.converged,
                "distortion_covariance": None if self.distortion_covariance is None
                else np.asarray(self.distortion_covariance, float).tolist()}


def _distortion_covariance(doc, part):
    """The (2, 2) covariance of the held distortion a fit document records, or None.

    A reference fit on an image records its measurement (``distortion``);
    otherwise a fit that freed the distortion gives its sigmas.
    """
    block = doc.get("distortion") if isinstance(doc.get("distortion"), dict) else None
    try:
        if block is not None and any(block.get("used") or ()):
            cov = np.asarray(block["covariance"], float)
            used, value = np.asarray(block["used"], float), np.asarray(block["value"], float)
            # the held value is the line fit's when one was made
            fitted = [m for m in block.get("measurements", []) if m.get("source") == "line fit"]
            if fitted and np.allclose(fitted[0]["value"], used):
                cov = np.asarray(fitted[0]["covariance"], float)
            elif not np.allclose(value, used):
                return None
            return cov if cov.shape == (2, 2) and np.all(np.isfinite(cov)) else None
        sigma = (((part.get("detector") or {}).get("sigma")) or {}).get("distortion")
        if sigma is not None and all(v is not None for v in sigma):
            return np.diag(np.asarray(sigma, float) ** 2)
    except (KeyError, TypeError, ValueError):
        return None
    return None
