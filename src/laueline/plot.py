"""Figures (matplotlib, imported only when a figure is asked for).

Figures are built on :class:`matplotlib.figure.Figure` directly, so no
pyplot state or interactive backend is involved; notebooks display the
returned figure, the command line saves it by suffix (PNG, SVG or PDF).

The look of laueline
--------------------
Warm paper, slate ink.  Measured things are petrol blue, model things amber
(thin and half transparent, so the data stay visible underneath), residuals
raspberry, Laue-zone rings plum.  Headings are set in a serif and aligned
left, with the key numbers in a grey second line; frames keep only the left
and bottom spines.  Every encoded quantity has a key: line width for the
relative strength, an arrow for the residual magnification.
:func:`style_figure` applies the frame, text and heading rules to any
figure and :func:`save_figure` calls it, so every command's figure shares
the look.
"""

from __future__ import annotations

import numpy as np


__all__ = ["pattern_figure", "fit_figure", "thickness_figure", "thickness_fit_figure",
           "relaxation_figure", "survey_figure", "robust_log_limits", "survey_map_coordinates",
           "detection_figure", "map_figure", "save_figure", "style_figure", "draw_disk_lines",
           "hkl_label", "PALETTE"]

PALETTE = {
    "paper": "#fbf9f4",      # figure background
    "ink": "#22303c",        # text, predicted loci
    "soft": "#6f7a84",       # frames, secondary text
    "disk": "#eaf0ee",       # central disk fill
    "zero_layer": "#d7e1e6",  # zero-layer disks of the overview
    "measured": "#11708a",   # data: points, detected lines
    "model": "#e3891b",      # fitted loci and other model curves
    "residual": "#c0295f",   # residual arrows
    "ring": "#7d5aa6",       # HOLZ rings
    "muted": "#a3a9ae",      # flagged or left-out data
}

# names the thickness and survey figures use
_DISK_FILL = PALETTE["disk"]
_DISK_EDGE = PALETTE["soft"]
_LINE = PALETTE["ink"]
_CROSSING = PALETTE["residual"]
_RING = PALETTE["ring"]
_ZOLZ_FILL = PALETTE["zero_layer"]

_HEADING_FONT = "DejaVu Serif"   # ships with matplotlib, so every installation has it
_TEXT_FONT = "DejaVu Sans"


def hkl_label(hkl, brackets=""):
    """Miller indices in mathtext, bars over negative indices, thin spaces between.

    ``brackets`` is ``""``, ``"()"`` or ``"[]"``: ``hkl_label((2, -3, 0), "[]")``
    draws [2 3̄ 0].
    """
    values = [int(v) for v in hkl]
    parts = [rf"\bar{{{-v}}}" if v < 0 else str(v) for v in values]
    body = r"\,".join(parts)
    if brackets:
        body = brackets[0] + body + brackets[1]
    return "$" + body + "$"


def _new_figure(width, height):
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained",
                  facecolor=PALETTE["paper"])


def style_figure(fig):
    """Apply laueline's frame, text and heading rules to every panel of ``fig``.

    Left and bottom spines only (all four around images), slate text, serif
    headings aligned left.  Safe to call more than once; returns ``fig``.
    """
    from matplotlib.text import Text

    fig.set_facecolor(PALETTE["paper"])
    for ax in fig.axes:
        is_image = bool(ax.images)
        if ax.get_label() == "<colorbar>":
            ax.tick_params(which="both", colors=PALETTE["soft"], labelcolor=PALETTE["ink"],
                           labelsize=8)
            for label in (ax.xaxis.label, ax.yaxis.label):
                label.set_fontsize(9)
                label.set_color(PALETTE["ink"])
            continue
        ax.set_facecolor(PALETTE["paper"] if not is_image else "white")
        for side, spine in ax.spines.items():
            spine.set_color(PALETTE["soft"])
            spine.set_linewidth(0.7)
            spine.set_visible(is_image or side in ("left", "bottom"))
        ax.tick_params(which="both", colors=PALETTE["soft"], labelcolor=PALETTE["ink"],
                       labelsize=8, direction="out", width=0.7)
        for label in (ax.xaxis.label, ax.yaxis.label):
            label.set_color(PALETTE["ink"])
            label.set_fontsize(9)
        centre = ax.title.get_text()
        if centre:  # headings go to the left, in the heading face
            ax.set_title(centre, loc="left")
            ax.set_title("", loc="center")
        ax._left_title.set_fontfamily(_HEADING_FONT)
        ax._left_title.set_fontsize(10)
        ax._left_title.set_color(PALETTE["ink"])
    for text in fig.findobj(Text):
        if text.get_fontfamily() != [_HEADING_FONT]:
            text.set_fontfamily(_TEXT_FONT)
    return fig


def save_figure(fig, path, force=False):
    """Save a figure in laueline's style, atomically; the format follows the file suffix.

    See :func:`laueline.io.outputs.save_figure`.
    """
    from .io.outputs import save_figure as write

    write(style_figure(fig), path, force=force)


def _halo(width=2.4):
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=width, foreground="white")]


