"""Reading microscope files through rosettasciio, with their calibration.

Gatan DigitalMicrograph (.dm3, .dm4), EMD (.emd: the Velox and the
Berkeley NCEM flavours), MRC (.mrc), Quantum Detectors Merlin (.mib),
NanoMegas blockfiles (.blo), HyperSpy (.hspy, .zspy) are read with the
readers of rosettasciio (no vendor format is parsed here); TIFF, PNG and
NumPy .npy with :mod:`laueline.images.io`.  Files are opened lazily
(``lazy=True``: dask arrays), so a 4-D scan costs the memory of the chunk
that holds the pattern asked for.

What the metadata give, when they give it:

* the accelerating voltage: ``Acquisition_instrument.TEM.beam_energy``
  (keV, so kV for electrons);
* the pixel size of the two signal axes, converted to px per mrad:
  a reciprocal length q per pixel (1/nm or 1/A, without 2 pi, as
  rosettasciio and laueline both count |g| = 1/d) subtends the angle
  t = lambda q (the tangential part of the wave vector over K; lambda the
  relativistic wavelength of :func:`laueline.optics.wavelength_A`); an angle
  per pixel (mrad, rad, urad) is used as it is; a length on the detector
  (m, cm, mm, um) needs the camera length L and subtends t = size / L;
* the camera length, ``Acquisition_instrument.TEM.camera_length`` (mm);
* the detector size (the signal shape) and, for a stack or a 4-D scan, the
  navigation axes with their names, sizes, scales and units.

A value given by the caller overrides the file's, and the
:class:`FileMetadata` says which was used and why.

Axis order: the signal axes are the two the reader marks as not navigating
(the last two when it marks none or all); a pattern is returned as
``[row, col]`` = ``[ky, kx]`` (:mod:`laueline.images`).
"""

from __future__ import annotations

import importlib
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["MICROSCOPE_SUFFIXES", "MAX_SIDE_PX", "NavigationAxis", "FileMetadata",
           "MicroscopeFile", "PatternRead", "open_microscope_file", "read_pattern",
           "iter_pattern_chunks", "mrad_per_pixel", "signal_metadata"]

# file suffix -> rosettasciio plugin module
MICROSCOPE_SUFFIXES = {
    ".dm3": "digitalmicrograph", ".dm4": "digitalmicrograph", ".emd": "emd",
    ".mrc": "mrc", ".mib": "quantumdetector", ".blo": "blockfile", ".hspy": "hspy",
    ".zspy": "zspy",
}
MAX_SIDE_PX = 4096
# the zspy reader opens lazy stores for writing ("r+") unless told otherwise; a
# pattern file is only read, and may be on a read-only disk
_READER_OPTIONS = {"zspy": {"mode": "r"}}

_RECIPROCAL = {"1/m": 1e-10, "1/um": 1e-4, "1/nm": 0.1, "1/a": 1.0, "1/pm": 100.0}  # -> 1/A
_ANGLE = {"mrad": 1.0, "rad": 1e3, "urad": 1e-3,           # -> mrad
          "deg": math.pi / 0.18, "degree": math.pi / 0.18, "°": math.pi / 0.18}
_LENGTH = {"m": 1e3, "cm": 10.0, "mm": 1.0, "um": 1e-3}    # -> mm on the detector
_REAL_SPACE = {"nm", "a", "pm"}  # specimen lengths: an image, not a pattern


@dataclass(frozen=True)
class NavigationAxis:
    """One navigation axis of a stack or scan (array order)."""

    name: str
    size: int
    scale: float
    offset: float
    units: str

    def as_dict(self):
        return {"name": self.name, "size": self.size, "scale": self.scale,
                "offset": self.offset, "units": self.units}


