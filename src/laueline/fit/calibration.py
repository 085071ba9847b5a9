"""The pixel convention of user files and the Calibration a reference fit yields.

Internally every pixel position is y-down (image rows, :mod:`laueline.detector`).
A user's point file may count y upward; :class:`PixelFrame` is the one place
where such coordinates are converted, on the way in (points, a start centre,
a calibration's centre) and on the way out (reports).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..detector import Detector
from ..errors import InputError

__all__ = ["PixelFrame", "Calibration"]


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
        return cls(kv, detector, str(structure.get("name", "")),
                   str(structure.get("formula", "")), tuple(zone) if zone else None,
                   tuple(x_axis) if x_axis else None, settings, bool(converged), str(source))

    def to_dict(self, pixel_frame=PixelFrame()):
        det = self.detector.as_dict()
        det["center_px"] = [float(v) for v in pixel_frame.to_user(self.detector.center_px)]
        det["y_up"] = pixel_frame.y_up
        return {"kv": self.kv, "detector": det, "structure": self.structure,
                "formula": self.formula,
                "zone": list(self.zone) if self.zone else None,
                "x_axis": list(self.x_axis) if self.x_axis else None,
                "settings": self.settings, "converged": self.converged}
