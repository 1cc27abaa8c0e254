"""Matplotlib figures of the report (Agg canvas, no pyplot state): the site overview map
and the summary plots. Each function returns PNG bytes."""
from __future__ import annotations

import io
import math
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime
from typing import TYPE_CHECKING, Any, cast

import numpy as np
from numpy.typing import ArrayLike

from pvscan.report._images import Extent
from pvscan.report._result import SEVERITIES

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.cm import ScalarMappable
    from matplotlib.figure import Figure

__all__ = ["SEVERITY_STYLE", "overview_rgb", "temperature_hist_png", "delta_norm_hist_png",
           "loss_by_defect_png", "validity_png", "registration_png", "nice_length", "Rings"]

#: Marker and colour of each severity, on the map and in the plots (our own scheme:
#: distinct shapes so the map reads in grey print and for colour-blind readers too).
SEVERITY_STYLE = {
    "safety": {"color": "#d1005d", "marker": "^", "label": "safety: act now"},
    "repair": {"color": "#1f6fd0", "marker": "s", "label": "repair: schedule"},
    "monitor": {"color": "#1e9e86", "marker": "o", "label": "monitor: watch"},
}
INK = _INK = "#1d2733"
MUTED = _MUTED = "#7a8593"
_HEALTHY = "#9aa7b6"


def _figure(w_in: float, h_in: float) -> Figure:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(w_in, h_in))
    FigureCanvasAgg(fig)
    return fig


def _png(fig: Figure, dpi: int) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, facecolor="white")
    return buf.getvalue()


def _rgb(fig: Figure, dpi: int) -> np.ndarray:
    """The figure drawn at ``dpi`` on white, as an RGB array (height x width x 3, uint8): the
    pixels :func:`_png` would encode, for a caller that re-encodes them anyway."""
    fig.set_dpi(dpi)
    fig.patch.set_facecolor("white")
    fig.canvas.draw()
    return np.array(cast(Any, fig.canvas).buffer_rgba())[..., :3]


def _style(ax: Axes) -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(_MUTED)
    ax.tick_params(colors=_INK, labelsize=8)
    ax.xaxis.label.set_color(_INK)
    ax.yaxis.label.set_color(_INK)
    ax.title.set_color(_INK)


def nice_length(target: float) -> float:
    """The largest 1, 2 or 5 x 10^k not above ``target`` (for scale bars) [same unit]."""
    if not (target > 0 and math.isfinite(target)):
        return 1.0
    exp = math.floor(math.log10(target))
    for m in (5, 2, 1):
        if m * 10 ** exp <= target:
            return float(m * 10 ** exp)
    return float(10 ** exp)


class Rings:
    """The exterior rings of many polygons (:func:`_polys`), gathered once for figures that
    draw the same modules (the overview and the registration plans); pass it where a figure
    takes ``module_geoms``.

    Parameters
    ----------
    geoms : iterable of shapely geometries (map coordinates) [m]
    """

    __slots__ = ("rings",)

    def __init__(self, geoms: Iterable[Any]) -> None:
        self.rings = _polys(geoms)

    def __len__(self) -> int:
        return len(self.rings)


def _polys(geoms: Iterable[Any] | Rings) -> Sequence[np.ndarray]:
    """Exterior rings (k, 2) of the polygons (and polygon parts) of ``geoms``, in order
    (``geoms.rings`` when they were gathered already).

    When every ring has the same number of points (module rectangles) they come as one
    (rings, k, 2) array: a ``PolyCollection`` then builds its paths from one template, the
    same vertices and codes as from a list, many times faster on thousands of modules."""
    import shapely

    if isinstance(geoms, Rings):
        return geoms.rings
    items = list(geoms)
    arr = np.empty(len(items), dtype=object)
    arr[:] = items
    arr = arr[~shapely.is_missing(arr)]
    if arr.size == 0:
        return []
    parts = shapely.get_parts(arr)
    parts = parts[(shapely.get_type_id(parts) == 3) & ~shapely.is_empty(parts)]
    if parts.size == 0:
        return []
    coords, owner = shapely.get_coordinates(shapely.get_exterior_ring(parts), return_index=True)
    cuts = np.flatnonzero(np.diff(owner)) + 1
    sizes = np.diff(np.concatenate(([0], cuts, [len(coords)])))
    if len(sizes) and (sizes == sizes[0]).all():
        # an array of rings: indexing, iteration and len() as for the list
        return cast(Sequence[np.ndarray], coords.reshape(len(sizes), int(sizes[0]), 2))
    return np.split(coords, cuts)


