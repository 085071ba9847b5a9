"""Figures (matplotlib, imported only when a figure is asked for).

Figures are built on :class:`matplotlib.figure.Figure` directly, so no
pyplot state or interactive backend is involved; notebooks display the
returned figure, the command line saves it by suffix (PNG, SVG or PDF).
"""

from __future__ import annotations

import numpy as np


__all__ = ["pattern_figure", "fit_figure", "thickness_figure", "survey_figure",
           "detection_figure", "save_figure", "draw_disk_lines", "hkl_label"]

_DISK_FILL = "#f4f1ea"
_DISK_EDGE = "#5b5b5b"
_LINE = "#1f2d4a"
_CROSSING = "#c0532f"
_RING = "#7a4f9a"
_ZOLZ_FILL = "#dbe6ea"


def hkl_label(hkl):
    """Miller indices in mathtext with bars over negative indices."""
    values = [int(v) for v in hkl]
    parts = [rf"\bar{{{-v}}}" if v < 0 else str(v) for v in values]
    sep = r"\," if any(abs(v) >= 10 for v in values) else ""
    return "$" + sep.join(parts) + "$"


def _new_figure(width, height):
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained")


def save_figure(fig, path):
    """Save a figure; the format follows the file suffix."""
    fig.savefig(path, dpi=150)


def _halo():
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=2.2, foreground="white")]


def draw_disk_lines(ax, pattern, *, n_labels=10, show_crossings=True, to_plot=None,
                    fill=True):
    """Draw the central disk with the exact loci on ``ax``.

    Parameters
    ----------
    to_plot : callable, optional
        Maps (m, 2) mrad points to plot coordinates (for example pixels);
        identity by default.
    """
    from matplotlib.patches import Polygon

    convert = to_plot or (lambda xy: xy)
    angle = np.linspace(0, 2 * np.pi, 361)
    rim = pattern.disk_mrad * np.stack([np.cos(angle), np.sin(angle)], axis=1)
    ax.add_patch(Polygon(convert(rim), closed=True, facecolor=_DISK_FILL if fill else "none",
                         edgecolor=_DISK_EDGE, linewidth=1.0, zorder=0 if fill else 3))
    order = np.argsort(pattern.strength)  # weak first, strong drawn on top
    for i in order:
        s = float(min(pattern.strength[i], 1.0))
        xy = convert(pattern.points_mrad[i])
        ax.plot(xy[:, 0], xy[:, 1], color=_LINE, linewidth=0.4 + 1.8 * s,
                alpha=0.25 + 0.75 * s, solid_capstyle="butt", zorder=2)
    halo = _halo()
    for i in np.argsort(-pattern.strength, kind="stable")[:n_labels]:
        xy = convert(pattern.points_mrad[i])
        end = xy[-6]
        ax.text(end[0], end[1], hkl_label(pattern.hkl[i]), fontsize=7, color=_LINE,
                ha="center", va="center", path_effects=halo, zorder=4)
    if show_crossings and pattern.n_crossings:
        xy = convert(pattern.crossing_mrad)
        ax.plot(xy[:, 0], xy[:, 1], linestyle="none", marker="o", markersize=2.6,
                markerfacecolor="none", markeredgecolor=_CROSSING, markeredgewidth=0.7,
                zorder=3)