@dataclass
class FileMetadata:
    """What a pattern file said, and what was used.

    Attributes
    ----------
    path, reader : str
        The file and the rosettasciio plugin (or ``"image"`` for TIFF/PNG/npy).
    kv : float or None
        Voltage used (kV): the caller's, else the file's, else None.
    kv_file : float or None
        Voltage in the file's metadata.
    pixel_size, pixel_units : float or None, str
        Size of one pixel of the column (kx) axis as the file gives it.
    scale_px_per_mrad : float or None
        Camera scale used: the caller's, else converted from the file's
        pixel size, else None (the fit finds it).
    scale_file_px_per_mrad : float or None
        The camera scale converted from the file, before any override.
    camera_length_mm : float or None
    detector_shape : (rows, cols)
    navigation : tuple of NavigationAxis
    index : tuple of int or None
        The navigation index of the pattern read.
    taken, overrides, warnings : list of str
        Readable notes: what was taken from the file, what the caller
        replaced, and doubts.
    """

    path: str
    reader: str
    kv: float | None = None
    kv_file: float | None = None
    pixel_size: float | None = None
    pixel_units: str = ""
    scale_px_per_mrad: float | None = None
    scale_file_px_per_mrad: float | None = None
    camera_length_mm: float | None = None
    detector_shape: tuple = ()
    navigation: tuple = ()
    index: tuple | None = None
    taken: list = field(default_factory=list)
    overrides: list = field(default_factory=list)
    warnings: list = field(default_factory=list)

    def as_dict(self):
        return {"path": self.path, "reader": self.reader, "kv": self.kv,
                "kv_file": self.kv_file,
                "pixel_size": self.pixel_size, "pixel_units": self.pixel_units,
                "scale_px_per_mrad": self.scale_px_per_mrad,
                "scale_file_px_per_mrad": self.scale_file_px_per_mrad,
                "camera_length_mm": self.camera_length_mm,
                "detector_shape": list(self.detector_shape),
                "navigation": [a.as_dict() for a in self.navigation],
                "index": None if self.index is None else list(self.index),
                "taken": list(self.taken), "overrides": list(self.overrides),
                "warnings": list(self.warnings)}

    def text(self):
        """Lines for people: what came from the file and what was overridden."""
        out = [f"file       {self.path} (read by {self.reader}), detector "
               f"{' x '.join(str(v) for v in self.detector_shape[::-1])} px"]
        if self.navigation:
            nav = ", ".join(f"{a.name} {a.size} x {a.scale:g} {a.units}".rstrip()
                            for a in self.navigation)
            out.append(f"           navigation {nav}; pattern {list(self.index or ())}")
        out.extend(f"           from the file: {t}" for t in self.taken)
        if not self.taken:
            out.append("           from the file: no calibration")
        out.extend(f"           override: {t}" for t in self.overrides)
        out.extend(f"           warning: {t}" for t in self.warnings)
        return "\n".join(out)


def _normalise_units(units):
    u = str(units or "").strip().replace(" ", "").replace("Å", "A").replace("µ", "u")
    u = u.replace("μ", "u").replace("^{-1}", "^-1")
    low = u.lower()
    if low.endswith("^-1") or (low.endswith("-1") and not low.startswith("1/")):
        low = "1/" + low[:-3 if low.endswith("^-1") else -2]
    return {"1/angstrom": "1/a"}.get(low, low)


def mrad_per_pixel(pixel_size, units, *, kv=None, camera_length_mm=None):
    """Angle subtended by one pixel (mrad) from a pixel size with units.

    Parameters
    ----------
    pixel_size : float
        Size of one pixel.
    units : str
        '1/nm', '1/A' (reciprocal lengths without 2 pi), 'mrad', 'rad',
        'urad', 'deg', or a length on the detector ('m', 'cm', 'mm', 'um').
    kv : float, optional
        Voltage (kV); needed for reciprocal lengths.
    camera_length_mm : float, optional
        Needed for lengths on the detector.

    Raises
    ------
    InputError
        For units that cannot be converted or a missing ``kv`` /
        ``camera_length_mm``.
    """
    from ..optics import wavelength_A

    size = float(pixel_size)
    u = _normalise_units(units)
    if not (math.isfinite(size) and size > 0):
        raise InputError(f"the pixel size must be positive, got {pixel_size!r} {units}")
    if u in _RECIPROCAL:
        if kv is None:
            raise InputError(f"the pixel size is in {units}: converting it to mrad needs the "
                             "voltage (kv, --kv)")
        return size * _RECIPROCAL[u] * wavelength_A(kv) * 1e3
    if u in _ANGLE:
        return size * _ANGLE[u]
    if u in _LENGTH:
        if not camera_length_mm:
            raise InputError(f"the pixel size is a length on the detector ({units}): converting "
                             "it to mrad needs the camera length, which the file does not give")
        return size * _LENGTH[u] / float(camera_length_mm) * 1e3
    raise InputError(f"pixel size units '{units}' cannot be converted to mrad (expected 1/nm, "
                     "1/A, mrad, rad or a detector length with a camera length); give the "
                     "scale (scale_px_per_mrad, --scale-px-per-mrad)")