def overview_rgb(*, extent: Extent, image: np.ndarray | None, module_geoms: Iterable[Any],
                 module_values: np.ndarray | None, anomaly_points: Sequence[tuple[float, float, str, int]], cmap: str,
                 anomaly_regions: Sequence[tuple[object, str]] = (),
                 vmin: float, vmax: float, north_deg: float, dpi: int, n_labels: int,
                 image_label: str, pins: list[tuple[int, float, float]] | None = None) -> np.ndarray:
    """Site overview map.

    Parameters
    ----------
    extent : (xmin, xmax, ymin, ymax) [m]
        Map extent in the ortho CRS.
    image : ndarray or None
        Decimated thermal ortho [degC] covering ``extent``; when None the modules are
        filled with ``module_values`` instead.
    module_geoms : sequence of shapely polygons (map coordinates), or their :class:`Rings`
    module_values : ndarray or None
        Module temperatures [degC] (used when ``image`` is None).
    anomaly_points : sequence of (x, y, severity, priority)
    anomaly_regions : sequence of (shapely geometry, severity)
        Affected regions, outlined in their severity's colour (visible for runs of modules).
    cmap : str
        Matplotlib colour map name.
    vmin, vmax : float
        Colour window [degC].
    north_deg : float
        Direction of true north, clockwise from the map's up direction [deg].
    dpi : int
    n_labels : int
        Number of anomalies (best priority first) labelled with their priority number.
    image_label : str
        Colour-bar label.
    pins : list, optional
        Filled with ``(priority, fx, fy)``: each anomaly's position in the PNG as fractions
        of its width and height (0, 0 = top left), for links laid over the image.
    """
    import matplotlib.patheffects as pe
    from matplotlib.collections import PolyCollection
    from matplotlib.lines import Line2D
    from matplotlib.patches import FancyArrow, Rectangle

    xmin, xmax, ymin, ymax = extent
    width, height = xmax - xmin, ymax - ymin
    aspect = height / width if width > 0 else 1.0
    fig_w = 10.5
    map_h = min(max(fig_w * 0.82 * aspect, 3.0), 9.5)
    fig = _figure(fig_w, map_h + 0.9)
    ax = fig.add_axes((0.02, 0.11, 0.84, 0.87))
    cax = fig.add_axes((0.885, 0.2, 0.018, 0.68))
    ax.set_facecolor("#e9ecef")
    polys = _polys(module_geoms)
    # the collections leave the data limits alone (autolim=False): the view is set below
    im: ScalarMappable
    if image is not None:
        im = ax.imshow(image, extent=extent, origin="upper", cmap=cmap, vmin=vmin, vmax=vmax,
                       interpolation="nearest")
        if len(polys):
            ax.add_collection(PolyCollection(polys, facecolors="none", edgecolors=(1, 1, 1, 0.35),
                                             linewidths=0.35), autolim=False)
    else:
        vals = np.asarray(module_values if module_values is not None else [], dtype=float)
        coll = PolyCollection(polys, cmap=cmap, edgecolors=(0.2, 0.2, 0.2, 0.6), linewidths=0.3)
        if len(vals) == len(polys):
            coll.set_array(np.ma.masked_invalid(vals))
        coll.set_clim(vmin, vmax)
        ax.add_collection(coll, autolim=False)
        im = coll
    cb = fig.colorbar(im, cax=cax)
    cb.set_label(image_label, fontsize=8, color=_INK)
    cb.ax.tick_params(labelsize=7, colors=_INK)
    for sev in reversed(SEVERITIES):
        rp = _polys([g for g, s in anomaly_regions if s == sev])
        if len(rp):
            ax.add_collection(PolyCollection(rp, facecolors="none", edgecolors=SEVERITY_STYLE[sev]["color"],
                                             linewidths=1.1, zorder=4), autolim=False)
    # anomalies, lowest urgency first so safety marks stay on top
    order = sorted(anomaly_points, key=lambda p: -SEVERITIES.index(p[2]) if p[2] in SEVERITIES else -9)
    msize = 46 if len(anomaly_points) < 200 else 22
    for sev in reversed(SEVERITIES):
        pts = [(x, y) for x, y, s, _ in order if s == sev]
        if pts:
            st = SEVERITY_STYLE[sev]
            xy = np.asarray(pts)
            ax.scatter(xy[:, 0], xy[:, 1], s=msize * (1.6 if sev == "safety" else 1.0), marker=st["marker"],
                       c=st["color"],
                       edgecolors="white", linewidths=0.9, zorder=5)
    halo = [pe.withStroke(linewidth=2.2, foreground="white")]
    ax.set_xlim(xmin, xmax)
    ax.set_ylim(ymin, ymax)
    ax.set_aspect("equal")
    _number_marks(fig, ax, anomaly_points, n_labels, msize, dpi)
    ax.set_xticks([])
    ax.set_yticks([])
    for s in ax.spines.values():
        s.set_color(_MUTED)
    # scale bar (bottom left, in map metres)
    bar = nice_length(width * 0.2)
    # map units per typographic point: with an equal aspect the larger ratio wins
    fw, fh = fig.get_size_inches()
    per_pt = max(width / (0.84 * fw * 72.0), height / (0.87 * fh * 72.0))
    bh = 4.0 * per_pt
    bx, by = xmin + 0.03 * width, ymin + 6.0 * per_pt
    ax.add_patch(Rectangle((bx - 5.0 * per_pt, by - 4.0 * per_pt), bar + 10.0 * per_pt, 22.0 * per_pt,
                           facecolor="white", edgecolor="none", zorder=7))
    for k in range(4):
        ax.add_patch(Rectangle((bx + k * bar / 4, by), bar / 4, bh, facecolor=_INK if k % 2 == 0
                               else "white", edgecolor=_INK, linewidth=0.6, zorder=8))
    label = f"{bar:g} m" if bar < 1000 else f"{bar / 1000:g} km"
    ax.text(bx + bar / 2, by + bh + 2.0 * per_pt, label, ha="center", va="bottom", fontsize=8, color=_INK,
            zorder=8)
    # north arrow (top right, pointing to true north)
    cx, cy = xmax - 0.06 * width, ymax - 0.13 * height
    length = 0.07 * min(width, height) if min(width, height) > 0 else 1.0
    th = math.radians(north_deg)
    ux, uy = math.sin(th), math.cos(th)
    from matplotlib.patches import Circle

    ax.add_patch(Circle((cx, cy + 0.1 * length), 0.85 * length, facecolor="white", edgecolor="none",
                        zorder=7))
    ax.add_patch(FancyArrow(cx - ux * length / 2, cy - uy * length / 2, ux * length, uy * length,
                            width=length * 0.12, head_width=length * 0.42, head_length=length * 0.4,
                            length_includes_head=True, facecolor="white", edgecolor=_INK,
                            linewidth=1.0, zorder=8))
    ax.text(cx + ux * length * 0.72, cy + uy * length * 0.72, "N", ha="center", va="center",
            fontsize=10, fontweight="bold", color=_INK, path_effects=halo, zorder=9)
    handles = [Line2D([], [], linestyle="none", marker=SEVERITY_STYLE[s]["marker"], markersize=7,
                      markerfacecolor=SEVERITY_STYLE[s]["color"], markeredgecolor="white",
                      label=SEVERITY_STYLE[s]["label"]) for s in SEVERITIES]
    handles.append(Line2D([], [], color=_MUTED, linewidth=0.8, label="module outline"))
    fig.legend(handles=handles, loc="lower center", ncol=4, frameon=False, fontsize=8,
               bbox_to_anchor=(0.45, 0.0))
    if pins is not None:  # where each anomaly lands in the image, as fractions of its size
        fig.set_dpi(dpi)
        w_px, h_px = fig.get_size_inches() * dpi
        for x, y, _sev, prio in anomaly_points:
            px, py = ax.transData.transform((x, y))
            pins.append((prio, float(px / w_px), float(1.0 - py / h_px)))
    return _rgb(fig, dpi)


