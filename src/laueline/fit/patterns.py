"""The patterns file of a joint fit.

A small JSON document listing patterns of one region::

    {"patterns": [
        {"zone": [2, 3, 0], "x_axis": [0, 0, 4], "points": "a.csv",
         "calibration": "cal-230.json", "tilt_deg": [12.5, -3.0]},
        {"zone": [1, 1, 4], "image": "b.tif", "y_up": false}
    ]}

Keys of a pattern: ``zone`` (required; four indices for hexagonal
crystals), ``points`` (a point CSV) or ``image`` (a pattern image), and
optionally ``x_axis``, ``calibration`` (a reference fit), ``y_up`` (the
point file counts y upward), ``tilt_deg`` (the holder's two readings, see
:mod:`laueline.fit.orientation`), ``structure`` (must be the fitted one),
``center_px``, ``scale_px_per_mrad``, ``rotation_deg``, ``mirror`` and
``disk_mrad``.  Paths are relative to the file's folder.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..errors import InputError
from .calibration import Calibration, PixelFrame
from .engine import PatternSpec

__all__ = ["read_patterns"]

_KEYS = {"zone", "x_axis", "points", "image", "calibration", "y_up", "tilt_deg", "structure",
         "center_px", "scale_px_per_mrad", "rotation_deg", "mirror", "disk_mrad"}


def _load_calibration(path):
    from ..report import read_json

    return Calibration.from_document(read_json(path, "laueline.fit"), source=str(path))


def read_patterns(path, *, defaults=None, detect_options=None):
    """PatternSpecs of a patterns file (see the module docstring).

    Parameters
    ----------
    path : str or Path
    defaults : dict, optional
        PatternSpec fields used where a pattern does not set them.
    detect_options : dict, optional
        Keyword arguments of :func:`laueline.images.detect.detect_lines`.
    """
    from ..points import read_points

    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{path} is not JSON ({exc.msg}, line {exc.lineno})") from None
    items = doc.get("patterns") if isinstance(doc, dict) else None
    if not isinstance(items, list) or not items:
        raise InputError(f"{path}: expected {{\"patterns\": [...]}} with at least one pattern")
    folder = path.parent
    specs = []
    for j, item in enumerate(items):
        where = f"{path}: pattern {j + 1}"
        if not isinstance(item, dict):
            raise InputError(f"{where}: each pattern is an object")
        unknown = set(item) - _KEYS
        if unknown:
            raise InputError(f"{where}: unknown key(s) {', '.join(sorted(unknown))}")
        if "zone" not in item:
            raise InputError(f"{where}: the zone axis (zone) is required")
        if ("points" in item) == ("image" in item):
            raise InputError(f"{where}: give either points (a CSV) or image")
        fields = dict(defaults or {})
        frame = PixelFrame(bool(item.get("y_up", False)))
        fields["pixel_frame"] = frame
        for key in ("x_axis", "structure", "center_px", "scale_px_per_mrad", "rotation_deg",
                    "mirror", "disk_mrad"):
            if key in item:
                fields[key] = item[key]
        if "tilt_deg" in item:
            tilt = item["tilt_deg"]
            if not (isinstance(tilt, list) and len(tilt) == 2 and
                    all(isinstance(v, (int, float)) for v in tilt)):
                raise InputError(f"{where}: tilt_deg is two numbers [first, second]")
            fields["tilt_deg"] = tuple(float(v) for v in tilt)
        if "calibration" in item:
            fields["calibration"] = _load_calibration(folder / item["calibration"])
        if "points" in item:
            source = folder / item["points"]
            fields["points"] = read_points(source, y_up=frame.y_up)
        else:
            if frame.y_up:
                raise InputError(f"{where}: y_up applies to point files; images are read row "
                                 "by row")
            from ..images.detect import detect_lines
            from ..images.io import read_image

            source = folder / item["image"]
            image, saturation = read_image(source)
            fields["detection"] = detect_lines(image, saturation=saturation, source=str(source),
                                               **(detect_options or {}))
        fields["source"] = str(source)
        specs.append(PatternSpec(tuple(item["zone"]), **fields))
    return specs