def _first_line(exc):
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _get(tree, path):
    """The value at a dotted path; a space and an underscore match each other, as
    readers write some paths in hyperspy's attribute form ("Microscope_Info")."""
    for key in path.split("."):
        if not isinstance(tree, dict):
            return None
        if key not in tree:
            wanted = key.replace(" ", "_")
            key = next((k for k in tree if str(k).replace(" ", "_") == wanted), None)
            if key is None:
                return None
        tree = tree[key]
    return tree


def _apply_mapping(signal):
    """Fill ``metadata`` from ``original_metadata`` with the reader's own mapping."""
    metadata = dict(signal.get("metadata") or {})
    for source, (target, convert) in (signal.get("mapping") or {}).items():
        value = _get(signal.get("original_metadata") or {}, source)
        if value is None or _get(metadata, target) is not None:
            continue
        try:
            value = convert(value) if convert is not None else value
        except Exception:  # noqa: BLE001  a reader's conversion of a value it wrote
            continue
        node = metadata
        keys = target.split(".")
        for key in keys[:-1]:
            node = node.setdefault(key, {})
        node[keys[-1]] = value
    return metadata


def _signal_axes(signal):
    """(navigation axis dicts, signal axis dicts) in array order."""
    axes = list(signal.get("axes") or [])
    ndim = np.ndim(signal["data"]) if not hasattr(signal["data"], "ndim") \
        else signal["data"].ndim
    if len(axes) != ndim:
        axes = [{"name": f"axis{i}", "size": n, "scale": 1.0, "offset": 0.0, "units": "",
                 "navigate": i < ndim - 2} for i, n in enumerate(signal["data"].shape)]
    flags = [bool(a.get("navigate", False)) for a in axes]
    sig = [i for i, f in enumerate(flags) if not f]
    if len(sig) != 2 or sig != [ndim - 2, ndim - 1]:
        sig = [ndim - 2, ndim - 1]
    return axes[:ndim - 2], [axes[i] for i in sig]


@dataclass
class MicroscopeFile:
    """An opened pattern file: a lazy array and its metadata.

    Attributes
    ----------
    data : dask or numpy array, shape navigation + (rows, cols)
    metadata : FileMetadata
        The file's calibration (before any index is chosen).
    saturation : float or None
        The largest value of the integer pixel type.
    """

    data: object
    metadata: FileMetadata
    saturation: float | None

    @property
    def navigation_shape(self):
        return tuple(int(n) for n in self.data.shape[:-2])

    @property
    def n_patterns(self):
        return int(np.prod(self.navigation_shape)) if self.navigation_shape else 1

    def navigation_index(self, index):
        """The navigation index (tuple) of ``index``: a flat int, a tuple, or None."""
        shape = self.navigation_shape
        if not shape:
            if index not in (None, 0, (), (0,), [0]):
                raise InputError(f"{self.metadata.path} holds a single pattern; index "
                                 f"{index} does not exist")
            return ()
        if index is None:
            raise InputError(f"{self.metadata.path} holds {self.n_patterns} patterns "
                             f"(navigation {' x '.join(map(str, shape))}); choose one with "
                             "index (--index)")
        idx = [int(v) for v in np.atleast_1d(index)]
        if len(idx) == 1 and len(shape) > 1:
            if not 0 <= idx[0] < self.n_patterns:
                raise InputError(f"index {idx[0]} is outside the {self.n_patterns} patterns")
            return tuple(int(v) for v in np.unravel_index(idx[0], shape))
        if len(idx) != len(shape) or any(not 0 <= i < n for i, n in zip(idx, shape)):
            raise InputError(f"index {idx} does not fit the navigation shape "
                             f"{' x '.join(map(str, shape))}")
        return tuple(idx)

    def pattern(self, index=None):
        """One pattern as float64 ``[row, col]``, loading only the chunk that holds it."""
        nav = self.navigation_index(index)
        block = self.data[nav] if nav else self.data
        if hasattr(block, "compute"):
            block = block.compute()
        return np.asarray(block, dtype=np.float64)


