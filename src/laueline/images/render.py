"""Synthetic CBED central disks with HOLZ deficit lines on their exact loci.

The disk is a plateau with a soft edge and a linear background gradient;
each line multiplies it by 1 - D exp(-d^2 / 2 s^2), with d the distance of
the pixel from the exact locus (:func:`laueline.lines.locus_distances`), s
set by the line width (FWHM, mrad) and the depth D proportional to the line
strength.  The detector blurs with a Gaussian and counts with Poisson noise
at a given dose (counts per pixel on the plateau).  The same seed gives the
same image.

With a foil thickness the disk is instead the bright-field intensity of the
Bloch-wave engine (:func:`laueline.dynamical.disk_intensity`): lines sit at
their dynamical positions with their physical depth and width, and the
zero-layer contrast of the disk is there too; the soft edge, background
gradient, blur and noise follow as before, and the truth records the
dynamical minima of every line beside its kinematic locus, and marks the
lines a detector should resolve (``RESOLVABLE_CONTRAST`` deep or more over a
chord of ``RESOLVABLE_CHORD_MRAD`` inside the disk).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from ..detector import Detector
from ..errors import InputError
from ..limits import check_inputs
from ..lines import locus_distances, predict

__all__ = ["RenderSettings", "render_pattern", "TRUTH_SCHEMA"]

TRUTH_SCHEMA = "laueline.truth/1"


@dataclass
class RenderSettings:
    """Image and detector settings of a rendered pattern.

    Attributes
    ----------
    shape : (rows, cols)
    center_px : (x, y) or None
        Pattern centre (zone-axis direction); the image centre by default.
    scale_px_per_mrad : float or None
        By default the disk radius is 0.42 of the smaller image side.
    rotation_deg, mirror : detector rotation and mirror (DESIGN.md).
    line_width_mrad : float
        Full width at half depth of a line before detector blur.
    line_depth : float
        Relative depth of a line of strength 1 (capped at 0.95).
    min_strength : float
        Weaker lines are not drawn.
    background_tilt : float
        Relative change of the plateau across the disk diameter.
    background_angle_deg : float
        Direction of that gradient in the image.
    outside_level : float
        Intensity outside the disk relative to the plateau.
    edge_width_px : float
        Softness of the disk edge (Gaussian sigma, px).
    blur_px : float
        Detector point-spread function (Gaussian sigma, px); 0 for none.
    dose : float
        Mean counts per pixel on the plateau; 0 for a noiseless float image.
    seed : int
    omit : tuple of (h, k, l)
        Reflections whose lines are not drawn (as when a line is dynamically
        extinguished); the truth lists them under ``omitted``.
    """

    shape: tuple = (512, 512)
    center_px: tuple | None = None
    scale_px_per_mrad: float | None = None
    rotation_deg: float = 0.0
    mirror: bool = False
    line_width_mrad: float = 0.06
    line_depth: float = 0.6
    min_strength: float = 0.1
    background_tilt: float = 0.2
    background_angle_deg: float = 30.0
    outside_level: float = 0.05
    edge_width_px: float = 0.8
    blur_px: float = 0.7
    dose: float = 2000.0
    seed: int = 0
    omit: tuple = ()


def render_pattern(crystal, zone, kv=200.0, disk_mrad=6.0, settings=None, *, strain=None,
                   x_axis=None, gmax=4.0, inner_potential=False, thickness_nm=None,
                   absorption_ratio=0.1, beam_set=None, workers=1):
    """Render a central disk and return (image, truth).

    Parameters
    ----------
    crystal : Crystal
        Already carrying any cell change; ``strain`` is applied on top.
    zone, kv, disk_mrad, x_axis, gmax, inner_potential :
        As for :func:`laueline.lines.predict`.
    settings : RenderSettings
    strain : six components or 3x3, optional
    thickness_nm : float, optional
        Render the Bloch-wave disk of a foil this thick instead of drawn
        lines (``line_width_mrad``, ``line_depth`` and ``omit`` then do not
        apply: width, depth and visibility follow from the physics).
    absorption_ratio : float
        With ``thickness_nm``: a in U'_g = a U_g.
    beam_set : (zolz_gmax, holz_excitation), optional
        With ``thickness_nm``: the beam-set limits (1/angstrom) of both the
        image and the truth's minima.  By default the image takes the
        smaller set of :func:`laueline.dynamical.disk_intensity` and the
        minima that of :func:`laueline.dynamical.dynamical_lines` (with its
        convergence check).  Given, both take it and the check is skipped.
    workers : int
        With ``thickness_nm``: processes the disk's cells and the truth's
        lines are spread over (the same numbers as one process, sooner).

    Returns
    -------
    image : ndarray (rows, cols), counts (float)
    truth : dict
        ``laueline.truth/1`` document: every parameter, the drawn lines with
        their loci in pixels, and the true crossing positions in pixels.
    """
    settings = settings or RenderSettings()
    check_inputs(scale_px_per_mrad=settings.scale_px_per_mrad, dose=settings.dose,
                 seed=settings.seed)
    rows, cols = (int(v) for v in settings.shape)
    if rows < 32 or cols < 32 or rows * cols > 4096 * 4096:
        raise InputError(f"image size {cols} x {rows} px is outside 32..4096")
    if settings.dose < 0 or settings.line_width_mrad <= 0 or settings.blur_px < 0:
        raise InputError("dose, line width and blur must be positive (dose and blur may be 0)")
    pattern = predict(crystal, zone, kv, disk_mrad, x_axis=x_axis, gmax=gmax,
                      min_strength=settings.min_strength, strain=strain,
                      inner_potential=inner_potential)
    center = settings.center_px
    if center is None:
        center = ((cols - 1) / 2.0, (rows - 1) / 2.0)
    scale = settings.scale_px_per_mrad or 0.42 * min(rows, cols) / disk_mrad
    det = Detector(tuple(float(v) for v in center), float(scale), float(settings.rotation_deg),
                   bool(settings.mirror))
    radius_px = disk_mrad * scale

    y, x = np.mgrid[0:rows, 0:cols].astype(float)
    r = np.hypot(x - det.center_px[0], y - det.center_px[1])
    from scipy.special import erfc

    plateau = 0.5 * erfc((r - radius_px) / (np.sqrt(2) * max(settings.edge_width_px, 1e-3)))
    angle = np.radians(settings.background_angle_deg)
    along = ((x - det.center_px[0]) * np.cos(angle) + (y - det.center_px[1]) * np.sin(angle))
    plateau *= 1.0 + settings.background_tilt * along / (2 * radius_px)
    inside = r <= radius_px + 4 * max(settings.edge_width_px, 1.0)
    t_rad = det.to_mrad(np.stack([x[inside], y[inside]], axis=1)) * 1e-3
    if thickness_nm is not None:
        return _render_dynamical(pattern, det, settings, plateau, inside, t_rad, radius_px,
                                 thickness_nm, absorption_ratio, kv, gmax, inner_potential,
                                 beam_set, workers)
    factor = np.ones(t_rad.shape[0])
    depth = np.minimum(settings.line_depth * pattern.strength, 0.95)
    sigma_mrad = settings.line_width_mrad / (2 * np.sqrt(2 * np.log(2)))
    from ..lines import line_parameters

    params = line_parameters(pattern.crystal.g_vectors(pattern.hkl), pattern.frame,
                             pattern.beam.wave_number)
    omitted = {tuple(int(v) for v in h) for h in settings.omit}
    drawn = np.array([tuple(h) not in omitted for h in pattern.hkl.tolist()], dtype=bool)
    for i in np.flatnonzero(drawn):  # one line at a time keeps memory at one image
        sub = type(params)(params.g_perp[i:i + 1], params.g_perp_norm[i:i + 1],
                           params.gz[i:i + 1], params.c[i:i + 1])
        d = locus_distances(t_rad[None], sub)[0] * 1e3  # mrad
        near = np.abs(d) < 6 * sigma_mrad
        factor[near] *= 1.0 - depth[i] * np.exp(-0.5 * (d[near] / sigma_mrad) ** 2)
    disk = plateau.copy()
    disk[inside] *= factor
    image = _detector_response(disk, settings)
    return image, _truth(pattern, det, settings, radius_px, kv, gmax, inner_potential, drawn,
                         depth, omitted)


def _detector_response(disk, settings):
    """Outside level, point-spread function and counting noise of the detector."""
    image = settings.outside_level + (1 - settings.outside_level) * disk
    if settings.blur_px > 0:
        from scipy.ndimage import gaussian_filter

        image = gaussian_filter(image, settings.blur_px, mode="nearest")
    rng = np.random.default_rng(settings.seed)
    if settings.dose > 0:
        image = rng.poisson(np.clip(image, 0, None) * settings.dose).astype(float)
    return image


def _render_dynamical(pattern, det, settings, plateau, inside, t_rad, radius_px,
                      thickness_nm, absorption_ratio, kv, gmax, inner_potential, beam_set,
                      workers):
    """The Bloch-wave bright-field disk through the same detector, with its truth."""
    from ..dynamical import disk_intensity, dynamical_lines

    limits = {}
    if beam_set is not None:
        zolz_gmax, holz_excitation = (float(v) for v in beam_set)
        limits = {"zolz_gmax": zolz_gmax, "holz_excitation": holz_excitation}
    options = dict(absorption_ratio=absorption_ratio, check_convergence=beam_set is None,
                   **limits)
    if int(workers) > 1 and pattern.n_lines > 1:
        lines = _lines_in_processes(pattern, thickness_nm, int(workers), options)
    else:
        lines = dynamical_lines(pattern, thickness_nm, **options)
    t_mrad = t_rad * 1e3
    r = np.hypot(t_mrad[:, 0], t_mrad[:, 1])
    # the soft edge reaches a few pixels beyond the rim: those take the rim's intensity
    t_mrad = t_mrad * np.minimum(1.0, pattern.disk_mrad / np.maximum(r, 1e-12))[:, None]
    intensity, n_beams = disk_intensity(pattern, t_mrad, thickness_nm,
                                        absorption_ratio=absorption_ratio, workers=workers,
                                        **limits)
    disk = plateau.copy()
    disk[inside] *= intensity / np.median(intensity[r <= pattern.disk_mrad])
    image = _detector_response(disk, settings)
    drawn = np.ones(pattern.n_lines, dtype=bool)
    truth = _truth(pattern, det, settings, radius_px, kv, gmax, inner_potential, drawn,
                   lines.contrast, set())
    from ..dynamical import IMAGE_HOLZ_EXCITATION, IMAGE_ZOLZ_GMAX

    truth["dynamical"] = dict(
        lines.summary(), n_beams_image=n_beams,
        image_zero_layer_gmax_inv_A=limits.get("zolz_gmax", IMAGE_ZOLZ_GMAX),
        image_holz_excitation_inv_A=limits.get("holz_excitation", IMAGE_HOLZ_EXCITATION),
        image="bright-field intensity of the Bloch-wave engine")
    for entry, i in zip(truth["lines"], range(pattern.n_lines)):
        found = np.isfinite(lines.shift_mrad[i])
        minima = lines.minima_mrad[i][found]
        entry["dynamical"] = {
            "minima_mrad": minima.tolist(),
            "minima_px": det.to_pixels(minima).tolist() if len(minima) else [],
            "shift_mrad": lines.shift_mrad[i][found].tolist(),
            "contrast": float(lines.contrast[i]), "width_mrad": float(lines.width_mrad[i]),
            "resolvable": _resolvable(pattern.points_mrad[i], lines.contrast[i],
                                      pattern.disk_mrad, len(minima))}
    truth["dynamical"]["resolvable"] = (
        f"contrast of {RESOLVABLE_CONTRAST:g} or more, a chord of {RESOLVABLE_CHORD_MRAD:g} "
        "mrad or more inside the disk and at least 3 minima")
    for key in ("line_width_mrad", "line_depth"):
        truth["settings"].pop(key, None)
    return image, truth


_LINES_STATE = {}


def _lines_start(pattern, thickness_nm, options):
    _LINES_STATE["args"] = (pattern, thickness_nm, options)


def _lines_part(indices):
    from ..dynamical import dynamical_lines

    pattern, thickness_nm, options = _LINES_STATE["args"]
    return dynamical_lines(pattern, thickness_nm, lines=indices, **options)


def _lines_in_processes(pattern, thickness_nm, workers, options):
    """dynamical_lines of every line, the lines shared among ``workers`` processes."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor
    from dataclasses import replace

    parts = [list(range(k, pattern.n_lines, workers)) for k in range(workers)]
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else None
    with ProcessPoolExecutor(max_workers=workers,
                             mp_context=multiprocessing.get_context(method),
                             initializer=_lines_start,
                             initargs=(pattern, thickness_nm, options)) as pool:
        results = list(pool.map(_lines_part, [p for p in parts if p]))
    merged = results[0]
    per_line = ("minima_mrad", "shift_mrad", "locus_mrad", "normal_points", "contrast_points",
                "width_points_mrad")
    fields = {name: list(getattr(merged, name)) for name in per_line}
    contrast, width = merged.contrast.copy(), merged.width_mrad.copy()
    for indices, part in zip([p for p in parts if p], results):
        for i in indices:
            for name in per_line:
                fields[name][i] = getattr(part, name)[i]
            contrast[i], width[i] = part.contrast[i], part.width_mrad[i]
    checks = [r.convergence_mrad for r in results if r.convergence_mrad is not None]
    return replace(merged, **fields, contrast=contrast, width_mrad=width,
                   n_beams=max(r.n_beams for r in results),
                   convergence_mrad=max(checks) if checks else None,
                   warnings=[w for r in results for w in r.warnings])


