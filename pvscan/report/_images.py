"""Small thermal crops for the anomaly cards, rendered straight to palette PNGs.

A card needs two small images; drawing them with matplotlib would cost a figure each.
Here a crop is quantised once into the colour map's palette (240 levels), scaled with
PIL and outlined with a few reserved palette entries, which keeps every PNG to a few
kilobytes even for long anomaly lists.
"""
from __future__ import annotations

import base64
import io
import math
from collections.abc import Iterable, Iterator, Sequence
from typing import Any

import numpy as np
from PIL import Image, ImageDraw

#: zlib level of the report's PNGs: 6 (zlib's default) is within 1 % of the size of 9 with
#: PIL's optimiser at a third of the time (measured on a 25,000-module report's 78 images).
_PNG_LEVEL = 6

__all__ = ["Palette", "render_crop", "render_schematic", "png_data_uri", "colour_window", "module_window",
           "quantise_png", "quantise_rgb", "figure_palette", "hex_rgb"]

#: Map extent ``(xmin, xmax, ymin, ymax)`` of the pixel edges, in the ortho CRS [m]
#: (matplotlib ``imshow`` order); the one alias of the report's images, rasters and figures.
Extent = tuple[float, float, float, float]
#: An RGB colour, 0..255 each.
RGB = tuple[int, int, int]

_LEVELS = 240
IDX_NAN = 250
IDX_MODULE = 251
IDX_REGION = 252
IDX_NEIGHBOUR = 253
IDX_HALO = 254


class Palette:
    """A matplotlib colour map as a 256-entry PNG palette with reserved outline colours.

    Parameters
    ----------
    cmap_name : str
        A matplotlib colour map (perceptually uniform ones: inferno, magma, cividis ...).
    region_rgb : tuple of int
        Colour of the affected region's outline.
    """

    def __init__(self, cmap_name: str = "inferno", region_rgb: RGB = (49, 215, 255)) -> None:
        import matplotlib

        cmap = matplotlib.colormaps[cmap_name]
        rgb = (np.asarray(cmap(np.linspace(0.0, 1.0, _LEVELS)))[:, :3] * 255).round().astype(np.uint8)
        pal = np.zeros((256, 3), dtype=np.uint8)
        pal[:_LEVELS] = rgb
        pal[IDX_NAN] = (205, 208, 212)
        pal[IDX_MODULE] = (255, 255, 255)
        pal[IDX_REGION] = region_rgb
        pal[IDX_NEIGHBOUR] = (150, 156, 164)
        pal[IDX_HALO] = (0, 0, 0)
        self.name = cmap_name
        self.flat = pal.reshape(-1).tolist()

    def css_gradient(self, stops: int = 11) -> str:
        """The colour map as a CSS ``linear-gradient`` (low temperatures left)."""
        pal = np.asarray(self.flat, dtype=int).reshape(256, 3)[:_LEVELS]
        parts = []
        for k in range(stops):
            i = int(round(k * (_LEVELS - 1) / (stops - 1)))
            r, g, b = pal[i]
            parts.append(f"#{r:02x}{g:02x}{b:02x} {100 * k / (stops - 1):.0f}%")
        return "linear-gradient(to right, " + ", ".join(parts) + ")"

    def indices(self, values: np.ndarray, vmin: float, vmax: float) -> np.ndarray:
        """Palette indices of temperatures [degC] in the window ``vmin..vmax``."""
        span = max(vmax - vmin, 1e-6)
        with np.errstate(invalid="ignore"):
            t = (values - vmin) / span
        idx = np.clip(np.floor(np.nan_to_num(t, nan=0.0) * _LEVELS), 0, _LEVELS - 1).astype(np.uint8)
        idx[~np.isfinite(values)] = IDX_NAN
        return idx


def render_schematic(extent: Extent, size_px: int, *, modules: Iterable[Any] = (), neighbours: Iterable[Any] = (),
                     regions: Iterable[Any] = (), region_rgb: RGB = (209, 0, 93)) -> bytes:
    """A plan of the module(s) and the affected region when no thermal pixels are available.

    Neighbouring modules light grey, the module mid grey with a dark outline, the affected
    region filled in ``region_rgb``. Geometries in map coordinates; ``extent`` as in
    :func:`render_crop`.
    """
    xmin, xmax, ymin, ymax = extent
    scale = size_px / max(xmax - xmin, ymax - ymin)
    w, h = max(1, int(round((xmax - xmin) * scale))), max(1, int(round((ymax - ymin) * scale)))
    img = Image.new("RGB", (w, h), (244, 246, 248))
    draw = ImageDraw.Draw(img)
    for geoms, fill, line in ((neighbours, (222, 226, 231), (190, 196, 204)),
                              (modules, (176, 186, 198), (29, 39, 51)),
                              (regions, tuple(region_rgb), tuple(region_rgb))):
        for geom in geoms:
            for ring in _rings(geom):
                pts = _to_px(ring, extent, (h, w))
                draw.polygon(pts, fill=fill, outline=line)
    for geom in modules:  # the module's outline stays visible over its region
        for ring in _rings(geom):
            draw.line(_to_px(ring, extent, (h, w)), fill=(29, 39, 51), width=1)
    buf = io.BytesIO()
    img.quantize(colors=16, method=Image.Quantize.FASTOCTREE, dither=Image.Dither.NONE).save(
        buf, format="PNG", compress_level=_PNG_LEVEL)
    return buf.getvalue()