def open_microscope_file(path, *, kv=None, scale_px_per_mrad=None, allow_large=False):
    """Open a microscope file lazily and read its calibration.

    Parameters
    ----------
    path : str or Path
        A file with one of :data:`MICROSCOPE_SUFFIXES`.
    kv : float, optional
        Voltage (kV) overriding the file's.
    scale_px_per_mrad : float, optional
        Camera scale overriding the one converted from the file's pixel size.
    allow_large : bool
        Accept patterns larger than ``MAX_SIDE_PX`` on a side.

    Returns
    -------
    MicroscopeFile
    """
    path = Path(path)
    if not path.is_file() and not (path.suffix.lower() == ".zspy" and path.is_dir()):
        raise InputError(f"cannot read {path}: no such file")
    plugin = MICROSCOPE_SUFFIXES.get(path.suffix.lower())
    if plugin is None:
        raise InputError(f"{path}: not a microscope file type rosettasciio is asked to read "
                         f"({', '.join(sorted(MICROSCOPE_SUFFIXES))})")
    try:
        reader = importlib.import_module(f"rsciio.{plugin}").file_reader
        signals = reader(str(path), lazy=True, **_READER_OPTIONS.get(plugin, {}))
    except Exception as exc:  # noqa: BLE001  any reader failure is the file's problem
        raise InputError(f"{path}: rosettasciio cannot read it ({_first_line(exc)})") from None
    candidates = [s for s in signals or []
                  if hasattr(s.get("data"), "shape") and len(s["data"].shape) >= 2
                  and min(s["data"].shape[-2:]) >= 16]
    if not candidates:
        raise InputError(f"{path}: the file holds no image of at least 16 x 16 px")
    # the largest pattern (Velox files also carry small spectra and overview images)
    signal = max(candidates, key=lambda s: (s["data"].shape[-2] * s["data"].shape[-1]))
    data = signal["data"]
    dtype = np.dtype(data.dtype)
    if dtype.names is not None or not (np.issubdtype(dtype, np.integer)
                                       or np.issubdtype(dtype, np.floating)):
        raise InputError(f"{path}: unsupported pixel type {dtype}")
    rows, cols = (int(v) for v in data.shape[-2:])
    if (rows > MAX_SIDE_PX or cols > MAX_SIDE_PX) and not allow_large:
        raise InputError(f"{path}: the pattern is {cols} x {rows} px, above the "
                         f"{MAX_SIDE_PX} x {MAX_SIDE_PX} limit; allow_large "
                         "(--allow-large-image) reads it")
    if hasattr(data, "rechunk") and data.ndim > 2:
        data = data.rechunk({data.ndim - 2: -1, data.ndim - 1: -1})
    metadata = signal_metadata(signal, source=str(path), reader=plugin, kv=kv,
                               scale_px_per_mrad=scale_px_per_mrad)
    saturation = float(np.iinfo(dtype).max) if np.issubdtype(dtype, np.integer) else None
    return MicroscopeFile(data, metadata, saturation)