def pattern_figure(pattern, *, n_labels=10, show_crossings=False, disk_image=None):
    """Two panels: the central disk with labelled loci, and the whole-pattern overview.

    Parameters
    ----------
    pattern : laueline.lines.Pattern
    n_labels : int
        Number of strongest lines labelled with their indices.
    show_crossings : bool
        Mark the crossings.
    disk_image : (ndarray, float), optional
        A simulated disk intensity on a square grid (rows along t_y upward)
        and the half-width of that grid in mrad, drawn beneath the lines.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.patches import Circle

    fig = _new_figure(10.5, 5.2)
    ax_disk, ax_all = fig.subplots(1, 2, width_ratios=[1.15, 1])
    draw_disk_lines(ax_disk, pattern, n_labels=n_labels, show_crossings=show_crossings)
    if disk_image is not None:
        image, half = disk_image
        shown = ax_disk.imshow(image, origin="lower", extent=(-half, half, -half, half),
                               cmap="gray", zorder=1, interpolation="bilinear")
        shown.set_clip_path(Circle((0, 0), pattern.disk_mrad, transform=ax_disk.transData))
    r = pattern.disk_mrad * 1.06
    ax_disk.set_xlim(-r, r)
    ax_disk.set_ylim(-r, r)
    ax_disk.set_aspect("equal")
    ax_disk.set_xlabel(f"t$_x$ (mrad), along ({hkl_label(pattern.x_axis)})")
    ax_disk.set_ylabel("t$_y$ (mrad)")
    cr = pattern.crystal
    ax_disk.set_title(f"{cr.name} [{hkl_label(pattern.zone)}], {pattern.beam.kv:g} kV: "
                      f"{pattern.n_lines} lines, {pattern.n_crossings} crossings",
                      fontsize=10)

    extent = max([pattern.disk_mrad * 4] + list(pattern.ring_radius_mrad * 1.08))
    ax_all.add_patch(Circle((0, 0), pattern.disk_mrad, facecolor=_DISK_FILL,
                            edgecolor=_DISK_EDGE, linewidth=1.0, zorder=2))
    for centre in pattern.zero_layer_mrad:
        if np.hypot(*centre) < extent:
            ax_all.add_patch(Circle(tuple(centre), pattern.disk_mrad, facecolor=_ZOLZ_FILL,
                                    edgecolor="#8aa1ab", linewidth=0.5, zorder=1))
    halo = _halo()
    for n, radius in zip(pattern.ring_layers, pattern.ring_radius_mrad):
        ax_all.add_patch(Circle((0, 0), radius, fill=False, edgecolor=_RING,
                                linestyle=(0, (4, 3)), linewidth=1.0, zorder=3))
        ax_all.text(radius * 0.707, radius * 0.707, f"n={n}", color=_RING, fontsize=7,
                    path_effects=halo, zorder=4)
    ax_all.set_xlim(-extent, extent)
    ax_all.set_ylim(-extent, extent)
    ax_all.set_aspect("equal")
    ax_all.set_xlabel("mrad")
    ax_all.set_title(f"zero-layer disks (radius {pattern.disk_mrad:g} mrad) and HOLZ rings",
                     fontsize=10)
    return fig


def _nice_factor(raw):
    """Largest of 1, 2, 5 x 10^k not above ``raw`` (at least 1)."""
    if not np.isfinite(raw) or raw <= 1:
        return 1.0
    k = np.floor(np.log10(raw))
    for m in (5, 2, 1):
        if m * 10 ** k <= raw:
            return float(m * 10 ** k)
    return float(10 ** k)


def fit_figure(result, crystal, *, image=None, magnify=None):
    """Measured points over the fitted loci, with magnified residual vectors.

    Parameters
    ----------
    result : laueline.refine.FitResult
    crystal : Crystal
        The reference crystal the fit was made with.
    image : ndarray, optional
        The pattern, drawn underneath in pixel coordinates (row = y down).
    magnify : float, optional
        Residual magnification; by default a 1-2-5 value drawing the rms
        residual at about 8 % of the disk radius.
    """
    from .refine import fitted_pattern

    pattern = fitted_pattern(result, crystal)
    det = result.detector
    fig = _new_figure(7.2, 7.0)
    ax = fig.subplots()
    if image is not None:
        ax.imshow(image, cmap="gray", origin="upper", interpolation="nearest")
    draw_disk_lines(ax, pattern, n_labels=8, show_crossings=False, to_plot=det.to_pixels,
                    fill=image is None)
    radius_px = result.disk_mrad * det.scale_px_per_mrad
    if magnify is None:
        rms = result.rms_px if np.isfinite(result.rms_px) and result.rms_px > 0 else 1.0
        magnify = _nice_factor(0.08 * radius_px / rms)
    if result.lines is not None:
        # image fit: residuals of the points on each detected line, along its normal
        pts, vec, left = [], [], []
        for ln in result.lines:
            if "points_px" not in ln:
                continue
            a = np.radians(ln["normal_angle_deg"])
            n = np.array([np.cos(a), np.sin(a)])
            for p, r in zip(ln["points_px"], ln["point_residuals_px"]):
                (pts if ln["used"] else left).append(p)
                if ln["used"]:
                    vec.append(-r * n)
        xy, res = np.array(pts).reshape(-1, 2), np.array(vec).reshape(-1, 2)
        fitted, ok = xy, np.all(np.isfinite(res), axis=1)
        used = np.ones(len(xy), bool)
        label = "detected line points"
        left = np.array(left).reshape(-1, 2)
    else:
        xy = np.array([[p["x_px"], p["y_px"]] for p in result.points])
        res = np.array([p["residual_px"] for p in result.points], dtype=float)
        used = np.array([p["used"] for p in result.points])
        ok = used & np.all(np.isfinite(res), axis=1)
        fitted = xy - res
        label = "measured, used"
        left = xy[~used]
    ax.quiver(fitted[ok, 0], fitted[ok, 1], magnify * res[ok, 0], magnify * res[ok, 1],
              angles="xy", scale_units="xy", scale=1, color=_CROSSING, width=0.004,
              zorder=5)
    ax.plot(xy[used, 0], xy[used, 1], linestyle="none", marker="o", markersize=3.5,
            markerfacecolor="#2a9d8f", markeredgecolor="white", markeredgewidth=0.4,
            zorder=6, label=label)
    if len(left):
        ax.plot(left[:, 0], left[:, 1], linestyle="none", marker="x", markersize=5,
                color="#6c6c6c", zorder=6, label="left out")
    c = np.asarray(det.center_px)
    pad = 1.08 * radius_px
    ax.set_xlim(c[0] - pad, c[0] + pad)
    ax.set_ylim(c[1] + pad, c[1] - pad)  # rows grow downward
    ax.set_aspect("equal")
    ax.set_xlabel("x (px)")
    ax.set_ylabel("y (px, down)")
    zone = "".join(str(v) for v in result.zone) if all(0 <= v < 10 for v in result.zone) \
        else " ".join(str(v) for v in result.zone)
    what = "points" if result.lines is None else "lines"
    ax.set_title(f"{result.structure['name']} [{zone}], model {result.model}: "
                 f"{result.n_used} {what}, rms {result.rms_px:.3g} px\n"
                 f"residuals drawn {magnify:g} x", fontsize=10)
    ax.legend(loc="lower right", fontsize=8, framealpha=0.9)
    return fig


def thickness_figure(result):
    """The (s/n)^2 against 1/n^2 line with its points and, for a profile, the profile."""
    det = result.profile
    fig = _new_figure(10.5 if det is not None else 5.6, 4.6)
    axes = fig.subplots(1, 2 if det is not None else 1)
    ax = axes[0] if det is not None else axes
    xs = np.linspace(0, max(result.line_x) * 1.1, 50)
    ax.plot(xs, result.intercept + result.slope * xs, color=_LINE, linewidth=1.2,
            label=f"t = {result.thickness_nm:.1f} nm, xi = {result.extinction_distance_nm:.1f} nm")
    if result.deviations_sigma_inv_nm is not None:
        n = result.fringe_indices
        yerr = 2 * result.deviations_inv_nm * result.deviations_sigma_inv_nm / n ** 2
        ax.errorbar(result.line_x, result.line_y, yerr=yerr, fmt="o", color=_CROSSING,
                    markersize=4, capsize=2)
    else:
        ax.plot(result.line_x, result.line_y, "o", color=_CROSSING, markersize=4)
    for xv, yv, n in zip(result.line_x, result.line_y, result.fringe_indices):
        ax.annotate(f"n={n}", (xv, yv), textcoords="offset points", xytext=(4, 4), fontsize=7)
    ax.set_xlabel("1 / n$^2$")
    ax.set_ylabel("(s / n)$^2$  (nm$^{-2}$)")
    ax.set_xlim(left=0)
    ax.set_title(f"first fringe index {result.first_fringe_index}", fontsize=10)
    ax.legend(fontsize=8)
    if det is not None:
        ap = axes[1]
        ap.plot(det.position, det.intensity, color="#555555", linewidth=0.7)
        for (lo, hi), c in zip(det.disk_edges, det.disk_centres):
            ap.axvspan(lo, hi, color=_ZOLZ_FILL, alpha=0.6, zorder=0)
            ap.axvline(c, color=_RING, linestyle=(0, (4, 3)), linewidth=0.8)
        ap.axvline(det.bragg_position, color=_LINE, linewidth=1.0)
        mins = det.minima
        ap.plot(mins, np.interp(mins, det.position, det.intensity), "v", color=_CROSSING,
                markersize=5)
        ap.set_xlabel("position along g")
        ap.set_ylabel("intensity")
        ap.set_title("profile: disks, Bragg line and dark fringes", fontsize=10)
    return fig


def _stereo(v):
    v = np.asarray(v, dtype=float)
    v = v / np.linalg.norm(v, axis=-1, keepdims=True)
    return v[..., :2] / (1.0 + v[..., 2:3])


def survey_figure(result, crystal, n_labels=8):
    """Stereographic map of the candidate axes coloured by predicted precision.

    Cubic crystals without a tilt cone are shown in the standard triangle
    [001]-[101]-[111]; other crystals on the upper hemisphere (z along c*);
    a survey around ``near`` in tilt angles about that axis.
    """
    from matplotlib import colormaps
    from matplotlib.colors import LogNorm

    fig = _new_figure(6.6, 5.6)
    ax = fig.subplots()
    axes = [a for a in result.axes if np.isfinite(a.score)]
    zones = np.array([a.zone for a in axes], dtype=float)
    scores = np.array([a.score for a in axes])
    if result.near is not None:
        ref = crystal.basis @ np.asarray(result.near)
        e3 = ref / np.linalg.norm(ref)
        e1 = np.cross(e3, [0, 0, 1.0]) if abs(e3[2]) < 0.9 else np.cross(e3, [1.0, 0, 0])
        e1 /= np.linalg.norm(e1)
        e2 = np.cross(e3, e1)
        d = zones @ crystal.basis.T
        xy = np.degrees(np.stack([np.arctan2(d @ e1, d @ e3), np.arctan2(d @ e2, d @ e3)], 1))
        t = np.linspace(0, 2 * np.pi, 200)
        ax.plot(result.max_tilt_deg * np.cos(t), result.max_tilt_deg * np.sin(t),
                color=_DISK_EDGE, linewidth=0.8)
        ax.set_xlabel("tilt x (deg)")
        ax.set_ylabel("tilt y (deg)")
        title = f"axes within {result.max_tilt_deg:g} deg of [{' '.join(f'{v:g}' for v in result.near)}]"
    elif result.cubic:
        s = -np.sort(-np.abs(zones), axis=1)
        xy = _stereo(np.stack([s[:, 1], s[:, 2], s[:, 0]], axis=1))
        u = np.linspace(0, 1, 100)
        edge = np.concatenate([_stereo(np.stack([u, 0 * u, 1 + 0 * u], 1)),
                               _stereo(np.stack([1 + 0 * u, u, 1 + 0 * u], 1)),
                               _stereo(np.stack([1 - u, 1 - u, 1 + 0 * u], 1))])
        ax.plot(edge[:, 0], edge[:, 1], color=_DISK_EDGE, linewidth=0.8)
        for label, v in [("001", (0, 0, 1)), ("101", (1, 0, 1)), ("111", (1, 1, 1))]:
            p = _stereo(np.array(v, float))
            ax.annotate(f"[{label}]", p, textcoords="offset points", xytext=(-8, -12),
                        fontsize=8, color=_DISK_EDGE)
        ax.set_axis_off()
        title = "standard triangle"
    else:
        d = zones @ crystal.basis.T
        d[d[:, 2] < 0] *= -1  # Friedel: the opposite axis is equivalent
        xy = _stereo(d)
        t = np.linspace(0, 2 * np.pi, 200)
        ax.plot(np.cos(t), np.sin(t), color=_DISK_EDGE, linewidth=0.8)
        ax.set_axis_off()
        title = "upper hemisphere, z along c*"
    cmap = colormaps["plasma"]
    norm = LogNorm(vmin=scores.min(), vmax=max(scores.max(), scores.min() * 1.01))
    sc = ax.scatter(xy[:, 0], xy[:, 1], c=scores, cmap=cmap, norm=norm, s=30,
                    edgecolors="none", zorder=3)
    overlap = np.array([a.overlap for a in axes])
    if np.any(overlap):
        ax.scatter(xy[overlap, 0], xy[overlap, 1], s=80, facecolors="none",
                   edgecolors=_DISK_EDGE, linewidths=0.6, zorder=2,
                   label="zero-layer disks overlap")
        ax.legend(loc="upper left", fontsize=7, frameon=False)
    halo = _halo()
    for a, p in list(zip(axes, xy))[:n_labels]:
        ax.annotate("[" + " ".join(str(v) for v in a.zone) + "]", p,
                    textcoords="offset points", xytext=(5, 4), fontsize=7, color=_LINE,
                    path_effects=halo, zorder=4)
    ax.set_aspect("equal")
    cb = fig.colorbar(sc, ax=ax, shrink=0.8)
    cb.set_label(f"predicted 1-sigma of {result.ranked_by}")
    ax.set_title(f"{result.structure['name']}, {result.kv:g} kV, {result.disk_mrad:g} mrad: "
                 f"{title}", fontsize=10)
    return fig


def detection_figure(det, image):
    """The pattern with the detected disk, lines (flagged ones dashed) and crossings."""
    from matplotlib.patches import Circle

    fig = _new_figure(7.0, 7.0)
    ax = fig.subplots()
    ax.imshow(image, cmap="gray", origin="upper", interpolation="nearest")
    d = det.disk
    ax.add_patch(Circle(d.center_px, d.radius_px, fill=False, edgecolor="#e9c46a",
                        linewidth=0.8, linestyle=(0, (3, 2))))
    for i, ln in enumerate(det.lines):
        pts = ln.points_px
        style = (0, (4, 3)) if ln.flag else "-"
        colour = "#9b9b9b" if ln.flag else "#2a9d8f"
        ax.plot(pts[:, 0], pts[:, 1], color=colour, linewidth=0.9, linestyle=style, alpha=0.9)
        mid = pts[len(pts) // 2]
        ax.text(mid[0], mid[1], str(i), fontsize=6, color="#f4f1ea", ha="center",
                va="center", zorder=5)
    if len(det.crossing_px):
        ax.plot(det.crossing_px[:, 0], det.crossing_px[:, 1], linestyle="none", marker="o",
                markersize=2.2, markerfacecolor="none", markeredgecolor=_CROSSING,
                markeredgewidth=0.6)
    ax.set_xlim(-0.5, image.shape[1] - 0.5)
    ax.set_ylim(image.shape[0] - 0.5, -0.5)
    ax.set_title(f"{len(det.good_lines)} lines, {len(det.crossing_px)} crossings"
                 + (f", {len(det.lines) - len(det.good_lines)} flagged" if
                    len(det.lines) != len(det.good_lines) else ""), fontsize=10)
    ax.set_xlabel("x (px)")
    ax.set_ylabel("y (px, down)")
    return fig