def colour_window(values: np.ndarray, percentiles: Sequence[float], min_span: float) -> tuple[float, float]:
    """Colour window [degC] from percentiles of the finite ``values``, at least ``min_span`` wide.

    Returns (nan, nan) when no value is finite.
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return (math.nan, math.nan)
    lo, hi = np.percentile(v, [float(percentiles[0]), float(percentiles[1])])
    if hi - lo < min_span:
        mid = 0.5 * (lo + hi)
        lo, hi = mid - 0.5 * min_span, mid + 0.5 * min_span
    return float(lo), float(hi)


def module_window(values: np.ndarray, *, percentile_hi: float, median_level: float, max_rise: float,
                  min_span: float, top_values: np.ndarray | None = None) -> tuple[float, float]:
    """Close-up colour window [degC] fitted to module pixels.

    The median of ``values`` sits at ``median_level`` of the window; the top reaches the
    ``percentile_hi`` percentile of ``top_values`` (default ``values``), at most
    ``max_rise`` [K] above the median (hotter spots saturate), and the window is at least
    ``min_span`` [K] wide. (nan, nan) without data.
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return (math.nan, math.nan)
    med = float(np.median(v))
    t = v if top_values is None else np.asarray(top_values, dtype=float)
    t = t[np.isfinite(t)]
    top = float(np.percentile(t, percentile_hi)) if t.size else med
    level = min(max(float(median_level), 0.05), 0.95)
    rise = min(max(top - med, (1.0 - level) * min_span), max(max_rise, (1.0 - level) * min_span))
    span = rise / (1.0 - level)
    return med - level * span, med + rise


def _to_px(coords: np.ndarray, extent: Extent, shape: tuple[int, int]) -> list[tuple[float, float]]:
    xmin, xmax, ymin, ymax = extent
    h, w = shape
    cols = (coords[:, 0] - xmin) / (xmax - xmin) * w
    rows = (ymax - coords[:, 1]) / (ymax - ymin) * h
    return list(zip(cols.tolist(), rows.tolist()))


def _rings(geom: Any) -> Iterator[np.ndarray]:
    if geom is None or geom.is_empty:
        return
    if geom.geom_type == "Polygon":
        yield np.asarray(geom.exterior.coords)
    elif hasattr(geom, "geoms"):
        for g in geom.geoms:
            yield from _rings(g)
    elif geom.geom_type in ("LineString", "LinearRing"):
        yield np.asarray(geom.coords)


def render_crop(values: np.ndarray, extent: Extent, palette: Palette, vmin: float, vmax: float, size_px: int,
                *, modules: Iterable[Any] = (), neighbours: Iterable[Any] = (), regions: Iterable[Any] = ()) -> bytes:
    """A thermal crop as PNG bytes, scaled so its longer side is ``size_px``.

    Parameters
    ----------
    values : ndarray (rows, cols)
        Temperatures [degC], NaN for no data.
    extent : (xmin, xmax, ymin, ymax)
        Map extent of the pixel edges [m].
    palette : Palette
    vmin, vmax : float
        Colour window [degC].
    size_px : int
        Longer side of the output image [px].
    modules, neighbours, regions : iterables of shapely geometries in map coordinates
        Outlined in white (the module), grey (other modules) and the region colour
        (the affected cell, substring or module) with a dark halo.
    """
    h, w = values.shape
    scale = size_px / max(h, w)
    out_w, out_h = max(1, int(round(w * scale))), max(1, int(round(h * scale)))
    img_f = Image.fromarray(np.ascontiguousarray(values, dtype=np.float32))
    resample = Image.Resampling.NEAREST if scale >= 1 else Image.Resampling.BOX
    scaled = np.asarray(img_f.resize((out_w, out_h), resample=resample), dtype=np.float32)
    img = Image.fromarray(palette.indices(scaled, vmin, vmax))
    img.putpalette(palette.flat)
    draw = ImageDraw.Draw(img)
    lw = max(1, int(round(size_px / 110)))
    for geom in neighbours:
        for ring in _rings(geom):
            draw.line(_to_px(ring, extent, (out_h, out_w)), fill=IDX_NEIGHBOUR, width=1)
    for geom in modules:
        for ring in _rings(geom):
            draw.line(_to_px(ring, extent, (out_h, out_w)), fill=IDX_MODULE, width=lw)
    for geom in regions:
        for ring in _rings(geom):
            pts = _to_px(ring, extent, (out_h, out_w))
            draw.line(pts, fill=IDX_HALO, width=lw + 2)
            draw.line(pts, fill=IDX_REGION, width=lw)
    buf = io.BytesIO()
    img.save(buf, format="PNG", compress_level=_PNG_LEVEL)
    return buf.getvalue()