def signal_metadata(signal, *, source="", reader="", kv=None, scale_px_per_mrad=None,
                    strict=True):
    """The calibration of a signal in rosettasciio's dictionary form.

    Parameters
    ----------
    signal : dict
        One item of what a rosettasciio ``file_reader`` returns: ``data``,
        ``axes``, ``metadata``, ``original_metadata`` and the reader's
        ``mapping`` from original to standard metadata.
    source, reader : str
        The file and the plugin, for the report.
    kv, scale_px_per_mrad : float, optional
        Override the signal's voltage and camera scale.
    strict : bool
        Refuse pixel-size units that cannot be converted; when False they
        are reported as a warning and left unused (TIFF files, whose
        resolution tags often hold a print resolution).

    Returns
    -------
    FileMetadata

    Raises
    ------
    InputError
        Pixel-size units that cannot be converted to mrad (unless
        ``scale_px_per_mrad`` is given).
    """
    nav_axes, sig_axes = _signal_axes(signal)
    shape = tuple(int(v) for v in signal["data"].shape[-2:])
    md = _apply_mapping(signal)
    meta = FileMetadata(str(source), str(reader), detector_shape=shape)
    tem = _get(md, "Acquisition_instrument.TEM") or {}
    energy = tem.get("beam_energy")
    if energy is not None and np.isfinite(float(energy)) and float(energy) > 0:
        meta.kv_file = float(energy)
        meta.taken.append(f"voltage {meta.kv_file:g} kV")
    length = tem.get("camera_length")
    if length is not None and np.isfinite(float(length)) and float(length) > 0:
        meta.camera_length_mm = float(length)
        meta.taken.append(f"camera length {meta.camera_length_mm:g} mm")
    if kv is not None:
        meta.kv = float(kv)
        if meta.kv_file is not None and abs(meta.kv_file - meta.kv) > 1e-9:
            meta.overrides.append(f"voltage {meta.kv:g} kV from the command line, not the "
                                  f"file's {meta.kv_file:g} kV")
        elif meta.kv_file is None:
            meta.overrides.append(f"voltage {meta.kv:g} kV from the command line")
    else:
        meta.kv = meta.kv_file
    meta.navigation = tuple(
        NavigationAxis(str(a.get("name") or f"axis{i}"), int(a.get("size") or 0),
                       float(a.get("scale", 1.0) or 1.0), float(a.get("offset", 0.0) or 0.0),
                       str(a.get("units") or "")) for i, a in enumerate(nav_axes))
    # pixel size of the column axis; rows checked against it
    col, row = sig_axes[1], sig_axes[0]
    units = str(col.get("units") or "")
    size = float(col.get("scale", 1.0) or 1.0)
    calibrated = _normalise_units(units) not in ("", "px", "pixel", "pixels", "<undefined>")
    if calibrated and reader == "mrc" and _normalise_units(units) in _REAL_SPACE:
        # the MRC header holds a real-space cell (rosettasciio reports it in nm,
        # 1 nm per pixel when the cell is empty): no camera calibration
        meta.warnings.append(f"the MRC header gives a real-space pixel size ({abs(size):g} "
                             f"{units}), not a camera calibration; it is not used")
        calibrated = False
    if calibrated:
        meta.pixel_size, meta.pixel_units = abs(size), units
        row_size = abs(float(row.get("scale", size) or size))
        if abs(row_size - abs(size)) > 1e-6 * abs(size):
            meta.warnings.append(f"rows and columns have different pixel sizes ({row_size:g} "
                                 f"and {abs(size):g} {units}); the column size is used")
        u = _normalise_units(units)
        mrad = None
        if u in _RECIPROCAL and meta.kv is None:
            meta.warnings.append(f"the pixel size is in {units} but no voltage is known: give "
                                 "kv (--kv) to convert it to px/mrad")
        elif u in _LENGTH and meta.camera_length_mm is None:
            meta.warnings.append(f"the pixel size is a detector length ({units}) but no camera "
                                 "length is known: it is not converted to px/mrad")
        else:
            try:
                mrad = mrad_per_pixel(abs(size), units, kv=meta.kv,
                                      camera_length_mm=meta.camera_length_mm)
            except InputError as exc:
                if scale_px_per_mrad is None and strict:
                    raise
                if scale_px_per_mrad is None:
                    meta.warnings.append(f"{exc}; not used")
        if mrad is not None:
            meta.scale_file_px_per_mrad = 1.0 / mrad
            meta.taken.append(f"pixel size {abs(size):g} {units} = "
                              f"{meta.scale_file_px_per_mrad:.5g} px/mrad")
    if scale_px_per_mrad is not None:
        meta.scale_px_per_mrad = float(scale_px_per_mrad)
        note = f"camera scale {meta.scale_px_per_mrad:g} px/mrad from the command line"
        if meta.scale_file_px_per_mrad is not None:
            note += f", not the file's {meta.scale_file_px_per_mrad:.5g} px/mrad"
        meta.overrides.append(note)
    else:
        meta.scale_px_per_mrad = meta.scale_file_px_per_mrad
    return meta


@dataclass
class PatternRead:
    """One pattern read from a file: the image, its saturation level, the metadata."""

    image: np.ndarray
    saturation: float | None
    metadata: FileMetadata


