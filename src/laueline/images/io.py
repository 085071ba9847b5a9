"""Reading and writing 2-D pattern images (TIFF, PNG, NumPy .npy).

Images are returned as float64 arrays indexed ``[row, col]``; pixel (x, y)
is ``img[y, x]`` (see :mod:`laueline.images`).  TIFF is read and written with
tifffile (8-, 16-, 32-bit integer and 32-, 64-bit float), PNG with imageio.
Microscope files (.dm3, .dm4, .emd, .mrc, .mib, .blo, .hspy, .zspy) are read
through rosettasciio by :mod:`laueline.io.microscope`, which also returns
their calibration; :func:`read_image` hands them over to it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["read_image", "write_image", "IMAGE_SUFFIXES"]

IMAGE_SUFFIXES = (".tif", ".tiff", ".png", ".npy")


def read_image(path, index=None, allow_large=False):
    """Read a 2-D pattern.

    Parameters
    ----------
    path : str or Path
    index : int or tuple of int, optional
        The pattern of a stack (a 3-D TIFF or .npy, or a microscope file
        holding several patterns): a flat index or one per leading axis.
    allow_large : bool
        Accept images above :data:`laueline.io.microscope.MAX_SIDE_PX` on
        a side.

    Returns
    -------
    image : ndarray of float64, shape (rows, cols)
    saturation : float or None
        The largest value the file's integer type can hold (for finding
        saturated pixels), None for float data.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"cannot read {path}: no such file")
    from ..io.microscope import MAX_SIDE_PX, MICROSCOPE_SUFFIXES, read_pattern

    suffix = path.suffix.lower()
    if suffix in MICROSCOPE_SUFFIXES:
        read = read_pattern(path, index=index, allow_large=allow_large)
        return read.image, read.saturation
    if suffix not in IMAGE_SUFFIXES:
        raise InputError(f"{path}: unsupported image type '{suffix}'; use "
                         f"{', '.join(IMAGE_SUFFIXES + tuple(MICROSCOPE_SUFFIXES))}")
    try:
        if suffix in (".tif", ".tiff"):
            import tifffile

            data = tifffile.imread(path)
        elif suffix == ".png":
            import imageio.v3 as iio

            data = iio.imread(path, plugin="pillow")
        else:
            data = np.load(path, allow_pickle=False)
    except Exception as exc:  # any decoder failure is a bad file, reported in one line
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: not a readable image ({first})") from None
    data = np.asarray(data)
    if data.ndim == 3 and data.shape[-1] in (3, 4) and suffix == ".png":
        rgb = data[..., :3]
        if np.all(rgb == rgb[..., :1]):
            data = rgb[..., 0]
    if index is not None and data.ndim > 2:
        data = _pick(path, data, index)
    if data.ndim != 2:
        raise InputError(f"{path}: a pattern must be a 2-D image; this file holds an array "
                         f"of shape {data.shape}")
    if data.size == 0 or min(data.shape) < 16:
        raise InputError(f"{path}: the image is empty or too small ({data.shape})")
    if max(data.shape) > MAX_SIDE_PX and not allow_large:
        raise InputError(f"{path}: the image is {data.shape[1]} x {data.shape[0]} px, above the "
                         f"{MAX_SIDE_PX} x {MAX_SIDE_PX} limit; allow_large "
                         "(--allow-large-image) reads it")
    if not (np.issubdtype(data.dtype, np.integer) or np.issubdtype(data.dtype, np.floating)):
        raise InputError(f"{path}: unsupported pixel type {data.dtype}")
    saturation = float(np.iinfo(data.dtype).max) if np.issubdtype(data.dtype, np.integer) \
        else None
    image = data.astype(np.float64)
    if not np.all(np.isfinite(image)):
        raise InputError(f"{path}: the image holds non-finite values")
    return image, saturation


def _pick(path, data, index):
    """One image of a stack: ``index`` flat or one per leading axis."""
    lead = data.shape[:-2]
    idx = [int(v) for v in np.atleast_1d(index)]
    total = int(np.prod(lead))
    if len(idx) == 1 and len(lead) > 1:
        if not 0 <= idx[0] < total:
            raise InputError(f"{path}: index {idx[0]} is outside the {total} images")
        idx = [int(v) for v in np.unravel_index(idx[0], lead)]
    if len(idx) != len(lead) or any(not 0 <= i < n for i, n in zip(idx, lead)):
        raise InputError(f"{path}: index {idx} does not fit the stack shape "
                         f"{' x '.join(map(str, lead))}")
    return data[tuple(idx)]


def write_image(path, image, force=False):
    """Write a pattern: 16-bit TIFF when the counts fit, else 32-bit float; .npy as float64.

    PNG is written as 8-bit after scaling to the full range (for viewing only).
    """
    from ..report import check_outputs

    path = Path(path)
    check_outputs([path], force)
    suffix = path.suffix.lower()
    image = np.asarray(image, dtype=float)
    if suffix in (".tif", ".tiff"):
        import tifffile

        integral = np.all(image == np.round(image)) and image.min() >= 0 and image.max() < 65536
        tifffile.imwrite(path, image.astype(np.uint16 if integral else np.float32))
    elif suffix == ".npy":
        np.save(path, image)
    elif suffix == ".png":
        import imageio.v3 as iio

        lo, hi = float(image.min()), float(image.max())
        scaled = np.zeros_like(image) if hi <= lo else (image - lo) / (hi - lo)
        iio.imwrite(path, np.round(scaled * 255).astype(np.uint8))
    else:
        raise InputError(f"{path}: unsupported image type '{suffix}'; use "
                         f"{', '.join(IMAGE_SUFFIXES)}")