def _number_marks(fig: Figure, ax: Axes, anomaly_points: Sequence[tuple[float, float, str, int]], n_labels: int,
                  msize: float, dpi: int) -> None:
    """Each mark's priority number beside it, placed so no two labels collide
    (:func:`pvscan.report._labels.place_labels`); a thin leader joins a label set further out."""
    import matplotlib.patheffects as pe

    from pvscan.report._labels import place_labels

    labelled = sorted(anomaly_points, key=lambda p: p[3])[: max(int(n_labels), 0)]
    if not labelled:
        return
    fig.set_dpi(dpi)
    ax.apply_aspect()
    to_pt = 72.0 / dpi
    xy = ax.transData.transform(np.array([(p[0], p[1]) for p in labelled], dtype=float)) * to_pt
    bb = ax.get_window_extent()
    frame = (bb.x0 * to_pt + 2, bb.y0 * to_pt + 2, bb.x1 * to_pt - 2, bb.y1 * to_pt - 2)
    fs = 7.0
    sizes = [(0.62 * fs * len(str(p[3])) + 3.0, fs * 1.25) for p in labelled]
    radius = 0.5 * math.sqrt(msize * 1.6) + 1.0
    centres, _ = place_labels(xy, sizes, mark_radius=radius, frame=frame)
    halo = [pe.withStroke(linewidth=2.2, foreground="white")]
    for (x, y, _, prio), (px, py), (qx, qy) in zip(labelled, centres, xy):
        far = math.hypot(px - qx, py - qy) > radius + 0.5 * max(sizes[0]) + 4.0
        ax.annotate(str(prio), (x, y), xytext=(px - qx, py - qy), textcoords="offset points", fontsize=fs,
                    color=_INK, fontweight="bold", ha="center", va="center", path_effects=halo, zorder=6,
                    arrowprops={"arrowstyle": "-", "color": _INK, "linewidth": 0.5, "shrinkA": 0,
                                "shrinkB": radius} if far else None)


