"""Writers of a simulated flight: orthos, layout, manifest, weather, frames, truth, preview."""
from __future__ import annotations

import csv
import json
import math
from collections.abc import Mapping, Sequence
from datetime import timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from pvscan._typing import FloatArray, ProgressFn
from pvscan.simulate.optics import relief_image

if TYPE_CHECKING:
    from pyproj import Transformer

    from pvscan.simulate.geometry import Field
    from pvscan.simulate.layout_error import LayoutError
    from pvscan.simulate.scene import Scene
    from pvscan.simulate.truth import ModuleTruth

#: A GeoJSON ring: [[lon, lat], ...], closed.
Ring = list[list[float]]

__all__ = ["write_orthos", "write_layout", "write_manifest", "write_weather", "write_frames",
           "write_truth", "toml_dumps"]

_KELVIN = 273.15


# ----------------------------------------------------------------------------- TOML
def _toml_value(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v) or math.isinf(v):
            raise ValueError("TOML cannot hold NaN/inf here")
        return repr(float(v))
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def toml_dumps(data: Mapping[str, Mapping[str, Any]], header: str = "") -> str:
    """A TOML document of tables of scalars/lists (enough for a manifest)."""
    lines = [f"# {h}" if h else "#" for h in header.splitlines()] if header else []
    for table, items in data.items():
        lines.append("")
        lines.append(f"[{table}]")
        for k, v in items.items():
            if v is None:
                continue
            lines.append(f"{k} = {_toml_value(v)}")
    return "\n".join(lines).lstrip("\n") + "\n"


