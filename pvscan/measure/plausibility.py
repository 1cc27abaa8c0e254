"""Plausibility of what the ortho holds, before any statistics.

A thermal orthomosaic exported in kelvin, in degrees Fahrenheit or as raw sensor counts,
read with a manifest that says degrees Celsius (or the reverse), gives numbers that are no
temperature of sunlit glass: 300 "degC", 117 degC on a 26 degC day, 30,000 "degC". Read
as they are, they either fall outside the plausible range of ``io/ortho.py`` (every module
"outside the ortho") or make every finding a safety case. :func:`check_ortho_values`
reads the raw values at a sample of module centres, converts them as the manifest says,
and compares them with the apparent temperature sunlit glass should show at the flight's
conditions (Faiman + radiometry, :func:`pvscan.measure.register.expected_module_apparent_c`);
when they are far off it names the reading that fits (kelvin, degF, counts) in a one-line
error. No layout module on the ortho, or no usable pixel under the layout, is an error too.
"""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
from rasterio.windows import Window

from pvscan._typing import FloatArray
from pvscan.errors import OrthoError

if TYPE_CHECKING:
    import geopandas as gpd

    from pvscan.io.ortho import OrthoSet

__all__ = ["check_ortho_values", "ortho_value_sample"]

logger = logging.getLogger(__name__)

#: 0 degC in kelvin [K] (SI definition of the Celsius scale).
KELVIN = 273.15
#: Scales of raw radiometric counts in common use: (scale, offset, unit label)
#: (common practice: centi-kelvin, deci-kelvin and 0.04 K counts; centi/deci-degC).
_COUNT_READINGS = ((0.01, -KELVIN, "0.01 K"), (0.1, -KELVIN, "0.1 K"), (0.04, -KELVIN, "0.04 K"),
                   (0.01, 0.0, "0.01 degC"), (0.1, 0.0, "0.1 degC"))


def ortho_value_sample(orthos: OrthoSet, modules: gpd.GeoDataFrame, *, n: int,
                       window_m: float) -> tuple[FloatArray, FloatArray, int, int]:
    """Raw values around up to ``n`` module centres, converted as the manifest says.

    Returns
    -------
    (values, raw, n_on_ortho, tile)
        ``values`` [degC as configured] and ``raw`` of the valid pixels (nodata, NaN and
        masked pixels left out, but *no* plausible-range test), the number of layout
        modules whose centre lies on a tile, and the tile most of them lie on.
    """
    import shapely

    geoms = np.asarray(modules.geometry.values, dtype=object)
    c = shapely.centroid(geoms)
    cx, cy = shapely.get_x(c), shapely.get_y(c)
    tiles = list(orthos.tiles)
    which = np.full(len(geoms), -1)
    for ti, t in enumerate(tiles):
        b = t.bounds
        inside = (which < 0) & (cx >= b.left) & (cx <= b.right) & (cy >= b.bottom) & (cy <= b.top)
        which[inside] = ti
    on = np.nonzero(which >= 0)[0]
    if len(on) == 0:
        return np.zeros(0), np.zeros(0), 0, -1
    pick = on if len(on) <= n else on[np.linspace(0, len(on) - 1, n).round().astype(int)]
    vals, raws = [], []
    for i in pick:
        t = tiles[which[i]]
        half = max(1, int(round(window_m / (2.0 * t.gsd_m))))
        col, row = ~t.transform * (cx[i], cy[i])
        c0, r0 = max(0, int(col) - half), max(0, int(row) - half)
        c1, r1 = min(t.width, int(col) + half + 1), min(t.height, int(row) + half + 1)
        if c1 <= c0 or r1 <= r0:
            continue
        raw = np.asarray(orthos.read_raw(int(which[i]), Window(c0, r0, c1 - c0, r1 - r0)), dtype=np.float64).ravel()
        ok = np.isfinite(raw)
        if t.nodata is not None and not math.isnan(t.nodata):
            ok &= raw != t.nodata
        raw = raw[ok]
        raws.append(raw)
        vals.append(raw * t.scale + t.offset_c)
    tile = int(np.bincount(which[on]).argmax())
    if not vals:
        return np.zeros(0), np.zeros(0), len(on), tile
    return np.concatenate(vals), np.concatenate(raws), len(on), tile