def temperature_hist_png(t_healthy: np.ndarray, t_by_severity: Mapping[str, np.ndarray], dpi: int) -> bytes:
    """Histogram of module median temperatures [degC], stacked by severity."""
    fig = _figure(5.0, 3.0)
    ax = fig.add_axes((0.13, 0.2, 0.83, 0.68))
    _style(ax)
    allv = np.concatenate([np.asarray(t_healthy, float)] + [np.asarray(v, float)
                                                            for v in t_by_severity.values()])
    allv = allv[np.isfinite(allv)]
    if allv.size:
        lo, hi = np.percentile(allv, [0, 100])
        bins = np.linspace(lo - 0.25, hi + 0.25, int(np.clip(np.sqrt(allv.size) * 2, 10, 60)) + 1)
        data, colors, labels = [np.asarray(t_healthy, float)], [_HEALTHY], ["no anomaly"]
        for sev in SEVERITIES:
            v = np.asarray(t_by_severity.get(sev, []), float)
            if v.size:
                data.append(v)
                colors.append(SEVERITY_STYLE[sev]["color"])
                labels.append(sev)
        data = [d[np.isfinite(d)] for d in data]
        ax.hist(data, bins=bins.tolist(), stacked=True, color=colors, label=labels, edgecolor="white",
                linewidth=0.3)
        med = float(np.median(allv))
        ax.axvline(med, color=_INK, linewidth=0.8, linestyle="--")
        ax.text(med, ax.get_ylim()[1] * 0.97, f" median {med:.1f} °C", fontsize=7, color=_INK, va="top")
        ax.legend(fontsize=7, frameon=False)
    else:
        ax.text(0.5, 0.5, "no module temperatures", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("module median temperature [°C]", fontsize=8)
    ax.set_ylabel("modules", fontsize=8)
    ax.set_title("Module temperature distribution", fontsize=9, loc="left")
    return _png(fig, dpi)


def delta_norm_hist_png(all_dtn: np.ndarray, anomaly_dtn: Mapping[str, np.ndarray], dpi: int) -> bytes:
    """Histogram of modules' normalised delta T [K] (log counts) with anomalies by severity."""
    fig = _figure(5.0, 3.0)
    ax = fig.add_axes((0.13, 0.2, 0.83, 0.68))
    _style(ax)
    base = np.asarray(all_dtn, float)
    base = base[np.isfinite(base)]
    extra = [np.asarray(v, float) for v in anomaly_dtn.values()]
    allv = np.concatenate([base] + [e[np.isfinite(e)] for e in extra]) if extra else base
    if allv.size:
        lo, hi = float(np.min(allv)), float(np.max(allv))
        bins = np.linspace(min(lo, -1.0) - 0.5, max(hi, 1.0) + 0.5, 50)
        if base.size:
            ax.hist(base, bins=bins.tolist(), color=_HEALTHY, edgecolor="white", linewidth=0.3,
                    label="modules")
        for sev in SEVERITIES:
            v = np.asarray(anomaly_dtn.get(sev, []), float)
            v = v[np.isfinite(v)]
            if v.size:
                ax.hist(v, bins=bins.tolist(), histtype="step", color=SEVERITY_STYLE[sev]["color"],
                        linewidth=1.4, label=f"anomalies: {sev}")
        ax.set_yscale("log")
        ax.set_ylim(bottom=0.7)
        ax.axvline(0.0, color=_INK, linewidth=0.6)
        ax.legend(fontsize=7, frameon=False)
    else:
        ax.text(0.5, 0.5, "no normalised delta T", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("normalised delta T, 1000 W/m² and 1 m/s [K]", fontsize=8)
    ax.set_ylabel("count (log)", fontsize=8)
    ax.set_title("Normalised temperature difference", fontsize=9, loc="left")
    return _png(fig, dpi)


def loss_by_defect_png(names: Sequence[str], power_w: Sequence[float], counts: Sequence[int],
                       energy_kwh: Sequence[float], dpi: int) -> bytes:
    """Horizontal bars of power loss at STC [W] per defect class."""
    n = max(len(names), 1)
    fig = _figure(5.0, max(2.2, 0.9 + 0.32 * n))
    ax = fig.add_axes((0.3, 0.22 if n > 2 else 0.3, 0.62, 0.62 if n > 2 else 0.5))
    _style(ax)
    if len(names):
        p = np.nan_to_num(np.asarray(power_w, float))
        y = np.arange(len(names))[::-1]
        ax.barh(y, p, color="#4c6a8a", height=0.62)
        ax.set_yticks(y)
        ax.set_yticklabels([s.replace("_", " ") for s in names], fontsize=8)
        pmax = float(p.max()) if p.size else 0.0
        for yi, pi, c, e in zip(y, p, counts, energy_kwh):
            txt = f" {pi:,.0f} W · {c} · {e:,.0f} kWh/yr" if np.isfinite(e) else f" {pi:,.0f} W · {c}"
            ax.text(pi, yi, txt, va="center", fontsize=7, color=_INK)
        ax.set_xlim(0, max(pmax * 1.9, 1.0))
    else:
        ax.text(0.5, 0.5, "no anomalies: no loss", ha="center", va="center", transform=ax.transAxes)
        ax.set_yticks([])
    ax.set_xlabel("power loss at STC [W]  (label: W · anomalies · energy)", fontsize=8)
    ax.set_title("Loss by defect class", fontsize=9, loc="left")
    return _png(fig, dpi)


def validity_png(checks: Sequence[Mapping], dpi: int) -> bytes:
    """Each acquisition check as a gauge: its value against its limit (limit at 1)."""
    numeric = []
    for c in checks:
        try:
            v, lim = float(c["value"]), float(c["limit"])
        except (TypeError, ValueError, KeyError):
            continue
        if math.isfinite(v) and math.isfinite(lim) and lim != 0:
            numeric.append((c, v, lim))
    n = max(len(numeric), 1)
    fig = _figure(5.0, max(2.0, 0.75 + 0.42 * n))
    ax = fig.add_axes((0.36, 0.2 if n > 2 else 0.3, 0.58, 0.66 if n > 2 else 0.5))
    _style(ax)
    if numeric:
        ratios = [v / lim for _, v, lim in numeric]
        xmax = max(2.0, min(max(ratios) * 1.15, 6.0))
        for k, (c, v, lim) in enumerate(numeric):
            y = len(numeric) - 1 - k
            r = min(v / lim, xmax)
            kind = c.get("kind")
            if kind == "min":
                ax.axhspan(y - 0.32, y + 0.32, xmin=0, xmax=1.0 / xmax, color="#f3d6df", zorder=0)
            elif kind == "max":
                ax.axhspan(y - 0.32, y + 0.32, xmin=1.0 / xmax, xmax=1.0, color="#f3d6df", zorder=0)
            passed = c.get("passed")
            col = "#1e9e86" if passed else ("#d1005d" if passed is False else _MUTED)
            ax.plot([0, r], [y, y], color=col, linewidth=3, solid_capstyle="butt")
            ax.plot([r], [y], marker="o", color=col, markersize=6)
            unit = f" {c.get('unit')}" if c.get("unit") else ""
            ax.text(r, y + 0.2, f" {v:.4g}{unit}", fontsize=7, color=_INK, va="bottom")
        ax.axvline(1.0, color=_INK, linewidth=1.0)
        ax.text(1.0, len(numeric) - 0.45, " limit", fontsize=7, color=_INK)
        ax.set_yticks(range(len(numeric))[::-1])
        ax.set_yticklabels([str(c["name"]).replace("_", " ")[:30] + f"\n(limit {lim:.4g})"
                            for c, _, lim in numeric], fontsize=7)
        ax.set_xlim(0, xmax)
        ax.set_ylim(-0.6, len(numeric) - 0.3)
    else:
        ax.text(0.5, 0.5, "no numeric validity checks recorded", ha="center", va="center",
                transform=ax.transAxes, fontsize=8)
        ax.set_yticks([])
    ax.set_xlabel("value / limit (shaded: outside the limit)", fontsize=8)
    ax.set_title("Flight conditions against the validity limits", fontsize=9, loc="left")
    return _png(fig, dpi)


def conditions_series_png(times: Sequence[datetime], poa: ArrayLike, wind: ArrayLike, *, poa_min: float | None,
                          wind_max: float | None, start: datetime | None = None, end: datetime | None = None,
                          dpi: int = 110) -> bytes:
    """Irradiance [W/m2] and wind speed [m/s] during the flight with their validity limits.

    Parameters
    ----------
    times : sequence of datetime
    poa, wind : array-like
        Plane-of-array irradiance [W/m2] and wind speed [m/s] (NaN where not recorded).
    poa_min, wind_max : float, optional
        Validity limits drawn as lines (minimum irradiance, maximum wind).
    start, end : datetime, optional
        The flight's time window, shaded.
    """
    import matplotlib.dates as mdates

    # matplotlib converts datetimes through its units registry (dates on the x axis, with its
    # date locator); its type stubs list floats only, so the times pass untyped
    x_times: Any = times
    span: tuple[Any, Any] = (start, end)
    fig = _figure(10.0, 2.6)
    axes = [fig.add_axes((0.07, 0.22, 0.4, 0.62)), fig.add_axes((0.57, 0.22, 0.4, 0.62))]
    series = ((axes[0], np.asarray(poa, float), poa_min, "min", "plane-of-array irradiance [W/m²]", "#c7792b"),
              (axes[1], np.asarray(wind, float), wind_max, "max", "wind speed [m/s]", "#4c6a8a"))
    for ax, y, lim, kind, label, colour in series:
        _style(ax)
        if start is not None and end is not None:
            ax.axvspan(*span, color="#eef2f5", zorder=0)
        if np.isfinite(y).any():
            ax.plot(x_times, y, color=colour, linewidth=1.4)
        if lim is not None and math.isfinite(lim):
            ax.axhline(lim, color="#d1005d", linewidth=1.0, linestyle="--")
            ax.text(0.01, lim, f" limit {lim:g} ({kind})", transform=ax.get_yaxis_transform(),
                    fontsize=7, color="#d1005d", va="bottom")
            lo, hi = ax.get_ylim()
            ax.set_ylim(min(lo, lim - 0.05 * abs(lim)), max(hi, lim + 0.05 * abs(lim)))
        ax.set_title(label, fontsize=9, loc="left")
        ax.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=getattr(start, "tzinfo", None)))
        ax.tick_params(axis="x", labelsize=7)
    return _png(fig, dpi)


