"""What sunlit glass should look like (Faiman + radiometry), and the candidate test it drives."""
from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
from rasterio.windows import Window

from pvscan.measure.register._blocks import _tile_attr

logger = logging.getLogger(__name__)


def expected_module_apparent_c(flight: Any, pipeline: Any = None, *, strict: bool = True) -> float:
    """Apparent temperature of sunlit module glass at the flight's conditions [degC].

    The true temperature follows the Faiman model, ``T = T_air + G / (u0 + u1 v)``
    (``G`` the plane-of-array irradiance [W/m2], ``v`` the wind speed [m/s], ``u0``,
    ``u1`` of the ``[reference]`` section), at the flight's mean conditions
    (:func:`pvscan.measure.conditions.flight_conditions`); it is turned into what the export
    reports with :func:`pvscan.physics.radiometry.apparent_from_true` and the keywords of
    :func:`pvscan.physics.radiometry.flight_radiometry` (module emissivity, reflected sky, the
    export's emissivity and reflected temperature, air path).

    Parameters
    ----------
    flight : Flight
        From :func:`pvscan.io.manifest.load_flight`.
    pipeline : Pipeline, optional
        Its ``[conditions]``, ``[reference]`` (``u0``, ``u1``) and ``[radiometry]``
        sections are used; default :func:`pvscan.io.settings.load_pipeline`.
    strict : bool
        When False, a flight without usable conditions gives NaN (which switches the
        plausibility test of :func:`estimate_shift` off) instead of raising.

    Returns
    -------
    float
        [degC]

    Raises
    ------
    ConditionsError
        With ``strict``, when the flight gives neither constants nor a series for
        irradiance, air temperature and wind.

    References
    ----------
    .. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic
       modules", Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    if not strict:
        from pvscan.errors import PvscanError

        try:
            return expected_module_apparent_c(flight, pipeline, strict=True)
        except (PvscanError, AttributeError, TypeError, ValueError) as exc:
            logger.info("register: no expected module temperature for the plausibility test (%s)", exc)
            return float("nan")
    import pandas as pd

    from pvscan.diagnose.thermal import U0_FAIMAN, U1_FAIMAN
    from pvscan.measure.conditions import flight_conditions
    from pvscan.physics import radiometry

    if pipeline is None:
        from pvscan.io.settings import load_pipeline

        pipeline = load_pipeline()

    def section(name: str) -> Any:
        try:
            return pipeline[name]
        except (KeyError, TypeError):
            return {}

    fc = flight_conditions(flight.conditions, flight.flight.start, flight.flight.end,
                           settings=section("conditions"))
    ref = section("reference")
    u = float(ref.get("u0", U0_FAIMAN)) + float(ref.get("u1", U1_FAIMAN)) * float(fc.wind_speed)
    t_true = float(fc.temp_air) + float(fc.poa_global) / u
    rh = fc.relative_humidity
    cond = pd.DataFrame({"temp_air": [float(fc.temp_air)], "temp_sky": [float(fc.temp_sky)],
                         "relative_humidity": [float("nan") if rh is None else float(rh)]})
    kw = radiometry.flight_radiometry(flight, cond, section("radiometry") or None)
    kw = {k: (float(np.asarray(v).reshape(-1)[0]) if k != "band_um" and np.ndim(v) else v) for k, v in kw.items()}
    return float(np.asarray(radiometry.apparent_from_true(t_true, **kw)).reshape(-1)[0])




def _module_samples(orthos: Any, tiles: list[Any], geoms: np.ndarray,
                    cfg: Mapping[str, Any]) -> list[tuple[Any, ...]]:
    """Sample points inside a subset of module footprints and one windowed read each.

    Returns a list of ``(x, y, tile_index, transform, col_off, row_off, array)`` [m, px]."""
    import shapely

    n = len(geoms)
    if n == 0:
        return []
    k = min(n, int(cfg["plausibility_modules"]))
    idx = np.unique(np.linspace(0, n - 1, k).round().astype(int))
    g = geoms[idx]
    area = shapely.area(g)
    perim = shapely.length(g)
    # inset: a fraction of the footprint's inscribed half-width 2A/P (w l / (w + l) for a
    # w x l rectangle), so the points stay on the glass at a slightly wrong shift
    inset = float(cfg["plausibility_inset"]) * np.where(perim > 0, 2.0 * area / np.maximum(perim, 1e-12), 0.0)
    inner = shapely.buffer(g, -inset)
    reach = float(cfg["max_shift_m"]) + 0.5  # candidates lie within the search radius
    bounds = [(_tile_attr(t, "bounds"), _tile_attr(t, "transform"), int(_tile_attr(t, "width")),
               int(_tile_attr(t, "height"))) for t in tiles]
    out = []
    grid = (np.arange(9) + 0.5) / 9.0
    for poly in inner:
        if poly is None or shapely.is_empty(poly):
            continue
        x0, y0, x1, y1 = shapely.bounds(poly)
        gx, gy = np.meshgrid(x0 + grid * (x1 - x0), y0 + grid * (y1 - y0))
        gx, gy = gx.ravel(), gy.ravel()
        inside = shapely.contains_xy(poly, gx, gy)
        if inside.sum() < 3:
            continue
        gx, gy = gx[inside], gy[inside]
        cx, cy = float(gx.mean()), float(gy.mean())
        ti = next((k for k, ((bx0, by0, bx1, by1), _, _, _) in enumerate(bounds)
                   if bx0 <= cx <= bx1 and by0 <= cy <= by1), None)
        if ti is None:
            continue
        _, tr, w, h = bounds[ti]
        inv = ~tr
        cols, rows = zip(*(inv @ (xx, yy) for xx in (x0 - reach, x1 + reach) for yy in (y0 - reach, y1 + reach)))
        c0, c1 = max(0, int(math.floor(min(cols)))), min(w, int(math.ceil(max(cols))))
        r0, r1 = max(0, int(math.floor(min(rows)))), min(h, int(math.ceil(max(rows))))
        if c1 - c0 < 1 or r1 - r0 < 1:
            continue
        arr = np.asarray(orthos.read(ti, Window(c0, r0, c1 - c0, r1 - r0)), dtype=np.float64)
        if arr.ndim == 3:
            arr = arr[0]
        out.append((gx, gy, tr, c0, r0, arr))
    return out


def _median_at(samples: list[tuple[Any, ...]], shift: tuple[float, float]) -> tuple[float, int]:
    """Median over the sampled modules of each module's median apparent temperature
    with the footprints moved by ``shift`` [degC], and the number of modules measured."""
    meds = []
    for gx, gy, tr, c0, r0, arr in samples:
        inv = ~tr
        xs, ys = gx + shift[0], gy + shift[1]
        cols = inv.a * xs + inv.b * ys + inv.c
        rows = inv.d * xs + inv.e * ys + inv.f
        ci = np.floor(np.asarray(cols)).astype(int) - c0
        ri = np.floor(np.asarray(rows)).astype(int) - r0
        ok = (ci >= 0) & (ri >= 0) & (ci < arr.shape[1]) & (ri < arr.shape[0])
        v = arr[ri[ok], ci[ok]]
        v = v[np.isfinite(v)]
        if v.size * 2 >= gx.size:
            meds.append(float(np.median(v)))
    if len(meds) < 3:
        return float("nan"), len(meds)
    return float(np.median(meds)), len(meds)


def _shift_clusters(blocks: list[Any], phys_all: list[Any], to_m: Callable[..., tuple[float, float]],
                    radius_m: float) -> list[tuple[tuple[float, float], float]]:
    """Candidate shifts of all blocks grouped within ``radius_m``: ``[(centre, score)]``,
    score = SNR-weighted mean over the blocks of the relative peak height (0 where a block
    has no candidate in the group), best first."""
    pts = []
    weights = []
    for i, (bd, (ext, med, snr, ok)) in enumerate(zip(blocks, phys_all)):
        wb = max(float(snr), 1e-3) if ok else 1e-3
        weights.append(wb)
        top = ext[0][2] - med
        if top <= 0:
            continue
        for c in ext:
            m = to_m(bd, c[3], c[4])
            pts.append((m[0], m[1], (c[2] - med) / top, wb, i))
    pts.sort(key=lambda p: -p[2] * p[3])
    clusters: list[dict[str, Any]] = []
    for x, y, h, wb, i in pts:
        for cl in clusters:
            if math.hypot(x - cl["x"], y - cl["y"]) <= radius_m:
                if i not in cl["h"]:
                    cl["h"][i] = (h, wb)
                    cl["sx"] += x * h * wb
                    cl["sy"] += y * h * wb
                    cl["sw"] += h * wb
                break
        else:
            clusters.append({"x": x, "y": y, "h": {i: (h, wb)}, "sx": x * h * wb, "sy": y * h * wb,
                             "sw": h * wb})
    total = float(sum(weights))
    out = []
    for cl in clusters:
        score = sum(h * wb for h, wb in cl["h"].values()) / total
        c = (cl["sx"] / cl["sw"], cl["sy"] / cl["sw"]) if cl["sw"] > 0 else (cl["x"], cl["y"])
        out.append((c, float(score)))
    out.sort(key=lambda t: -t[1])
    return out


def _plausibility(orthos: Any, tiles: list[Any], geoms: np.ndarray, blocks: list[Any], phys_all: list[Any],
                  to_m: Callable[..., tuple[float, float]], fitted: tuple[float, float], expected_c: float,
                  cfg: Mapping[str, Any],
                  cache: dict[Any, Any] | None = None) -> tuple[str, tuple[tuple[float, float], float] | None]:
    """Test the fitted shift against the other candidate shifts by the module glass's
    apparent temperature; returns ``(note, switch)`` with ``switch = (centre, factor)``
    when another candidate is clearly more plausible, else None. ``cache`` (the block
    correlation's, shared by its passes over one layout) keeps the module samples, which do
    not depend on the block size: read once for all passes."""
    radius = float(cfg["reject_m"])
    ratio = float(cfg["plausibility_ratio"])
    clusters = _shift_clusters(blocks, phys_all, to_m, radius)
    cands = []
    for c, score in clusters:
        if math.hypot(c[0] - fitted[0], c[1] - fitted[1]) <= radius:
            continue
        near_zero = math.hypot(*c) <= radius
        if score >= ratio or near_zero:
            cands.append((c, score))
        if len(cands) >= int(cfg["plausibility_candidates"]):
            break
    if not cands:
        return "", None
    key = ("plausibility_samples", len(geoms), int(cfg["plausibility_modules"]), float(cfg["plausibility_inset"]),
           float(cfg["max_shift_m"]))
    samples = cache.get(key) if cache is not None else None
    if samples is None:
        samples = _module_samples(orthos, tiles, geoms, cfg)
        if cache is not None:
            cache[key] = samples
    t_fit, n_fit = _median_at(samples, fitted)
    if not math.isfinite(t_fit):
        return "plausibility test skipped: too few modules sampled", None
    margin = float(cfg["plausibility_margin_k"])
    d_fit = abs(t_fit - expected_c)
    tested = []
    for c, score in cands:
        t_c, _ = _median_at(samples, c)
        if math.isfinite(t_c):
            tested.append((c, abs(t_c - expected_c), t_c, score))
    head = (f"plausibility: modules at the fitted shift ({fitted[0]:+.2f}, {fitted[1]:+.2f}) m read "
            f"{t_fit:.1f} degC (median of {n_fit}), expected {expected_c:.1f} degC for sunlit glass")
    # candidates clearly more plausible than the fit and plausible in themselves
    better = [t for t in tested if d_fit - t[1] > margin and t[1] <= float(cfg["plausibility_max_error_k"])]
    if not better:
        return head + "; fit kept", None
    # among those the temperature cannot tell apart (e.g. one module pitch along a row:
    # glass either way), the correlation decides
    d_min = min(t[1] for t in better)
    tied = sorted((t for t in better if t[1] <= d_min + 0.5 * margin), key=lambda t: -t[3])
    c, d_c, t_c, score = tied[0]
    factor = min(max((d_fit - d_c) / (2.0 * margin), 0.0), 1.0)
    # a rival the temperature cannot tell apart, scoring nearly as well, leaves the
    # choice ambiguous: the confidence falls with the correlation's own distinctness
    rivals = [t[3] for t in tied[1:] if math.hypot(t[0][0] - c[0], t[0][1] - c[1]) > radius]
    if rivals and score > 0:
        factor *= min(max((1.0 - max(rivals) / score) / float(cfg["distinct_full"]), 0.0), 1.0)
    note = (f"{head}; candidate ({c[0]:+.2f}, {c[1]:+.2f}) m (correlation score {score:.2f} of the best) "
            f"reads {t_c:.1f} degC and was taken instead")
    return note, (c, factor)

# --------------------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------------------


def site_lonlat(modules: Any) -> tuple[float, float]:
    """WGS84 (lon, lat) [deg] of the plant's centroid, used by the pipeline and `pvscan align`: the area-weighted
    mean of the footprint centroids (that of their union when they do not overlap; no union of
    thousands of outlines is built)."""
    import shapely
    from pyproj import Transformer

    geoms = modules.geometry.to_numpy()
    area = shapely.area(geoms)
    c = shapely.get_coordinates(shapely.centroid(geoms))
    x, y = (float(np.sum(c[:, k] * area) / np.sum(area)) for k in (0, 1))
    lon, lat = Transformer.from_crs(modules.crs, 4326, always_xy=True).transform(x, y)
    return float(lon), float(lat)