# ----------------------------------------------------------------------------- orthos
def _tile_windows(width: int, height: int, tiles: Sequence[int],
                  overlap_px: int) -> list[tuple[int, int, int, int, int, int]]:
    nc, nr = int(tiles[0]), int(tiles[1])
    ce = np.linspace(0, width, nc + 1).round().astype(int)
    re = np.linspace(0, height, nr + 1).round().astype(int)
    out = []
    for r in range(nr):
        for c in range(nc):
            c0 = max(0, ce[c] - (overlap_px // 2 if c else 0))
            c1 = min(width, ce[c + 1] + (overlap_px // 2 if c < nc - 1 else 0))
            r0 = max(0, re[r] - (overlap_px // 2 if r else 0))
            r1 = min(height, re[r + 1] + (overlap_px // 2 if r < nr - 1 else 0))
            out.append((r, c, r0, r1, c0, c1))
    return out


def write_orthos(scene: Scene, out_dir: Path, progress: ProgressFn | None = None
                 ) -> tuple[list[str], dict[str, Any], npt.NDArray[np.float32]]:
    """Render the ortho block by block and write the GeoTIFF tile(s).

    Returns
    -------
    names : list of str
        File names of the tiles.
    ortho_keys : dict
        The manifest's ``[ortho]`` table.
    preview : ndarray
        Downsampled final image [degC] (NaN = nodata) for the quick-look.
    """
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    sc = scene.sc
    ex, orth = sc["export"], sc["ortho"]
    units = ex["units"]
    nodata: float
    if units == "raw":
        dtype, nodata = "uint16", 0
        scale, offset, m_units = float(ex["raw_scale"]), 0.0, "kelvin"
    else:
        dtype, nodata = "float32", float(ex["nodata"])
        scale, offset, m_units = 1.0, 0.0, units
    overlap_px = int(round(float(orth["tile_overlap_m"]) / scene.gsd))
    wins = _tile_windows(scene.width, scene.height, orth["tiles"], overlap_px)
    single = len(wins) == 1
    names, dsts = [], []
    for (r, c, r0, r1, c0, c1) in wins:
        name = "thermal.tif" if single else f"thermal_r{r + 1}c{c + 1}.tif"
        profile = dict(driver="GTiff", width=c1 - c0, height=r1 - r0, count=1, dtype=dtype,
                       crs=f"EPSG:{scene.field.epsg}",
                       transform=from_origin(scene.x0 + c0 * scene.gsd, scene.y1 - r0 * scene.gsd,
                                             scene.gsd, scene.gsd),
                       nodata=nodata, tiled=True, blockxsize=256, blockysize=256, compress="deflate")
        if profile["width"] < 256 or profile["height"] < 256:
            profile.pop("tiled"), profile.pop("blockxsize"), profile.pop("blockysize")
        dst = rasterio.open(out_dir / name, "w", **profile)
        dst.update_tags(1, units=m_units, scale=str(scale), offset=str(offset))
        names.append(name)
        dsts.append((dst, r0, r1, c0, c1))

    block = int(orth["block_px"])
    f = max(1, int(math.ceil(max(scene.width, scene.height) / float(orth["preview_px"]))))
    preview = np.full((int(math.ceil(scene.height / f)), int(math.ceil(scene.width / f))), np.nan, np.float32)
    n_blocks = int(math.ceil(scene.height / block)) * int(math.ceil(scene.width / block))
    done = 0
    try:
        for br in range(0, scene.height, block):
            for bc in range(0, scene.width, block):
                nr = min(block, scene.height - br)
                nc = min(block, scene.width - bc)
                img = scene.render_block(br, bc, nr, nc)
                rows = np.arange(br, br + nr)
                cols = np.arange(bc, bc + nc)
                rs, cs = rows[rows % f == 0], cols[cols % f == 0]
                preview[np.ix_(rs // f, cs // f)] = img[np.ix_(rs - br, cs - bc)]
                if units == "kelvin":
                    data = img + _KELVIN
                elif units == "raw":
                    data = np.round((img + _KELVIN - offset) / scale)
                else:
                    data = img
                data = np.where(np.isnan(img), nodata, data).astype(dtype)
                for dst, r0, r1, c0, c1 in dsts:
                    rr0, rr1 = max(br, r0), min(br + nr, r1)
                    cc0, cc1 = max(bc, c0), min(bc + nc, c1)
                    if rr0 >= rr1 or cc0 >= cc1:
                        continue
                    dst.write(data[rr0 - br:rr1 - br, cc0 - bc:cc1 - bc], 1,
                              window=Window(cc0 - c0, rr0 - r0, cc1 - cc0, rr1 - rr0))
                done += 1
                if progress is not None:
                    progress("render", done, n_blocks)
    finally:
        for dst, *_ in dsts:
            dst.close()
    ortho_keys = {"units": m_units, "scale": scale, "offset": offset, "nodata": nodata,
                  "emissivity": float(ex["emissivity"]), "reflected_c": float(ex["reflected_c"])}
    return names, ortho_keys, preview


def write_preview(preview: npt.NDArray[np.floating[Any]], path: Path, title: str = "") -> None:
    """Quick-look PNG of the ortho, perceptual colour map (matplotlib 'inferno')."""
    from matplotlib.figure import Figure

    finite = preview[np.isfinite(preview)]
    lo, hi = (np.percentile(finite, [1.0, 99.8]) if finite.size else (0.0, 1.0))
    h, w = preview.shape
    dpi = 100
    fig = Figure(figsize=(max(4.0, w / dpi + 1.4), max(3.0, h / dpi + 0.6)), dpi=dpi)
    ax = fig.add_axes((0.02, 0.04, 0.82, 0.9))
    im = ax.imshow(np.ma.masked_invalid(preview), cmap="inferno", vmin=lo, vmax=hi, interpolation="nearest")
    ax.set_axis_off()
    if title:
        ax.set_title(title, fontsize=9)
    cax = fig.add_axes((0.87, 0.1, 0.03, 0.78))
    fig.colorbar(im, cax=cax, label="apparent temperature [degC]")
    fig.savefig(path)


# ----------------------------------------------------------------------------- vectors
def _to_lonlat(epsg: int) -> Transformer:
    from pyproj import Transformer

    return Transformer.from_crs(f"EPSG:{epsg}", "EPSG:4326", always_xy=True)


def _ring(tr: Transformer, xy: FloatArray) -> Ring:
    lon, lat = tr.transform(xy[:, 0], xy[:, 1])
    pts = [[round(float(a), 9), round(float(b), 9)] for a, b in zip(lon, lat)]
    pts.append(pts[0])
    # RFC 7946: exterior rings counter-clockwise
    area = sum(p[0] * q[1] - q[0] * p[1] for p, q in zip(pts[:-1], pts[1:]))
    return pts if area > 0 else pts[::-1]


def _table_corners(fld: Field, err: LayoutError) -> list[tuple[str, FloatArray]]:
    out = []
    for tr in range(fld.n_trows):
        for tb in range(fld.n_tables):
            s0, w0 = tb * fld.table_step, tr * fld.pitch
            s = np.array([s0, s0 + fld.table_len, s0 + fld.table_len, s0])
            w = np.array([w0, w0, w0 + fld.table_depth, w0 + fld.table_depth])
            x, y = fld.to_map(s, w)
            i = int(fld.lut[tr, tb, 0, 0])
            out.append((fld.modules["table_id"][i], err.apply(np.stack([x, y], axis=1), tr * fld.n_tables + tb)))
    return out


def drawn_corners(scene: Scene) -> FloatArray:
    """Module corners as the layout draws them, (n, 4, 2) in the ortho CRS [m]."""
    m = scene.field.modules
    return scene.layout_error.apply(m["corners"], m["trow"] * scene.field.n_tables + m["table"])


def ortho_corners(scene: Scene) -> FloatArray:
    """Module corners where the ortho shows them, (n, 4, 2) in the ortho CRS [m]: the true
    corners, displaced by relief when the ortho's surface model misses part of the tables'
    height (``ortho.relief_height_fraction``; :func:`pvscan.simulate.optics.relief_image`)."""
    corners = np.asarray(scene.field.modules["corners"], float)
    f = float(scene.relief_fraction)
    if f <= 0:
        return corners
    fld, sh = scene.field, scene.shadow
    # heights taken 1 mm inside each corner (a corner on a row's lower edge is in that row)
    centre = corners.mean(axis=1, keepdims=True)
    d = centre - corners
    inner = corners + 1e-3 * d / np.maximum(np.hypot(d[..., :1], d[..., 1:]), 1e-9)
    s, w = fld.to_field(inner[..., 0], inner[..., 1])
    h = f * (sh.table_z(s, w) - sh.ground_z(s, w))
    s_c, w_c = fld.to_field(*np.mean(scene.plan.centres, axis=0))
    alt = scene.altitude_m - (sh.ground_z(s, w) - sh.ground_z(s_c, w_c))
    px, py = relief_image(corners[..., 0], corners[..., 1], h, alt, scene.frames)
    return np.stack([px, py], axis=-1)


def write_truth_ortho(scene: Scene, out_dir: Path) -> str:
    """``truth_ortho.geojson``: the true module polygons as they stand in the ortho (relief
    displacement included, :func:`ortho_corners`), in the ortho's CRS (a GeoJSON 2008 ``crs``
    member names it), with module_id and table_id."""
    fld = scene.field
    m = fld.modules
    corners = ortho_corners(scene)
    feats = []
    for i in range(fld.n_modules):
        ring = [[round(float(x), 4), round(float(y), 4)] for x, y in corners[i]]
        ring.append(ring[0])
        feats.append({"type": "Feature", "properties": {"module_id": m["module_id"][i], "table_id": m["table_id"][i]},
                      "geometry": {"type": "Polygon", "coordinates": [ring]}})
    name = "truth_ortho.geojson"
    crs = {"type": "name", "properties": {"name": f"urn:ogc:def:crs:EPSG::{fld.epsg}"}}
    with open(out_dir / name, "w", encoding="utf-8") as fh:
        fh.write(json.dumps({"type": "FeatureCollection", "crs": crs, "features": feats}))
    return name


def write_layout(scene: Scene, out_dir: Path) -> str:
    """Write the layout as drawn (with the errors of :mod:`pvscan.simulate.layout_error`);
    returns the file name."""
    sc = scene.sc
    lay = sc["layout"]
    fld = scene.field
    m = fld.modules
    drawn = drawn_corners(scene)
    fmt = lay["format"]
    tables = lay["features"] == "tables"
    records = []
    if tables:
        for tid, xy in _table_corners(fld, scene.layout_error):
            records.append(({"table_id": tid, "rows": fld.rows, "cols": fld.cols,
                             "orientation": sc["array"]["orientation"]}, xy))
    else:
        for i in range(fld.n_modules):
            props = {"module_id": m["module_id"][i], "table_id": m["table_id"][i]}
            if lay["strings"]:
                props["string_id"] = m["string_id"][i]
                props["string_index"] = int(m["string_index"][i])
            records.append((props, drawn[i]))
    if fmt == "geojson":
        tr = _to_lonlat(fld.epsg)
        feats = [{"type": "Feature", "properties": p, "geometry": {"type": "Polygon", "coordinates": [_ring(tr, xy)]}}
                 for p, xy in records]
        name = "layout.geojson"
        with open(out_dir / name, "w", encoding="utf-8") as fh:
            fh.write(json.dumps({"type": "FeatureCollection", "features": feats}))
        return name
    import geopandas as gpd
    from shapely.geometry import Polygon

    rows = [dict(p) for p, _ in records]
    if fmt == "shp":
        for p in rows:
            if "string_index" in p:
                p["string_idx"] = p.pop("string_index")
            if "orientation" in p:
                p["orientatn"] = p.pop("orientation")
    gdf = gpd.GeoDataFrame(rows, geometry=[Polygon(xy) for _, xy in records], crs=f"EPSG:{fld.epsg}")
    name = "layout.gpkg" if fmt == "gpkg" else "layout.shp"
    gdf.to_file(out_dir / name, engine="pyogrio")
    return name


def write_frames(scene: Scene, out_dir: Path) -> str:
    """Camera frame footprints with their ``time`` (ISO 8601), RFC 7946 lon/lat."""
    tr = _to_lonlat(scene.field.epsg)
    feats = []
    for k, (xy, t) in enumerate(zip(scene.plan.corners, scene.plan.times_s)):
        feats.append({"type": "Feature",
                      "properties": {"frame": k + 1, "time": (scene.start + timedelta(seconds=float(t))).isoformat()},
                      "geometry": {"type": "Polygon", "coordinates": [_ring(tr, xy)]}})
    name = "frames.geojson"
    with open(out_dir / name, "w", encoding="utf-8") as fh:
        fh.write(json.dumps({"type": "FeatureCollection", "features": feats}))
    return name


def write_weather(scene: Scene, out_dir: Path) -> str:
    """Weather series (time, poa_irradiance_w_m2, ambient_c, wind_m_s) as CSV."""
    w = scene.weather
    name = "weather.csv"
    with open(out_dir / name, "w", newline="", encoding="utf-8") as fh:
        wr = csv.writer(fh)
        wr.writerow(["time", "poa_irradiance_w_m2", "ambient_c", "wind_m_s"])
        for t, g, ta, v in zip(w.times_s, w.poa_global, w.temp_air, w.wind_speed):
            wr.writerow([(scene.start + timedelta(seconds=float(t))).isoformat(), f"{g:.1f}", f"{ta:.2f}", f"{v:.2f}"])
    return name


def write_manifest(scene: Scene, out_dir: Path, orthos: Sequence[str], ortho_keys: dict[str, Any],
                   layout_name: str, frames_name: str | None, weather_name: str | None) -> str:
    """Write ``flight.toml`` following the flight manifest contract."""
    sc = scene.sc
    site, fl, cond, mod, arr = sc["site"], sc["flight"], sc["conditions"], sc["module"], sc["array"]
    data: dict[str, dict[str, Any]] = {
        "site": {"name": site["name"], "id": site.get("id"),
                 "specific_yield_kwh_per_kwp": float(site["specific_yield_kwh_per_kwp"]),
                 "tariff_per_kwh": float(site["tariff_per_kwh"]), "currency": site["currency"]},
        "flight": {"id": fl.get("id"), "orthos": list(orthos), "layout": layout_name,
                   "start": scene.start.isoformat(), "end": scene.end.isoformat(),
                   "frames": frames_name, "altitude_m": float(fl["altitude_m"])},
        "ortho": ortho_keys,
        "conditions": {},
        "module": {k: mod[k] for k in ("model", "pmax_w", "gamma_pmax_pct_per_k", "width_m", "length_m",
                                        "cells_across", "cells_along", "half_cut", "bypass_diodes", "emissivity")},
        "layout": {"tilt_deg": float(arr["tilt_deg"]), "azimuth_deg": round(float(scene.field.azimuth_deg), 6),
                   "gap_m": float(arr["gap_m"])},
    }
    for k in ("junction_box", "voc_v", "isc_a", "vmp_v", "imp_a", "alpha_isc_pct_per_k", "beta_voc_pct_per_k"):
        if k in mod:
            data["module"][k] = mod[k]
    for k in ("pmax_w", "width_m", "length_m", "gamma_pmax_pct_per_k", "emissivity"):
        data["module"][k] = float(data["module"][k])
    c = data["conditions"]
    if weather_name:
        c["series"] = weather_name
    else:
        c["poa_irradiance_w_m2"] = float(cond["poa_irradiance_w_m2"])
        c["ambient_c"] = float(cond["ambient_c"])
        c["wind_m_s"] = float(cond["wind_m_s"])
    c["relative_humidity_pct"] = float(cond["relative_humidity_pct"])
    if cond["write_sky_c"]:
        c["sky_c"] = round(float(scene.temp_sky), 3)
    if sc["layout"]["features"] == "tables":
        data["layout"].update({"rows": int(arr["rows"]), "cols": int(arr["cols"]), "orientation": arr["orientation"]})
    header = (f"Flight manifest written by pvscan simulate (seed {scene.seed}).\n"
              "A simulated flight of an invented plant; truth.geojson holds the ground truth.")
    name = "flight.toml"
    (out_dir / name).write_text(toml_dumps(data, header), encoding="utf-8")
    return name


def _clean(v: object) -> object:
    if isinstance(v, (np.floating, float)):
        return None if not np.isfinite(v) else round(float(v), 4)
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    return v


def write_truth(scene: Scene, truth: ModuleTruth, out_dir: Path, extra: Mapping[str, Any]) -> tuple[str, str]:
    """Write ``truth.geojson`` (one feature per module, layout positions) and ``truth.json``."""
    fld = scene.field
    m = fld.modules
    off = np.asarray(scene.sc["layout"]["offset_m"], float)
    drawn = drawn_corners(scene)
    tr = _to_lonlat(fld.epsg)
    feats = []
    tags = scene.distractors_at_modules()
    for i in range(fld.n_modules):
        d = scene.defect_of.get(i)
        props = {
            "module_id": m["module_id"][i], "table_id": m["table_id"][i],
            "string_id": m["string_id"][i], "string_index": int(m["string_index"][i]),
            "table_row": int(m["row"][i] + 1), "table_col": int(m["col_num"][i]),
            "defect": d.kind if d else None,
            "defect_group": d.group if d else None,
            "t_true_median_c": truth["t_true_median_c"][i],
            "t_true_p95_c": truth["t_true_p95_c"][i],
            "reference_true_c": truth["reference_true_c"][i],
            "delta_t_k": truth["delta_t_k"][i],
            "delta_t_norm_k": truth["delta_t_norm_k"][i],
            "module_delta_t_k": truth["module_delta_t_k"][i],
            "power_loss_w": truth["power_loss_w"][i],
            "poa_global": scene.poa[i], "poa_thermal": scene.poa_thermal[i], "poa_local": scene.poa_local[i],
            "wind_speed": scene.wind[i], "temp_air": scene.temp_air[i],
            "time": (scene.start + timedelta(seconds=float(scene.t_imaged[i]))).isoformat(),
            "distractors": tags[i],
        }
        if d:
            props["region_uv"] = [list(b) for b in d.boxes]
            for k in ("substrings", "cells", "loss_fraction", "centre", "rise_k", "height"):
                if k in d.params:
                    props[k] = d.params[k]
        props = {k: _clean(v) for k, v in props.items()}
        feats.append({"type": "Feature", "properties": props,
                      "geometry": {"type": "Polygon", "coordinates": [_ring(tr, drawn[i])]}})
    meta = {"layout_offset_m": [float(off[0]), float(off[1])],
            "layout_error": scene.layout_error.as_truth(), **extra}
    with open(out_dir / "truth.geojson", "w", encoding="utf-8") as fh:
        fh.write(json.dumps({"type": "FeatureCollection", "pvscan_truth": meta, "features": feats}))
    with open(out_dir / "truth.json", "w", encoding="utf-8") as fh:
        json.dump(meta, fh, indent=2, default=str)
    return "truth.geojson", "truth.json"