def registration_png(module_geoms: Iterable[Any], arrows: Sequence[tuple[float, float, float, float, str]],
                     shift: tuple[float, float], dpi: int) -> bytes:
    """The registration fit on a plan of the plant: the modules as placed on the image, and at
    each measuring block (or refined table) an arrow of the shift measured there, drawn longer
    than true so centimetres show (the factor is printed).

    Parameters
    ----------
    module_geoms : sequence of shapely polygons (map coordinates), or their :class:`Rings`
    arrows : sequence of (x, y, dx, dy, kind)
        Position [m], measured shift [m] and ``kind`` ('used', 'not used', 'table', 'row').
    shift : (dx, dy)
        The layout shift applied [m] (east, north).
    """
    from matplotlib.collections import PolyCollection
    from matplotlib.lines import Line2D

    polys = _polys(module_geoms)
    pts = np.concatenate(polys) if len(polys) else np.array([[a[0], a[1]] for a in arrows] or [[0.0, 0.0]])
    xmin, ymin = pts.min(axis=0)
    xmax, ymax = pts.max(axis=0)
    span = max(xmax - xmin, ymax - ymin, 1.0)
    fig = _figure(5.0, 3.6)
    ax = fig.add_axes((0.02, 0.14, 0.96, 0.78))
    ax.add_collection(PolyCollection(polys, facecolors="#e3e8ee", edgecolors="#9aa7b6", linewidths=0.3),
                      autolim=False)
    lengths = [math.hypot(a[2], a[3]) for a in arrows] + [math.hypot(*shift)]
    longest = max([v for v in lengths if math.isfinite(v)] + [1e-3])
    factor = nice_length(0.12 * span / longest) if longest > 0 else 1.0
    colours = {"used": "#1f6fd0", "not used": "#9aa7b6", "table": "#c7792b", "row": "#2a9d8f"}
    for x, y, dx, dy, kind in arrows:
        if all(math.isfinite(v) for v in (x, y, dx, dy)):
            ax.annotate("", (x + dx * factor, y + dy * factor), (x, y),
                        arrowprops={"arrowstyle": "-|>", "color": colours.get(kind, _INK), "linewidth": 1.2})
    cx, cy = 0.5 * (xmin + xmax), 0.5 * (ymin + ymax)
    ax.annotate("", (cx + shift[0] * factor, cy + shift[1] * factor), (cx, cy),
                arrowprops={"arrowstyle": "-|>", "color": "#d1005d", "linewidth": 2.0})
    pad = 0.08 * span
    ax.set_xlim(xmin - pad, xmax + pad)
    ax.set_ylim(ymin - pad, ymax + pad)
    ax.set_aspect("equal")
    ax.set_xticks([])
    ax.set_yticks([])
    for s in ax.spines.values():
        s.set_color(_MUTED)
    ax.set_title(f"Layout fitted to the image (arrows {factor:g} × true length)", fontsize=9, loc="left",
                 color=_INK)
    handles = [Line2D([], [], color="#d1005d", linewidth=2.0, label="shift applied")]
    kinds = sorted({a[4] for a in arrows})
    names = {"table": "table refined", "row": "table row refined"}
    handles += [Line2D([], [], color=colours.get(k, _INK), linewidth=1.2, label=names.get(k, f"block, {k}"))
                for k in kinds]
    fig.legend(handles=handles, loc="lower center", ncol=len(handles), frameon=False, fontsize=7)
    return _png(fig, dpi)