def _heading(ax, title, subtitle=None):
    """A serif heading on the left, with grey lines of key numbers below (``\\n`` splits)."""
    n_lines = subtitle.count("\n") + 1 if subtitle else 0
    ax.set_title(title, loc="left", fontsize=10, fontfamily=_HEADING_FONT,
                 color=PALETTE["ink"], pad=6 + 10 * n_lines)
    if subtitle:
        ax.annotate(subtitle, xy=(0, 1), xycoords="axes fraction", xytext=(0, 4),
                    textcoords="offset points", ha="left", va="bottom", fontsize=8,
                    color=PALETTE["soft"], annotation_clip=False)


def _line_width(strength):
    """Line width in points for a relative strength (the key shows the mapping)."""
    return 0.45 + 2.0 * np.clip(strength, 0.0, 1.0)


def _strength_key(ax, loc="lower left", title="relative strength"):
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color=PALETTE["ink"], linewidth=_line_width(s),
                      alpha=0.35 + 0.65 * s, label=f"{s:g}") for s in (1.0, 0.5, 0.1)]
    return ax.legend(handles=handles, title=title, loc=loc, fontsize=7, title_fontsize=7,
                     framealpha=0.92, edgecolor=PALETTE["muted"], handlelength=2.2)


def _label_positions(polylines, *, separation):
    """A point on each polyline for its label, as far as possible from earlier labels.

    Candidates run from 15 % to 85 % of each polyline; the first label goes
    at 30 %, each later one where it is farthest from those already placed.
    Returns (positions (n, 2), indices into each polyline).
    """
    placed, where = [], []
    for xy in polylines:
        n = len(xy)
        cand = np.arange(int(0.15 * (n - 1)), int(0.85 * (n - 1)) + 1)
        if not placed:
            k = cand[int(0.2 * len(cand))]
        else:
            d = np.min(np.linalg.norm(xy[cand, None, :] - np.array(placed)[None], axis=2),
                       axis=1)
            k = cand[int(np.argmax(np.minimum(d, separation * 4)))] if d.max() > 0 else cand[0]
        placed.append(xy[k])
        where.append(k)
    return np.array(placed).reshape(-1, 2), where


def _label_lines(ax, polylines, texts, *, colour, fontsize=7, separation=None):
    """Write each text on its polyline, in a small white box that keeps it readable."""
    if not polylines:
        return
    if separation is None:
        span = np.ptp(np.concatenate(polylines), axis=0).max()
        separation = 0.08 * span
    positions, _ = _label_positions(polylines, separation=separation)
    for pos, text in zip(positions, texts):
        ax.text(pos[0], pos[1], text, fontsize=fontsize, color=colour, ha="center",
                va="center", zorder=6,
                bbox=dict(boxstyle="round,pad=0.18", facecolor="white", edgecolor=colour,
                          linewidth=0.4, alpha=0.88))


def draw_disk_lines(ax, pattern, *, n_labels=10, show_crossings=False, to_plot=None,
                    fill=True, style="predicted"):
    """Draw the central disk with the exact loci on ``ax``.

    Parameters
    ----------
    n_labels : int
        Label the strongest lines with their indices, on the lines.
    show_crossings : bool
        Mark the crossings of the labelled lines with one another (all
        crossings would bury the lines).
    to_plot : callable, optional
        Maps (m, 2) mrad points to plot coordinates (for example pixels);
        identity by default.
    fill : bool
        Fill the disk (off when an image is underneath).
    style : {"predicted", "fitted"}
        Predicted loci in ink, width and opacity by strength; fitted loci thin
        and half transparent in the model colour, so data beneath stay visible.
    """
    from matplotlib.collections import LineCollection
    from matplotlib.patches import Polygon

    convert = to_plot or (lambda xy: xy)
    angle = np.linspace(0, 2 * np.pi, 361)
    rim = pattern.disk_mrad * np.stack([np.cos(angle), np.sin(angle)], axis=1)
    ax.add_patch(Polygon(convert(rim), closed=True,
                         facecolor=PALETTE["disk"] if fill else "none",
                         edgecolor=PALETTE["soft"], linewidth=0.9, zorder=0 if fill else 3))
    order = np.argsort(pattern.strength, kind="stable")  # weak first, strong on top
    segments = [convert(pattern.points_mrad[i]) for i in order]
    s = np.clip(pattern.strength[order], 0.0, 1.0)
    if style == "fitted":
        ax.add_collection(LineCollection(segments, colors=PALETTE["model"], linewidths=0.9,
                                         alpha=0.6, zorder=4, label="fitted loci"))
        label_colour = PALETTE["ink"]
    else:
        colours = np.zeros((len(s), 4))
        colours[:] = _rgba(PALETTE["ink"])
        colours[:, 3] = 0.35 + 0.65 * s
        ax.add_collection(LineCollection(segments, colors=colours, linewidths=_line_width(s),
                                         capstyle="butt", zorder=2))
        label_colour = PALETTE["ink"]
    strongest = np.argsort(-pattern.strength, kind="stable")[:n_labels]
    _label_lines(ax, [convert(pattern.points_mrad[i]) for i in strongest],
                 [hkl_label(pattern.hkl[i]) for i in strongest], colour=label_colour)
    if show_crossings and pattern.n_crossings:
        chosen = np.isin(pattern.crossing_lines, strongest).all(axis=1)
        xy = convert(pattern.crossing_mrad[chosen]).reshape(-1, 2)
        ax.plot(xy[:, 0], xy[:, 1], linestyle="none", marker="D", markersize=3.2,
                markerfacecolor="white", markeredgecolor=PALETTE["residual"],
                markeredgewidth=0.8, zorder=5,
                label=f"crossings of labelled lines ({len(xy)} of {pattern.n_crossings})")