#: A dynamical line a detector should find (recorded in the truth): this
#: much depth relative to the local disk (weak lines are found down to about
#: 2 % at realistic dose) over a chord this long inside the disk.
RESOLVABLE_CONTRAST = 0.03
RESOLVABLE_CHORD_MRAD = 1.5


def _resolvable(points_mrad, contrast, disk_mrad, n_minima):
    points = np.asarray(points_mrad, dtype=float).reshape(-1, 2)
    points = points[np.hypot(points[:, 0], points[:, 1]) <= disk_mrad]
    chord = np.linalg.norm(points[-1] - points[0]) if len(points) > 1 else 0.0
    return bool(np.isfinite(contrast) and contrast >= RESOLVABLE_CONTRAST
                and chord >= RESOLVABLE_CHORD_MRAD and n_minima >= 3)


def _truth(pattern, det, settings, radius_px, kv, gmax, inner_potential, drawn, depth, omitted):
    ha, hb = pattern.crossing_hkl()
    truth = {
        "schema": TRUTH_SCHEMA,
        "structure": pattern.crystal.summary(),
        "zone": list(pattern.zone), "x_axis": list(pattern.x_axis),
        "kv": float(kv), "disk_mrad": float(pattern.disk_mrad), "gmax_inv_A": float(gmax),
        "inner_potential": bool(inner_potential),
        "wave_number_inv_A": pattern.beam.wave_number,
        "strain": None if pattern.strain is None else pattern.strain.tolist(),
        "basis": pattern.crystal.basis.tolist(),
        "detector": det.as_dict(),
        "disk_radius_px": radius_px,
        "settings": {k: (list(v) if isinstance(v, tuple) else v)
                     for k, v in asdict(settings).items() if k != "omit"},
        "lines": [{"hkl": pattern.hkl[i].tolist(), "laue_zone": int(pattern.laue_zone[i]),
                   "strength": float(pattern.strength[i]), "depth": float(depth[i]),
                   "points_px": det.to_pixels(pattern.points_mrad[i]).tolist()}
                  for i in np.flatnonzero(drawn)],
        "omitted": [list(h) for h in sorted(omitted)],
        "crossings": [{"hkl_a": ha[k].tolist(), "hkl_b": hb[k].tolist(),
                       "xy_px": det.to_pixels(pattern.crossing_mrad[k]).tolist(),
                       "angle_deg": float(pattern.crossing_angle_deg[k])}
                      for k in range(pattern.n_crossings)
                      if drawn[pattern.crossing_lines[k]].all()],
    }
    return truth