def hex_rgb(h: str) -> RGB:
    """``(r, g, b)`` of a ``#rrggbb`` colour."""
    return int(h[1:3], 16), int(h[3:5], 16), int(h[5:7], 16)


def _blend(c1: Any, c2: Any, n: int) -> list[tuple[int, ...]]:
    a, b = np.asarray(c1, float), np.asarray(c2, float)
    return [tuple(int(round(v)) for v in a + (b - a) * t) for t in np.linspace(0.0, 1.0, n)]


def figure_palette(cmap_name: str, accents: Iterable[str] = (), inks: Iterable[str] = ()) -> Image.Image:
    """A fixed 256-colour palette for a map figure: white, each accent colour blended toward
    white and black (marker fills and their anti-aliased edges), a ramp from white to each
    ink (text, lines), and the colour map in the remaining entries."""
    import matplotlib

    cmap = matplotlib.colormaps[cmap_name]
    cols: list[tuple[int, ...]] = [(255, 255, 255)]
    for acc in list(accents):  # 10 entries each
        cols += _blend(hex_rgb(acc), (255, 255, 255), 8)[:-1] + _blend(hex_rgb(acc), (0, 0, 0), 4)[1:]
    for ink in list(inks):  # 12 entries each
        cols += _blend((255, 255, 255), hex_rgb(ink), 13)[1:]
    n_map = 256 - len(cols)
    if n_map < 64:
        raise ValueError("figure_palette: too many accent and ink colours")
    cols += [tuple(int(round(c * 255)) for c in cmap(x)[:3]) for x in np.linspace(0.0, 1.0, n_map)]
    pal = Image.new("P", (1, 1))
    pal.putpalette([v for c in cols for v in c])
    return pal


def quantise_png(png: bytes, palette: Image.Image) -> bytes:
    """Re-encode an RGB(A) PNG (a matplotlib figure) on a fixed palette: about 3x smaller.

    A fixed palette keeps rare colours (small markers) exact, which an adaptive
    quantiser would merge into their neighbours.
    """
    return quantise_rgb(np.asarray(Image.open(io.BytesIO(png)).convert("RGB")), palette)


def quantise_rgb(rgb: np.ndarray, palette: Image.Image) -> bytes:
    """:func:`quantise_png` of an RGB image (height x width x 3, uint8) not yet encoded."""
    rgb = np.asarray(rgb, dtype=np.int32)
    pal = np.asarray((palette.getpalette() or [])[:768], dtype=np.int32).reshape(-1, 3)
    packed = (rgb[..., 0] << 16) | (rgb[..., 1] << 8) | rgb[..., 2]
    uniq, inverse = np.unique(packed.reshape(-1), return_inverse=True)
    ucol = np.stack([(uniq >> 16) & 255, (uniq >> 8) & 255, uniq & 255], axis=1)
    nearest = np.empty(len(uniq), dtype=np.uint8)
    # exact nearest palette entry, in bounded chunks: |c - p|^2 less the row's constant |c|^2,
    # i.e. |p|^2 - 2 c.p, as one matrix product; every term is an integer below 2^53, so the
    # float64 distances are exact and argmin breaks ties as on the integer distances. One BLAS
    # thread: the products are small, and threads only spin on a busy machine
    from threadpoolctl import threadpool_limits

    palf = pal.astype(np.float64)
    pal_sq = (palf ** 2).sum(axis=1)
    with threadpool_limits(limits=1, user_api="blas"):
        for i in range(0, len(uniq), 8192):
            d = pal_sq[None, :] - 2.0 * (ucol[i:i + 8192].astype(np.float64) @ palf.T)
            nearest[i:i + 8192] = np.argmin(d, axis=1)
    q = Image.fromarray(nearest[inverse].reshape(packed.shape))
    q.putpalette(pal.reshape(-1).astype(np.uint8).tolist())
    buf = io.BytesIO()
    q.save(buf, format="PNG", compress_level=_PNG_LEVEL)
    return buf.getvalue()


def png_data_uri(png: bytes) -> str:
    """``data:image/png;base64,...`` for embedding in the HTML."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")