def read_pattern(path, *, index=None, kv=None, scale_px_per_mrad=None, allow_large=False):
    """Read one pattern from a microscope file or an image file.

    Parameters
    ----------
    path : str or Path
    index : int or tuple of int, optional
        The pattern of a stack or scan (a flat index or one per navigation
        axis); required when the file holds more than one.
    kv, scale_px_per_mrad : float, optional
        Override the file's voltage and camera scale.
    allow_large : bool
        Accept patterns above ``MAX_SIDE_PX`` on a side.

    Returns
    -------
    PatternRead
    """
    path = Path(path)
    if path.suffix.lower() in MICROSCOPE_SUFFIXES:
        opened = open_microscope_file(path, kv=kv, scale_px_per_mrad=scale_px_per_mrad,
                                      allow_large=allow_large)
        nav = opened.navigation_index(index)
        image = opened.pattern(nav)
        if not np.all(np.isfinite(image)):
            raise InputError(f"{path}: the pattern holds non-finite values")
        opened.metadata.index = nav if nav else None
        return PatternRead(image, opened.saturation, opened.metadata)
    from ..images.io import read_image

    image, saturation = read_image(path, index=index, allow_large=allow_large)
    if path.suffix.lower() in (".tif", ".tiff"):
        meta = _tiff_metadata(path, image.shape, kv, scale_px_per_mrad)
        if meta is not None:
            meta.index = None if index is None else tuple(np.atleast_1d(index).tolist())
            return PatternRead(image, saturation, meta)
    meta = FileMetadata(str(path), "image", detector_shape=image.shape,
                        index=None if index is None else tuple(np.atleast_1d(index).tolist()))
    meta.kv = None if kv is None else float(kv)
    if kv is not None:
        meta.overrides.append(f"voltage {float(kv):g} kV from the command line")
    if scale_px_per_mrad is not None:
        meta.scale_px_per_mrad = float(scale_px_per_mrad)
        meta.overrides.append(f"camera scale {float(scale_px_per_mrad):g} px/mrad from the "
                              "command line")
    return PatternRead(image, saturation, meta)


def _tiff_metadata(path, shape, kv, scale_px_per_mrad):
    """The calibration rosettasciio's TIFF reader finds (its own tags, ImageJ or
    vendor tags), or None when it finds no pattern of ``shape`` in the file."""
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            # ImageJ descriptions and private tags (vendor and rosettasciio's own,
            # codes from 32768) are where a calibration can be; a plain TIFF has
            # none, and the reader's unit handling costs seconds on first use
            if not (tif.is_imagej or any(tag.code >= 32768 for tag in tif.pages[0].tags)):
                return None
        from rsciio.tiff import file_reader

        signals = file_reader(str(path), lazy=True)
    except Exception:  # noqa: BLE001  a plain TIFF that tifffile read is still a pattern
        return None
    signal = next((s for s in signals or [] if hasattr(s.get("data"), "shape")
                   and tuple(s["data"].shape[-2:]) == tuple(shape)), None)
    if signal is None:
        return None
    return signal_metadata(signal, source=str(path), reader="tiff", kv=kv,
                           scale_px_per_mrad=scale_px_per_mrad, strict=False)


def iter_pattern_chunks(opened):
    """Yield ``(navigation slices, block)`` one stored chunk at a time.

    ``block`` is a float64 array of shape (chunk navigation shape) + (rows,
    cols); only one chunk is in memory at a time.  A single pattern yields
    once with empty slices.
    """
    data = opened.data
    nav_ndim = data.ndim - 2
    if not nav_ndim:
        yield (), opened.pattern()
        return
    if not hasattr(data, "blocks"):
        yield tuple(slice(0, n) for n in data.shape[:-2]), np.asarray(data, dtype=np.float64)
        return
    bounds = [np.concatenate([[0], np.cumsum(c)]) for c in data.chunks[:nav_ndim]]
    for block_index in np.ndindex(*data.numblocks[:nav_ndim]):
        slices = tuple(slice(int(b[i]), int(b[i + 1])) for b, i in zip(bounds, block_index))
        block = data.blocks[block_index + (0, 0)].compute()
        yield slices, np.asarray(block, dtype=np.float64)