def _rgba(colour):
    from matplotlib.colors import to_rgba

    return np.array(to_rgba(colour))


def _ring_label_angle(radius, centres, disk):
    """Angle (rad) on a ring of ``radius`` farthest from every zero-layer disk."""
    theta = np.radians(np.arange(20.0, 70.0, 1.0))  # upper right, clear of the axes
    pts = radius * np.stack([np.cos(theta), np.sin(theta)], axis=1)
    if len(centres) == 0:
        return theta[len(theta) // 2]
    gap = np.min(np.linalg.norm(pts[:, None] - centres[None], axis=2), axis=1) - disk
    return theta[int(np.argmax(gap))]


def pattern_figure(pattern, *, n_labels=10, show_crossings=False, disk_image=None):
    """Two panels: the central disk with labelled loci, and the whole-pattern overview.

    Parameters
    ----------
    pattern : laueline.lines.Pattern
    n_labels : int
        Number of strongest lines labelled with their indices, on the lines.
    show_crossings : bool
        Mark the crossings of the labelled lines.
    disk_image : (ndarray, float), optional
        A simulated disk intensity on a square grid (rows along t_y upward)
        and the half-width of that grid in mrad, drawn beneath the lines.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.patches import Circle

    fig = _new_figure(11.0, 6.2)
    ax_disk, ax_all = fig.subplots(1, 2, width_ratios=[1.15, 1])
    if disk_image is not None:
        image, half = disk_image
        shown = ax_disk.imshow(image, origin="lower", extent=(-half, half, -half, half),
                               cmap="gray", zorder=1, interpolation="bilinear")
        shown.set_clip_path(Circle((0, 0), pattern.disk_mrad, transform=ax_disk.transData))
    r = pattern.disk_mrad * 1.06
    ax_disk.set_xlim(-r, r)
    ax_disk.set_ylim(-r, r)
    ax_disk.set_aspect("equal")
    draw_disk_lines(ax_disk, pattern, n_labels=n_labels, show_crossings=show_crossings,
                    fill=disk_image is None)
    key = _strength_key(ax_disk, loc="upper left")
    if show_crossings and ax_disk.get_legend_handles_labels()[0]:
        ax_disk.add_artist(key)
        ax_disk.legend(loc="lower left", fontsize=7, framealpha=0.92,
                       edgecolor=PALETTE["muted"])
    ax_disk.set_xlabel(f"t$_x$ (mrad), along {hkl_label(pattern.x_axis, '()')}")
    ax_disk.set_ylabel("t$_y$ (mrad)")
    cr = pattern.crystal
    n_holz = int(np.sum(pattern.laue_zone >= 1))
    strained = ", strained" if pattern.strain is not None else ""
    _heading(ax_disk, f"{cr.name} {hkl_label(pattern.zone, '[]')}{strained}  central disk",
             f"{pattern.beam.kv:g} kV, {pattern.disk_mrad:g} mrad; {pattern.n_lines} lines "
             f"({n_holz} HOLZ), {pattern.n_crossings} crossings; the "
             f"{min(n_labels, pattern.n_lines)} strongest labelled\n"
             "kinematic loci: dynamical line shifts are not included")

    extent = max([pattern.disk_mrad * 4] + list(pattern.ring_radius_mrad * 1.1))
    ax_all.add_patch(Circle((0, 0), pattern.disk_mrad, facecolor=PALETTE["disk"],
                            edgecolor=PALETTE["ink"], linewidth=1.0, zorder=2,
                            label="central disk"))
    centres = np.asarray(pattern.zero_layer_mrad).reshape(-1, 2)
    near = centres[np.hypot(*centres.T) < extent * 1.5]
    for k, centre in enumerate(near):
        ax_all.add_patch(Circle(tuple(centre), pattern.disk_mrad, facecolor=PALETTE["zero_layer"],
                                edgecolor=PALETTE["muted"], linewidth=0.4, alpha=0.7, zorder=1,
                                label="zero-layer disks" if k == 0 else None))
    for k, (n, radius) in enumerate(zip(pattern.ring_layers, pattern.ring_radius_mrad)):
        ax_all.add_patch(Circle((0, 0), radius, fill=False, edgecolor=PALETTE["ring"],
                                linestyle=(0, (5, 3)), linewidth=1.0, zorder=3,
                                label="HOLZ rings (Laue zone n)" if k == 0 else None))
        theta = _ring_label_angle(radius, near, pattern.disk_mrad)
        ax_all.text(radius * np.cos(theta), radius * np.sin(theta), f"n = {n}",
                    color=PALETTE["ring"], fontsize=8, ha="center", va="center", zorder=4,
                    bbox=dict(boxstyle="round,pad=0.2", facecolor=PALETTE["paper"],
                              edgecolor="none"))
    ax_all.set_xlim(-extent, extent)
    ax_all.set_ylim(-extent, extent)
    ax_all.set_aspect("equal")
    ax_all.set_xlabel("t$_x$ (mrad)")
    ax_all.set_ylabel("t$_y$ (mrad)")
    ax_all.legend(loc="lower left", fontsize=7, framealpha=0.92, edgecolor=PALETTE["muted"])
    rings = ", ".join(f"{r:.1f}" for r in pattern.ring_radius_mrad[:3])
    rings = f"rings at {rings} mrad" if rings else "no HOLZ ring in view"
    overlap = ("the disks overlap" if pattern.disk_mrad > pattern.max_convergence_mrad
               else "disks overlap") + f" above {pattern.max_convergence_mrad:.2f} mrad"
    _heading(ax_all, "overview: zero-layer disks and HOLZ rings",
             f"disk radius {pattern.disk_mrad:g} mrad; {rings}; {overlap}")
    return style_figure(fig)


def _nice_factor(raw):
    """Largest of 1, 2, 5 x 10^k not above ``raw`` (at least 1)."""
    if not np.isfinite(raw) or raw <= 1:
        return 1.0
    k = np.floor(np.log10(raw))
    for m in (5, 2, 1):
        if m * 10 ** k <= raw:
            return float(m * 10 ** k)
    return float(10 ** k)


def _nice_length(raw):
    """A 1-2-5 value near ``raw`` (for a key arrow)."""
    if not np.isfinite(raw) or raw <= 0:
        return 1.0
    k = np.floor(np.log10(raw))
    m = raw / 10 ** k
    return float((1 if m < 1.5 else 2 if m < 3.5 else 5 if m < 7.5 else 10) * 10 ** k)


def fit_figure(result, crystal=None, *, image=None, magnify=None, pattern=0):
    """Measured data with the fitted loci drawn thinly over them, and magnified residuals.

    Parameters
    ----------
    result : laueline.fit.FitResult
    crystal : Crystal, optional
        The reference crystal the fit was made with (by default the result's).
    image : ndarray, optional
        The pattern, drawn underneath in pixel coordinates (row = y down).
    magnify : float, optional
        Residual magnification; by default a 1-2-5 value drawing the rms
        residual at about 8 % of the disk radius.  A key arrow gives the scale.
    pattern : int
        Which pattern of a joint fit.
    """
    fit = result
    result = fit.patterns[pattern]
    pattern = fit.fitted_pattern(result.index, crystal)
    det = result.detector
    fig = _new_figure(7.4, 7.6)
    ax = fig.subplots()
    if image is not None:
        lo, hi = np.percentile(image, [1, 99.7])
        ax.imshow(image, cmap="gray", origin="upper", interpolation="nearest", vmin=lo,
                  vmax=hi)
    radius_px = result.disk_mrad * det.scale_px_per_mrad
    c = np.asarray(det.center_px)
    pad = 1.08 * radius_px
    ax.set_xlim(c[0] - pad, c[0] + pad)
    ax.set_ylim(c[1] + pad, c[1] - pad)  # rows grow downward
    ax.set_aspect("equal")
    draw_disk_lines(ax, pattern, n_labels=8, to_plot=det.to_pixels, fill=image is None,
                    style="fitted")
    if magnify is None:
        rms = result.rms_px if np.isfinite(result.rms_px) and result.rms_px > 0 else 1.0
        magnify = _nice_factor(0.08 * radius_px / rms)
    if result.lines is not None:
        # image fit: residuals of the points on each detected line, along its normal
        pts, vec, left = [], [], []
        for ln in result.lines:
            if ln.points_px is None:
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
        label = "points on the detected lines"
        left = np.array(left).reshape(-1, 2)
    else:
        xy = np.array([[p["x_px"], p["y_px"]] for p in result.points]).reshape(-1, 2)
        res = np.array([p["residual_px"] for p in result.points], dtype=float).reshape(-1, 2)
        used = np.array([p["used"] for p in result.points], dtype=bool)
        ok = used & np.all(np.isfinite(res), axis=1)
        fitted = xy - res
        label = "measured crossings"
        left = xy[~used]
    arrows = ax.quiver(fitted[ok, 0], fitted[ok, 1], magnify * res[ok, 0],
                       magnify * res[ok, 1], angles="xy", scale_units="xy", scale=1,
                       color=PALETTE["residual"], width=0.0035, headwidth=4, zorder=7)
    ax.plot(xy[used, 0], xy[used, 1], linestyle="none", marker="o", markersize=3.6,
            markerfacecolor=PALETTE["measured"], markeredgecolor="white",
            markeredgewidth=0.5, zorder=8, label=label)
    if len(left):
        ax.plot(left[:, 0], left[:, 1], linestyle="none", marker="x", markersize=5,
                color=PALETTE["muted"], zorder=8, label="left out of the fit")
    key_px = _nice_length(result.rms_px if np.isfinite(result.rms_px) else 1.0)
    key = ax.quiverkey(arrows, 0.04, 0.035, magnify * key_px,
                       f"residual of {key_px:g} px, drawn {magnify:g} times longer",
                       labelpos="E", coordinates="axes", fontproperties={"size": 7},
                       color=PALETTE["residual"], labelcolor=PALETTE["ink"], zorder=9)
    key.text.set_bbox(dict(boxstyle="round,pad=0.3", facecolor="white", alpha=0.92,
                           edgecolor=PALETTE["muted"], linewidth=0.5))
    ax.legend(loc="upper right", fontsize=7, framealpha=0.92, edgecolor=PALETTE["muted"])
    ax.set_xlabel("x (px)")
    ax.set_ylabel("y (px, down)")
    what = "points" if result.lines is None else "lines"
    _heading(ax, f"{fit.structure['name']} {hkl_label(result.zone, '[]')}  fit of the "
                 f"{fit.model} model",
             f"{result.n_used} {what} used, rms {result.rms_px:.3g} px; amber: fitted loci, "
             "blue: measured\nkinematic model; the strain is that of the thin foil, which "
             "relaxes at its surfaces")
    return style_figure(fig)


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
    refl = f"({hkl_label(result.hkl)}), " if result.hkl else ""
    ax.set_title(f"{refl}t = {result.thickness_nm:.1f} $\\pm$ "
                 f"{result.thickness_sigma_nm:.2g} nm, first fringe index "
                 f"{result.first_fringe_index}", fontsize=10)
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
        ap.set_xlabel("position along +g (profile unit, e.g. px)")
        ap.set_ylabel("intensity (as given)")
        ap.set_title("profile: disks, Bragg line and dark fringes", fontsize=10)
    return fig


def relaxation_figure(result, max_profiles=12):
    """Measured and fitted profile of each line, and the fitted relaxation against depth.

    Each small panel shows one measured profile (points with 1-sigma bars),
    the fit with the relaxation (solid) and a line of the same strain but
    uniform through the foil (dashed); the last panel shows du/dz of the
    relaxation (disk frame x and y, with 1-sigma bands) against depth.
    """
    p = result.profiles
    n = min(len(p), max_profiles)
    ncols = 4
    nrows = -(-(n + 1) // ncols)
    fig = _new_figure(2.6 * ncols, 2.2 * nrows + 0.3)
    axes = np.atleast_1d(fig.subplots(nrows, ncols)).ravel()
    d = p.offset_px
    for k in range(n):
        ax = axes[k]
        ax.errorbar(d, p.intensity[k], yerr=p.sigma[k], fmt=".", markersize=2, color="#555555",
                    elinewidth=0.5, capsize=0)
        ax.plot(d, result.fit.fitted[k], color=_CROSSING, linewidth=1.2)
        ax.plot(d, result.fit.uniform[k], color=_LINE, linewidth=0.8, linestyle=(0, (4, 2)))
        tag = "split" if result.split[k] else ("broadened" if result.broadened[k] else "")
        ax.set_title(f"{hkl_label(p.hkl[k])} part {p.segment[k] + 1} {tag}", fontsize=8)
        ax.tick_params(labelsize=7)
        if k % ncols == 0:
            ax.set_ylabel("relative intensity", fontsize=7)
        ax.set_xlabel("offset (px)", fontsize=7)
    ax = axes[n]
    z, curves, sigma, labels = result.depth_profile()
    factor = 1.0 if result.model == "relaxed-strain" else 1e3
    for j, (label, colour) in enumerate(zip(labels, (_CROSSING, _RING))):
        ax.plot(z, curves[:, j] * factor, color=colour, linewidth=1.2, label=label)
        ax.fill_between(z, (curves[:, j] - sigma[:, j]) * factor,
                        (curves[:, j] + sigma[:, j]) * factor, color=colour, alpha=0.25,
                        linewidth=0)
    ax.axhline(0.0, color="#999999", linewidth=0.6)
    ax.set_xlabel("depth below entrance surface (nm)", fontsize=7)
    ax.set_ylabel("strain / mid-foil strain" if result.model == "relaxed-strain"
                  else "relaxation du/dz (10$^{-3}$)", fontsize=7)
    ax.set_title(f"model {result.model}, t = {result.thickness_nm:g} nm", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7)
    for extra in axes[n + 1:]:
        extra.set_visible(False)
    fig.suptitle("line profiles (kinematic model): measured, fitted, uniform strain (dashed)",
                 fontsize=9)
    return fig


def thickness_fit_figure(result):
    """Measured and fitted profile of a many-beam thickness fit, residuals beneath."""
    fig = _new_figure(9.0, 5.4)
    ax, ar = fig.subplots(2, 1, sharex=True, height_ratios=[3, 1])
    ax.plot(result.position, result.intensity, color="#555555", linewidth=0.7,
            label="measured")
    ax.plot(result.position, result.fitted, color=_CROSSING, linewidth=1.0,
            label=f"many-beam fit, {result.n_beams} beams")
    det = result.detection
    if det is not None:
        for lo, hi in det.disk_edges:
            ax.axvspan(lo, hi, color=_ZOLZ_FILL, alpha=0.5, zorder=0)
    for offset in (0.0, result.separation):
        ax.axvline(result.bragg_position + offset, color=_LINE, linewidth=0.8,
                   linestyle=(0, (4, 3)))
    ka = result.kelly_allen
    ka_text = (f"; Kelly-Allen {ka.thickness_nm:.1f} $\\pm$ {ka.thickness_sigma_nm:.2g} nm"
               if ka is not None else "")
    ax.set_title(f"({hkl_label(result.hkl)}), {result.kv:g} kV: t = {result.thickness_nm:.1f} "
                 f"$\\pm$ {result.thickness_sigma_nm:.2g} nm (many-beam fit){ka_text}",
                 fontsize=10)
    ax.set_ylabel("intensity (as given)")
    ax.legend(fontsize=8, loc="upper right")
    ar.plot(result.position, result.intensity - result.fitted, color="#555555", linewidth=0.6)
    ar.axhline(0.0, color=_LINE, linewidth=0.8)
    ar.set_ylabel("residual")
    ar.set_xlabel("position along +g (profile unit, e.g. px)")
    return fig


def _stereo(v):
    v = np.asarray(v, dtype=float)
    v = v / np.linalg.norm(v, axis=-1, keepdims=True)
    return v[..., :2] / (1.0 + v[..., 2:3])


def robust_log_limits(scores):
    """Colour limits (low, high) for a log scale that one outlier cannot flatten.

    The low end is the best (smallest) score, the axes one plans for; the
    high end is the largest score, capped at 3 scaled median absolute
    deviations above the median of log10(score) (Hampel's outlier rule,
    common practice), so that a nearly degenerate axis is drawn in the
    end colour instead of compressing all others into one.
    """
    s = np.asarray(scores, dtype=float)
    s = s[np.isfinite(s) & (s > 0)]
    if not len(s):
        return 1.0, 10.0
    logs = np.log10(s)
    median = np.median(logs)
    spread = 1.4826 * np.median(np.abs(logs - median))
    low = float(s.min())
    high = float(s.max())
    if spread > 0:
        high = min(high, float(10 ** (median + 3.0 * spread)))
    return low, max(high, low * 1.05)


def survey_map_coordinates(result, crystal):
    """Plot coordinates of the survey's axes and the kind of map.

    Returns
    -------
    xy : ndarray (n, 2)
        One point per axis of ``result.axes`` (its shown member).
    kind : str
        "tilt" (degrees toward e1, e2 about ``near``; e1 the sample x axis
        projected normal to ``near`` when a sample frame is given),
        "sample" (stereographic, upper hemisphere about the sample z axis,
        sample x to the right), "triangle" (cubic standard triangle) or
        "hemisphere" (stereographic, z along c*).
    """
    sample = getattr(result, "sample_axes", None)
    shown = np.array([a.member if len(getattr(a, "member", ())) else a.zone
                      for a in result.axes], dtype=float).reshape(-1, 3)
    d = shown @ crystal.basis.T          # Cartesian directions
    if result.near is not None:
        ref = crystal.basis @ np.asarray(result.near, dtype=float)
        e3 = ref / np.linalg.norm(ref)
        e1 = np.zeros(3)
        if sample is not None:
            e1 = sample[0] - (sample[0] @ e3) * e3
        if np.linalg.norm(e1) < 1e-6:
            e1 = np.cross(e3, [0, 0, 1.0]) if abs(e3[2]) < 0.9 else np.cross(e3, [1.0, 0, 0])
        e1 /= np.linalg.norm(e1)
        e2 = np.cross(e3, e1)
        xy = np.degrees(np.stack([np.arctan2(d @ e1, d @ e3), np.arctan2(d @ e2, d @ e3)], 1))
        return xy, "tilt"
    if sample is not None:
        d = d @ np.asarray(sample).T      # sample-frame components
        d[d[:, 2] < 0] *= -1              # an axis and its opposite give the same precision
        return _stereo(d), "sample"
    if result.cubic:
        s = -np.sort(-np.abs(shown), axis=1)
        return _stereo(np.stack([s[:, 1], s[:, 2], s[:, 0]], axis=1)), "triangle"
    d[d[:, 2] < 0] *= -1  # Friedel: the opposite axis is equivalent
    return _stereo(d), "hemisphere"


def survey_figure(result, crystal, n_labels=8):
    """Stereographic map of the candidate axes coloured by predicted precision.

    Without a sample frame: cubic crystals without a tilt cone are shown in
    the standard triangle [001]-[101]-[111], other crystals on the upper
    hemisphere (z along c*).  With a sample frame: the axis shown for each
    family (its best member) on the upper hemisphere about the sample z
    axis, sample x to the right.  A survey around ``near`` is drawn in tilt
    angles about that axis (x tilt toward the sample x axis when a sample
    frame is given).  The colour scale is logarithmic with its upper end
    set robustly (:func:`robust_log_limits`); axes whose strain is not
    determined are drawn as grey crosses.
    """
    from matplotlib import colormaps
    from matplotlib.colors import LogNorm

    fig = _new_figure(6.6, 5.6)
    ax = fig.subplots()
    sample = getattr(result, "sample_axes", None)
    scores = np.array([a.score for a in result.axes])
    xy, kind = survey_map_coordinates(result, crystal)
    if kind == "tilt":
        t = np.linspace(0, 2 * np.pi, 200)
        ax.plot(result.max_tilt_deg * np.cos(t), result.max_tilt_deg * np.sin(t),
                color=_DISK_EDGE, linewidth=0.8)
        ax.set_xlabel("tilt toward sample x (deg)" if sample is not None else "tilt x (deg)")
        ax.set_ylabel("tilt toward sample y (deg)" if sample is not None else "tilt y (deg)")
        title = f"axes within {result.max_tilt_deg:g} deg of [{' '.join(f'{v:g}' for v in result.near)}]"
    elif kind == "sample":
        t = np.linspace(0, 2 * np.pi, 200)
        ax.plot(np.cos(t), np.sin(t), color=_DISK_EDGE, linewidth=0.8)
        for label, v in [("x", (1.0, 0, 0)), ("y", (0, 1.0, 0))]:
            p = _stereo(np.array(v))
            ax.annotate(f"sample {label}", p, textcoords="offset points", xytext=(3, 3),
                        fontsize=8, color=_DISK_EDGE)
        ax.plot([0], [0], marker="+", color=_DISK_EDGE)
        ax.set_axis_off()
        title = "sample frame, upper hemisphere about z"
    elif kind == "triangle":
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
        t = np.linspace(0, 2 * np.pi, 200)
        ax.plot(np.cos(t), np.sin(t), color=_DISK_EDGE, linewidth=0.8)
        ax.set_axis_off()
        title = "upper hemisphere, z along c*"
    finite = np.isfinite(scores)
    low, high = robust_log_limits(scores[finite])
    norm = LogNorm(vmin=low, vmax=high, clip=False)
    cmap = colormaps["plasma"].with_extremes(over="#3b3b3b")
    sc = ax.scatter(xy[finite, 0], xy[finite, 1], c=scores[finite], cmap=cmap, norm=norm,
                    s=30, edgecolors="none", zorder=3)
    if np.any(~finite):
        ax.scatter(xy[~finite, 0], xy[~finite, 1], marker="x", s=18, color="#9b9b9b",
                   linewidths=0.8, zorder=2, label="strain not determined")
    overlap = np.array([a.overlap for a in result.axes])
    if np.any(overlap):
        ax.scatter(xy[overlap, 0], xy[overlap, 1], s=80, facecolors="none",
                   edgecolors=_DISK_EDGE, linewidths=0.6, zorder=2,
                   label="disks overlap: at largest convergence")
    if np.any(overlap) or np.any(~finite):
        ax.legend(loc="upper left", fontsize=7, frameon=False)
    halo = _halo()
    for a, p in list(zip(result.axes, xy))[:n_labels]:
        if not np.isfinite(a.score):
            continue
        z = a.member if len(getattr(a, "member", ())) else a.zone
        ax.annotate("[" + " ".join(str(v) for v in z) + "]", p,
                    textcoords="offset points", xytext=(5, 4), fontsize=7, color=_LINE,
                    path_effects=halo, zorder=4)
    ax.set_aspect("equal")
    extend = "max" if np.any(scores[finite] > high) else "neither"
    cb = fig.colorbar(sc, ax=ax, shrink=0.8, extend=extend)
    cb.set_label(f"predicted 1-sigma of {result.ranked_by}")
    ax.set_title(f"{result.structure['name']}, {result.kv:g} kV, {result.disk_mrad:g} mrad: "
                 f"{title}", fontsize=10)
    return fig


def map_figure(ds, *, sample_frame=None):
    """Strain over a scan: maps (2-D scans) or profiles with error bars (line scans).

    Patterns whose fit failed are masked, not drawn as zero.  Maps of one
    kind (normal strains, shears, their sigmas) share a colour scale,
    diverging and centred on zero for strains; the scale is set by the 2nd
    and 98th percentiles so that a few outliers cannot flatten it.
    """
    import matplotlib
    from matplotlib.colors import TwoSlopeNorm

    diverging = matplotlib.colormaps["RdBu_r"].with_extremes(bad="0.8")
    sequential = matplotlib.colormaps["viridis"].with_extremes(bad="0.8")
    prefix = "sample_" if (sample_frame is not False and "sample_exx" in ds) else ""
    sigma_prefix = "sigma_sample_" if prefix else "sigma_"
    names = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
    labels = {n: rf"$\epsilon_{{{n[1:]}}}$" + ("'" if prefix else "") for n in names}
    ok = np.asarray(ds["ok"].values, bool)
    frame = "sample frame" if prefix else "crystal frame"
    dims = [d for d in ds["ok"].dims]
    if len(dims) == 1:
        x = np.asarray(ds[dims[0]].values, float)
        unit = ds[dims[0]].attrs.get("units", "step")
        fig = _new_figure(9.0, 6.0)
        axes = fig.subplots(2, 1, sharex=True)
        for ax, group in zip(axes, (names[:3], names[3:])):
            for k, n in enumerate(group):
                v = np.where(ok, np.asarray(ds[prefix + n].values), np.nan) * 1e3
                s = np.where(ok, np.asarray(ds[sigma_prefix + n].values), np.nan) * 1e3
                ax.errorbar(x, v, yerr=s, fmt="o-", ms=3, lw=1, capsize=2, label=labels[n])
            ax.axhline(0, color="0.6", lw=0.8)
            ax.set_ylabel("strain (10$^{-3}$)")
            ax.legend(loc="best", ncols=3, fontsize=8)
        axes[-1].set_xlabel(f"position along the scan ({unit})")
        axes[0].set_title(f"Strain along the scan ({frame}; error bars: total 1-sigma)")
        return fig
    ny, nx = ok.shape
    fig = _new_figure(11.0, 6.5)
    grid = fig.subplots(2, 6)
    extent = None
    ycoord, xcoord = (np.asarray(ds[d].values, float) for d in dims)
    if len(xcoord) > 1 and len(ycoord) > 1:
        extent = (xcoord[0], xcoord[-1], ycoord[-1], ycoord[0])
    unit = ds[dims[1]].attrs.get("units", "step")
    for kind, group in (("normal", names[:3]), ("shear", names[3:])):
        values = {n: np.where(ok, np.asarray(ds[prefix + n].values), np.nan) * 1e3
                  for n in group}
        sigmas = {n: np.where(ok, np.asarray(ds[sigma_prefix + n].values), np.nan) * 1e3
                  for n in group}
        stacked = np.concatenate([v.ravel() for v in values.values()])
        limit = np.nanpercentile(np.abs(stacked), 98) if np.isfinite(stacked).any() else 1.0
        limit = limit if limit > 0 else 1.0
        slimit = np.nanpercentile(np.concatenate([s.ravel() for s in sigmas.values()]), 98) \
            if np.isfinite(stacked).any() else 1.0
        offset = 0 if kind == "normal" else 3
        for k, n in enumerate(group):
            ax = grid[0, offset + k]
            im = ax.imshow(np.ma.masked_invalid(values[n]), cmap=diverging, extent=extent,
                           norm=TwoSlopeNorm(0.0, -limit, limit), interpolation="nearest")
            ax.set_title(labels[n] + r" ($10^{-3}$)", fontsize=9)
            ax_s = grid[1, offset + k]
            im_s = ax_s.imshow(np.ma.masked_invalid(sigmas[n]), cmap=sequential, extent=extent,
                               vmin=0, vmax=slimit if slimit > 0 else None,
                               interpolation="nearest")
            ax_s.set_title(r"1-$\sigma$ of " + labels[n], fontsize=9)
            for a in (ax, ax_s):
                a.set_xlabel(f"x ({unit})", fontsize=8)
                a.set_ylabel(f"y ({unit})", fontsize=8)
                a.tick_params(labelsize=7)
        fig.colorbar(im, ax=list(grid[0, offset:offset + 3]), shrink=0.8)
        fig.colorbar(im_s, ax=list(grid[1, offset:offset + 3]), shrink=0.8)
    fig.suptitle(f"Strain map ({frame}, Green-Lagrange; grey: failed patterns)")
    return fig


def detection_figure(det, image, *, show_crossings=True):
    """The pattern with the detected disk, lines (flagged ones dashed) and crossings.

    Each line carries its index in the detection (the ``lines`` list of the
    JSON and the report's table), written on the line itself.
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Circle

    fig = _new_figure(7.4, 7.6)
    ax = fig.subplots()
    lo, hi = np.percentile(image, [1, 99.7])
    ax.imshow(image, cmap="gray", origin="upper", interpolation="nearest", vmin=lo, vmax=hi)
    ax.set_xlim(-0.5, image.shape[1] - 0.5)
    ax.set_ylim(image.shape[0] - 0.5, -0.5)
    ax.set_aspect("equal")
    d = det.disk
    ax.add_patch(Circle(d.center_px, d.radius_px, fill=False, edgecolor=PALETTE["model"],
                        linewidth=1.0, linestyle=(0, (4, 3)), zorder=3))
    good = [i for i, ln in enumerate(det.lines) if not ln.flag]
    flagged = [i for i, ln in enumerate(det.lines) if ln.flag]
    for i in good:
        pts = det.lines[i].points_px
        ax.plot(pts[:, 0], pts[:, 1], color=PALETTE["measured"], linewidth=0.8, alpha=0.6,
                zorder=4)
    for i in flagged:
        pts = det.lines[i].points_px
        ax.plot(pts[:, 0], pts[:, 1], color=PALETTE["muted"], linewidth=1.0,
                linestyle=(0, (4, 3)), zorder=4)
    _label_lines(ax, [det.lines[i].points_px for i in good + flagged],
                 [str(i) for i in good + flagged], colour=PALETTE["ink"], fontsize=7,
                 separation=0.06 * d.radius_px * 2)
    handles = [Line2D([], [], color=PALETTE["measured"], linewidth=1.0,
                      label=f"lines ({len(good)}), index on the line"),
               Line2D([], [], color=PALETTE["model"], linewidth=1.0, linestyle=(0, (4, 3)),
                      label="disk edge fitted")]
    if flagged:
        handles.append(Line2D([], [], color=PALETTE["muted"], linestyle=(0, (4, 3)),
                              label=f"flagged, left out ({len(flagged)})"))
    if show_crossings and len(det.crossing_px):
        ax.plot(det.crossing_px[:, 0], det.crossing_px[:, 1], linestyle="none", marker="o",
                markersize=1.5, color=PALETTE["residual"], alpha=0.8, zorder=5)
        handles.append(Line2D([], [], linestyle="none", marker="o", markersize=3,
                              color=PALETTE["residual"],
                              label=f"crossings ({len(det.crossing_px)})"))
    ax.legend(handles=handles, loc="upper right", fontsize=7, framealpha=0.92,
              edgecolor=PALETTE["muted"])
    ax.set_xlabel("x (px)")
    ax.set_ylabel("y (px, down)")
    _heading(ax, "detected disk and lines",
             f"disk r = {d.radius_px:.1f} px at ({d.center_px[0]:.1f}, "
             f"{d.center_px[1]:.1f}); {len(good)} lines, {len(det.crossing_px)} crossings")
    return style_figure(fig)