def check_ortho_values(orthos: OrthoSet, modules: gpd.GeoDataFrame, *, units: str, scale: float, expected_c: float,
                       settings: Mapping[str, Any] | None = None, manifest: str = "flight.toml",
                       integer_raw: bool | None = None) -> dict:
    """Fail with a one-line error when the ortho's values cannot be glass temperatures.

    Parameters
    ----------
    orthos : OrthoSet
    modules : geopandas.GeoDataFrame
        Layout modules in the ortho CRS.
    units, scale : str, float
        ``[ortho] units`` and ``scale`` of the manifest.
    expected_c : float
        Apparent temperature sunlit glass should show [degC]; NaN when the flight has no
        conditions (then the range ``[validity] ortho_min_c .. ortho_max_c`` is used).
    settings : mapping, optional
        The ``[validity]`` section (or a pipeline).
    manifest : str
        Name of the manifest, for the message.

    Returns
    -------
    dict
        ``median_c``, ``p5_c``, ``p95_c`` [degC], ``expected_c``, ``modules_on_ortho``.

    Raises
    ------
    OrthoError
        No layout module on the ortho; no usable pixel under the layout; values that are no
        glass temperature (with the reading that fits, when one does).
    """
    from pvscan.io.settings import section

    st = section(settings, "validity")
    vals, raw, n_on, tile = ortho_value_sample(orthos, modules, n=int(st["ortho_sample_modules"]),
                                               window_m=float(st["ortho_window_m"]))
    files = ", ".join(str(t.path) for t in orthos.tiles)
    if n_on == 0:
        raise OrthoError(f"{files}: no module of the layout lies on the ortho (check the layout's position and CRS)")
    path = orthos.tiles[tile].path
    if len(vals) == 0:
        raise OrthoError(f"{path}: no usable pixel under the layout's modules (every pixel sampled is nodata)")
    p5, med, p95 = (float(v) for v in np.percentile(vals, [5, 50, 95]))
    out = {"median_c": med, "p5_c": p5, "p95_c": p95, "expected_c": expected_c, "modules_on_ortho": n_on}
    has_exp = expected_c is not None and math.isfinite(float(expected_c))
    lo, hi = float(st["ortho_min_c"]), float(st["ortho_max_c"])

    def fits(t: float) -> bool:
        if has_exp:
            return abs(t - float(expected_c)) <= float(st["ortho_hypothesis_k"])
        return lo <= t <= hi

    if (abs(med - float(expected_c)) <= float(st["ortho_error_k"])) if has_exp else (lo <= med <= hi):
        return out
    shown = f"values {p5:.0f}-{p95:.0f}" if p95 - p5 >= 1 else f"values about {med:.0f}"
    key = f"{manifest} [ortho]"
    fix = None
    if units == "celsius" and fits(med - KELVIN):
        fix = f'{shown} look like kelvin; set [ortho] units = "kelvin" in {manifest}'
    elif units == "kelvin" and fits(med + KELVIN):
        fix = (f"{shown} (after the kelvin conversion) look like degrees Celsius; "
               f'set [ortho] units = "celsius" in {manifest}')
    elif fits((med - 32.0) / 1.8):
        fix = (f"{shown} look like degrees Fahrenheit; export the ortho in degrees Celsius, or set [ortho] "
               f"scale = {scale / 1.8:.6g} and offset = {-32.0 / 1.8:.4f} in {manifest}")
    else:
        rmed = float(np.median(raw))
        is_int = bool(np.all(np.equal(np.mod(raw[: 10000], 1.0), 0.0))) if integer_raw is None else integer_raw
        if scale == 1.0 and is_int and rmed > 1000:
            for sc, off, lab in _COUNT_READINGS:
                if fits(rmed * sc + off):
                    unit_kw = 'units = "kelvin", ' if off else ""
                    fix = (f"{shown} look like raw sensor counts of {lab}; set [ortho] {unit_kw}scale = {sc:g} "
                           f"in {manifest}")
                    break
            if fix is None:
                fix = f"{shown} look like raw sensor counts; set [ortho] scale and offset in {manifest}"
    if fix is None:
        what = (f"the {float(expected_c):.0f} degC sunlit glass should show at the flight's conditions" if has_exp
                else f"the {lo:g}..{hi:g} degC of module glass")
        fix = f"{shown} degC under the layout are far from {what}; check {key} units, scale and offset"
    raise OrthoError(f"{path}: {fix}")
