"""The simulated scene: true temperatures of modules and ground, and what the camera sees.

Physics, in the order it is applied to a pixel:

1. **Healthy module** (Faiman [1]_, :func:`pvlib.temperature.faiman`): ``T = T_air + G / (u0 + u1 * v)`` with the
   module's own irradiance ``G`` (lowered under a cloud shadow; for varying conditions
   the irradiance smoothed by the module's thermal inertia, see
   :func:`pvscan.simulate.flightpath.weather_series`), air temperature and wind at the
   time it was imaged; plus a module-to-module spread and a cell-to-cell spread
   (``conditions.cell_spread_k``, normal). The module-to-module spread has two parts: a
   thermal one (modules cooled a little better or worse, e.g. by their place in the
   array: ``delta T = -(T - T_air) * delta U / U``, so it grows with the module's rise
   over the air) given at the reference conditions 1000 W/m2 and 1 m/s
   (``conditions.module_spread_k``) and scaled by ``(G / U(v)) / (1000 / U(1))`` like the
   defect rises; and a measurement one that does not scale (glass emissivity and
   reflection differences between modules, ``conditions.measurement_spread_k``),
   added in quadrature. The aluminium frame
   (``array.frame_width_m``) runs cooler: ``T_frame = T - frame_drop * (T - T_air)``
   (common practice: frames are cooler than the glass).
2. **Defects** add their rise in the module-local frame (:mod:`pvscan.simulate.defects`); the
   heat of an open module or bypassed substring is the power the single-diode model
   (:mod:`pvscan.simulate.electrical`) says it no longer delivers.
3. **Ground**: ``T_air + sun_rise_k * G / 1000`` in the sun, ``T_air + shade_rise_k`` in the
   shadow the tables cast (sun position from pvlib [2]_), plus a smooth texture and a
   site-wide smooth field (``ground.field_k`` [K] 1 sigma over ``ground.field_scale_m``; with
   a few kelvin the ground's contrast to the glass can change sign across the site); hot objects
   (inverter stations, a vehicle) sit on the ground between table rows.
4. **Radiometry**: band radiance of glass (module emissivity, reflecting the sky from
   :func:`pvscan.simulate.radiance.sky_temperature`, warmer where a soft reflection patch lies)
   and ground, through the air path, exported at the export emissivity and reflected
   temperature (:func:`pvscan.simulate.radiance.apparent_temperature`; the simulator's own
   Planck band integrals, sharing no code with the pipeline).
5. **Camera**: Gaussian point-spread function applied to the band radiance (the lens
   mixes radiance, not temperature); residual vignetting scales the sensor radiance
   (cosine-fourth law, ``camera.vignetting``; :mod:`pvscan.simulate.optics`); the detector's
   time constant trails the image behind the drone's travel (motion blur,
   ``camera.time_constant_ms``).
6. **Mosaic**: each pixel comes from the frame with the nearest centre; raised tables are
   displaced away from that frame's nadir when the ortho's surface model misses their height
   (``ortho.relief_height_fraction``); rectangular seams add a sharp step of 0.5-2 K to the
   apparent temperature and may show the scene shifted (``distractors.seam_shift_m``);
   then white noise of the camera's NETD and a wavy nodata border at the edge.

Shadows (:mod:`pvscan.simulate.shading`): the tables shade the ground and, when the sun is
low in front of them, the lower part of the next row; a shaded cell keeps the diffuse share
of its rise over the air (``conditions.diffuse_fraction``) and a substring with a cell more
than half shaded is bypassed. The terrain may slope (``terrain.slope_deg``,
``terrain.aspect_deg``): the rows follow it, which changes their shadows, and sunlit ground
warms with the beam on its slope.

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [2] I. Reda and A. Andreas, "Solar position algorithm for solar radiation
   applications", Solar Energy 76(5), 577-589, 2004 (as implemented in pvlib).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import TypedDict

import numpy as np
import numpy.typing as npt
from numpy.typing import ArrayLike
from scipy import ndimage

from pvscan._typing import BoolArray, FloatArray, IntArray
from pvscan.simulate import radiance
from pvscan.simulate.defects import ModuleGeometry, place_defects
from pvscan.simulate.electrical import diode_module, faiman
from pvscan.simulate.flightpath import plan_flight, weather_series
from pvscan.simulate.geometry import build_field
from pvscan.simulate.layout_error import layout_error
from pvscan.simulate.optics import FrameLookup, relief_source, smear, vignetting_factor
from pvscan.simulate.scenario import Scenario
from pvscan.simulate.shading import RowShade, ground_beam_factor, shadow_geometry

__all__ = ["Scene", "SceneSample", "faiman", "GROUND", "GLASS", "FRAME", "OBJECT"]

#: A mosaic seam rectangle in pixels of the global grid: (row0, row1, col0, col1, step_k).
Seam = tuple[int, int, int, int, float]
#: A hot object on the ground: (kind, s0, s1, w0, w1, rise_k), field coordinates [m], [K].
HotObject = tuple[str, float, float, float, float, float]


class SceneSample(TypedDict):
    """True temperature and radiometric parameters of map points (:meth:`Scene.true_scene`)."""

    temp: FloatArray        #: true temperature [degC]
    material: npt.NDArray[np.int8]  #: GROUND, GLASS, FRAME or OBJECT
    idx: IntArray           #: module index, -1 off the modules
    u: FloatArray           #: module-local u [-]
    v: FloatArray           #: module-local v [-]
    emissivity: FloatArray  #: [-]
    temp_sky: FloatArray    #: apparent temperature reflected [degC]
    tau: FloatArray         #: air path transmission [-]
    temp_atm: FloatArray    #: air temperature of the path [degC]

log = logging.getLogger(__name__)

GROUND, GLASS, FRAME, OBJECT = 0, 1, 2, 3
_ZERO_C = 273.15  # [K]


class _SmoothNoise:
    """A smooth random field over an extent: unit-variance noise on a coarse grid,
    smoothed and interpolated bilinearly (deterministic for a given rng)."""

    def __init__(self, extent: Sequence[float], spacing: float, rng: np.random.Generator) -> None:
        xmin, ymin, xmax, ymax = extent
        self.x0, self.y0, self.h = xmin - 2 * spacing, ymin - 2 * spacing, spacing
        nx = int(math.ceil((xmax - xmin) / spacing)) + 5
        ny = int(math.ceil((ymax - ymin) / spacing)) + 5
        g = ndimage.gaussian_filter(rng.standard_normal((ny, nx)), 1.0, mode="wrap")
        self.grid = g / max(g.std(), 1e-12)

    def __call__(self, x: ArrayLike, y: ArrayLike) -> FloatArray:
        r = (np.asarray(y) - self.y0) / self.h
        c = (np.asarray(x) - self.x0) / self.h
        return ndimage.map_coordinates(self.grid, [r.ravel(), c.ravel()], order=1, mode="nearest").reshape(r.shape)


@dataclass
class Blob:
    """A Gaussian blob on the map: centre (x, y) [m], sigma [m], amplitude."""

    x: float
    y: float
    sigma: float
    amp: float

    def __call__(self, x: FloatArray, y: FloatArray) -> FloatArray:
        return self.amp * np.exp(-((x - self.x) ** 2 + (y - self.y) ** 2) / (2 * self.sigma ** 2))


class Scene:
    """Everything needed to render the ortho and write the truth of one scenario.

    Parameters
    ----------
    sc : dict
        Complete scenario (:func:`pvscan.simulate.scenario.scenario_from_dict`).
    seed : int
        Seed of every random choice (same seed, same flight).
    """

    def __init__(self, sc: Scenario, seed: int) -> None:
        self.sc = sc
        self.seed = int(seed)
        self.field = fld = build_field(sc)
        self.layout_error = layout_error(sc, fld, self.seed)
        m = sc["module"]
        half = bool(m["half_cut"])
        u0, u1 = float(sc["conditions"]["u0"]), float(sc["conditions"]["u1"])
        u_ref = u0 + u1 * 1.0
        self.geom = ModuleGeometry(
            length_m=m["length_m"], width_m=m["width_m"],
            n_along=m["cells_along"] * (2 if half else 1), n_across=m["cells_across"],
            bypass_diodes=m["bypass_diodes"], lower_edge="u" if fld.portrait else "v",
            junction_box=m.get("junction_box", "split" if half else "edge"), pmax_w=m["pmax_w"],
            u_ref=u_ref, p_ref_w=(float(diode_module(m).p_mp(1000.0, faiman(1000.0, 25.0, 1.0, u0, u1)))
                                  if sc["defects"]["heat_model"] == "diode" else None))
        cam = sc["camera"]
        self.gsd = gsd = float(cam["gsd_m"])
        margin = float(sc["ortho"]["margin_m"])
        b = fld.bounds(margin)
        self.x0 = math.floor(b[0] / gsd) * gsd
        self.y1 = math.ceil(b[3] / gsd) * gsd
        self.width = int(math.ceil((b[2] - self.x0) / gsd))
        self.height = int(math.ceil((self.y1 - b[1]) / gsd))
        self.extent = (self.x0, self.y1 - self.height * gsd, self.x0 + self.width * gsd, self.y1)

        # flight and conditions
        self.start = datetime.fromisoformat(sc["flight"]["start"].replace("Z", "+00:00"))
        heading = tuple(fld.a) if sc["flight"]["lines"] == "rows" else (1.0, 0.0)
        self.plan = plan_flight(sc["flight"], self.extent, gsd, heading)
        cond = sc["conditions"]
        self.weather = weather_series(cond, self.plan.duration_s, np.random.default_rng([self.seed, 2]))
        self.end = self.start + timedelta(seconds=round(self.plan.duration_s))
        mods = fld.modules
        self.t_imaged = self.plan.imaged_at(mods["cx"], mods["cy"])
        self.poa, self.temp_air, self.wind = self.weather.at(self.t_imaged)
        self.u0, self.u1 = float(cond["u0"]), float(cond["u1"])
        self.rh = float(cond["relative_humidity_pct"])
        self.temp_air_mean = float(np.mean(self.temp_air))
        self.poa_mean = float(np.mean(self.poa))
        if "sky_c" in cond:
            self.temp_sky = float(cond["sky_c"])
        else:
            self.temp_sky = radiance.sky_temperature(self.temp_air_mean, self.rh, tuple(cam["band_um"]))
        alt = float(sc["flight"]["altitude_m"])
        if cam["transmission"] == "auto":
            band = tuple(cam["band_um"])
            self.tau = np.asarray(radiance.air_transmission(alt, self.temp_air, self.rh, band), float)
            self.tau_ground = float(radiance.air_transmission(alt, self.temp_air_mean, self.rh, band))
        else:
            self.tau = np.full(fld.n_modules, float(cam["transmission"]))
            self.tau_ground = float(cam["transmission"])

        # distractors
        dis = sc["distractors"]
        drng = np.random.default_rng([self.seed, 3])
        fx0, fy0, fx1, fy1 = fld.bounds(0.0)
        self.clouds = [Blob(drng.uniform(fx0, fx1), drng.uniform(fy0, fy1),
                            dis["cloud_shadow_size_m"] * drng.uniform(0.7, 1.3), dis["cloud_shadow_depth"])
                       for _ in range(int(dis["cloud_shadows"]))]
        self.reflections: list[Blob] = []
        for _ in range(int(dis["reflections"])):
            i = int(drng.integers(fld.n_modules))
            self.reflections.append(Blob(mods["cx"][i], mods["cy"][i],
                                         dis["reflection_size_m"] * drng.uniform(0.7, 1.3),
                                         dis["reflection_k"] * drng.uniform(0.7, 1.3)))
        self.seams = self._place_seams(drng, int(dis["seams"]), dis["seam_step_k"])
        srng = np.random.default_rng([self.seed, 11])  # own stream: earlier draws stay as they were
        lo, hi = (float(x) for x in dis["seam_shift_m"])
        self.seam_shift = [tuple(float(srng.uniform(lo, hi)) * np.array([math.cos(a), math.sin(a)]))
                           for a in srng.uniform(0.0, 2 * math.pi, len(self.seams))]
        self.objects = self._place_objects(drng, int(dis["hot_objects"]))
        self.texture = _SmoothNoise(self.extent, 3.0, np.random.default_rng([self.seed, 4]))
        self.wobble = _SmoothNoise(self.extent, 8.0, np.random.default_rng([self.seed, 5]))
        gcfg = sc["ground"]
        self.ground_field = (_SmoothNoise(self.extent, float(gcfg["field_scale_m"]),
                                          np.random.default_rng([self.seed, 10]))
                             if float(gcfg["field_k"]) > 0 else None)
        self._sun_shadow()
        self.frames = FrameLookup(self.plan.centres)
        self.relief_fraction = float(sc["ortho"]["relief_height_fraction"])
        self.altitude_m = alt
        #: length of the motion-blur trail, speed x detector time constant [px]
        self.motion_trail_px = (float(sc["flight"]["speed_m_s"]) * float(cam["time_constant_ms"]) * 1e-3 / gsd)

        # modules
        mrng = np.random.default_rng([self.seed, 6])
        n = fld.n_modules
        # irradiance the module temperature is in balance with (thermal inertia), under clouds
        self.poa_thermal = self.weather.poa_thermal_at(self.t_imaged)
        self.poa_local = self.poa_thermal * self.cloud_factor(mods["cx"], mods["cy"])
        self.u_total = self.u0 + self.u1 * self.wind
        self.temp_healthy = faiman(self.poa_local, self.temp_air, self.wind, self.u0, self.u1)
        # an open module keeps as heat the power it would have delivered (single-diode model at
        # its irradiance and temperature), shed through the Faiman U over its area
        self.diode = diode = diode_module(m)
        if sc["defects"]["heat_model"] == "diode":
            self.p_mp = diode.p_mp(self.poa_local, self.temp_healthy)
        else:  # "efficiency": STC efficiency, eta * G (the textbook simplification)
            self.p_mp = self.geom.eta * self.poa_local * self.geom.area_m2
        self.dt_open = self.p_mp / (self.u_total * self.geom.area_m2)
        # module-to-module spread: thermal part scaled from the reference conditions like the
        # defect rises (dt_open / dt_open_ref = (G / U) / (1000 / U(1))), measurement part not
        spread = np.hypot(float(cond["module_spread_k"]) * self.dt_open / self.geom.dt_open_ref,
                          float(cond["measurement_spread_k"]))
        self.temp_healthy = self.temp_healthy + spread * mrng.normal(0.0, 1.0, n)
        self.cell_offset = mrng.normal(0.0, cond["cell_spread_k"],
                                       (n, self.geom.n_along, self.geom.n_across)).astype(np.float32)
        self.defects = place_defects(np.random.default_rng([self.seed, 7]), sc, fld, self.geom)
        self.defect_of = {d.module: d for d in self.defects}
        self._defect_modules = np.array(sorted(self.defect_of), dtype=np.int64)
        fw = float(sc["array"]["frame_width_m"])
        self.frame_u = fw / self.geom.length_m
        self.frame_v = fw / self.geom.width_m
        self.beam_fraction = 1.0 - float(cond["diffuse_fraction"])
        shade = RowShade(fld, self.shadow, self.geom.n_along, self.geom.n_across, self.geom.bypass_diodes)
        self.row_shade = shade if shade.any.any() else None

    # ------------------------------------------------------------------ distractors
    def cloud_factor(self, x: ArrayLike, y: ArrayLike) -> FloatArray:
        """Irradiance factor of cloud shadows at map points (1 = no shadow) [-]."""
        f = np.ones(np.shape(x))
        for c in self.clouds:
            f = f * (1.0 - c(np.asarray(x), np.asarray(y)))
        return f

    def distractors_at_modules(self) -> list[list[str]]:
        """Distractors touching each module: ``seam`` (its centre lies in a mosaic seam
        rectangle), ``reflection`` (sky reflection above 2 K at its centre), ``cloud_shadow``
        (irradiance lowered by more than 5 %), ``hot_object`` (within 3 m of one),
        ``row_shade`` (a cell in the shadow of another row)."""
        m = self.field.modules
        cx, cy = m["cx"], m["cy"]
        col = (cx - self.x0) / self.gsd
        row = (self.y1 - cy) / self.gsd
        tags: list[list[str]] = [[] for _ in range(self.field.n_modules)]
        in_seam = np.zeros(cx.shape, bool)
        for r0, r1, c0, c1, _ in self.seams:
            in_seam |= (row >= r0) & (row < r1) & (col >= c0) & (col < c1)
        refl = np.zeros(cx.shape)
        for r in self.reflections:
            refl += r(cx, cy)
        cloud = self.cloud_factor(cx, cy) < 0.95
        s, w = self.field.to_field(cx, cy)
        near = np.zeros(cx.shape, bool)
        for _kind, s0, s1, w0, w1, _rise in self.objects:
            ds = np.maximum(0.0, np.maximum(s0 - s, s - s1))
            dw = np.maximum(0.0, np.maximum(w0 - w, w - w1))
            near |= np.hypot(ds, dw) < 3.0
        row_shade = self.row_shade.any if self.row_shade is not None else np.zeros(cx.shape, bool)
        for name, flag in (("seam", in_seam), ("reflection", refl > 2.0), ("cloud_shadow", cloud),
                           ("hot_object", near), ("row_shade", row_shade)):
            for i in np.flatnonzero(flag):
                tags[i].append(name)
        return tags

    def _place_seams(self, rng: np.random.Generator, n: int, step_range: Sequence[float]) -> list[Seam]:
        """Rectangles (row0, row1, col0, col1, step_k) in pixels of the global grid."""
        out: list[Seam] = []
        fr = self.sc["flight"]["frame_px"]
        for _ in range(n):
            h = int(rng.uniform(1.0, 2.5) * fr[1] * 0.5)
            w = int(rng.uniform(1.0, 2.5) * fr[0] * 0.5)
            r0 = int(rng.integers(0, max(1, self.height - h // 2)))
            c0 = int(rng.integers(0, max(1, self.width - w // 2)))
            lo, hi = step_range
            step = rng.uniform(lo, hi) * rng.choice([-1.0, 1.0])
            out.append((r0, r0 + h, c0, c0 + w, float(step)))
        return out

    def _place_objects(self, rng: np.random.Generator, n: int) -> list[HotObject]:
        """Hot objects on the ground between table rows: (kind, s0, s1, w0, w1, rise_k)."""
        fld = self.field
        aisle = fld.pitch - fld.table_depth
        kinds = [("inverter", 2.4, 1.2, (20.0, 30.0)), ("vehicle", 4.5, 1.8, (12.0, 18.0))]
        out: list[HotObject] = []
        n_aisles = max(fld.n_trows - 1, 0)
        for k in range(n):
            kind, length, width, rise = kinds[k % 2]
            if n_aisles and aisle >= width + 0.6:
                tr = int(rng.integers(n_aisles))
                wc = tr * fld.pitch + fld.table_depth + aisle / 2
            elif self.sc["ortho"]["margin_m"] >= width + 1.5:
                wc = -0.5 - width / 2  # in front of the first row, in the margin
            else:
                log.info("no room between table rows or in the margin for a %s; not placed", kind)
                continue
            sc_ = rng.uniform(length, max(length + 0.1, fld.total_s - length))
            out.append((kind, sc_ - length / 2, sc_ + length / 2, wc - width / 2, wc + width / 2,
                        float(rng.uniform(*rise))))
        return out

    def _sun_shadow(self) -> None:
        import pandas as pd
        import pvlib

        mid = self.start + (self.end - self.start) / 2
        pos = pvlib.solarposition.get_solarposition(pd.DatetimeIndex([mid]), self.sc["site"]["lat"],
                                                    self.sc["site"]["lon"])
        self.sun_elevation_deg = max(float(pos["apparent_elevation"].iloc[0]), 8.0)
        self.sun_azimuth_deg = float(pos["azimuth"].iloc[0])
        ter = self.sc["terrain"]
        self.shadow = shadow_geometry(self.field, self.sun_elevation_deg, self.sun_azimuth_deg,
                                      float(self.sc["array"]["mount_height_m"]), float(ter["slope_deg"]),
                                      float(ter["aspect_deg"]))
        self.h_low, self.h_high = self.shadow.h_low, self.shadow.h_high
        diffuse = float(self.sc["conditions"]["diffuse_fraction"])
        self.ground_sun_factor = ground_beam_factor(float(ter["slope_deg"]), float(ter["aspect_deg"]),
                                                    self.sun_elevation_deg, self.sun_azimuth_deg, diffuse)

    def in_shadow(self, s: FloatArray, w: FloatArray) -> BoolArray:
        """True where ground at field coordinates (s, w) lies in a table's shadow or under it
        (:meth:`pvscan.simulate.shading.ShadowGeometry.shaded`)."""
        return self.shadow.shaded(s, w, self.shadow.ground_z(s, w))

    def raised_height(self, x: FloatArray, y: FloatArray) -> FloatArray:
        """Height above the ground the ortho's surface model misses at map points [m]:
        ``ortho.relief_height_fraction`` of the table plane's height on tables, 0 elsewhere."""
        fld, sh = self.field, self.shadow
        s, w = fld.to_field(x, y)
        tr = np.floor(w / fld.pitch)
        tb = np.floor(s / fld.table_step)
        on = ((tr >= 0) & (tr < fld.n_trows) & (tb >= 0) & (tb < fld.n_tables)
              & (w - tr * fld.pitch <= fld.table_depth) & (s - tb * fld.table_step <= fld.table_len))
        h = sh.table_z(s, w) - sh.ground_z(s, w)
        return np.where(on, self.relief_fraction * h, 0.0)

    # ------------------------------------------------------------------ temperatures
    def module_temperature(self, idx: ArrayLike, u: ArrayLike, v: ArrayLike, *,
                           with_frame: bool = True) -> FloatArray:
        """True temperature of module points (module index, module-local u, v) [degC]."""
        idx = np.asarray(idx, np.int64)
        u = np.asarray(u, float)
        v = np.asarray(v, float)
        g = self.geom
        ci = np.clip(np.floor(u * g.n_along).astype(np.int64), 0, g.n_along - 1)
        cj = np.clip(np.floor(v * g.n_across).astype(np.int64), 0, g.n_across - 1)
        th = self.temp_healthy[idx]
        t = th + self.cell_offset[idx, ci, cj]
        if with_frame:
            fr = self.is_frame(u, v)
            t = np.where(fr, th - float(self.sc["conditions"]["frame_drop"]) * (th - self.temp_air[idx]), t)
        if self.row_shade is not None:  # shade of other rows: less beam, and bypassed substrings
            ta = self.temp_air[idx]
            f = self.row_shade.factor(idx, ci, cj, self.beam_fraction)
            t = ta + (t - ta) * f + np.where(self.row_shade.bypassed_at(idx, cj), self.dt_open[idx] * f, 0.0)
        if self._defect_modules.size:
            hit = np.isin(idx, self._defect_modules)
            if hit.any():
                t = t.copy()
                for mod in np.unique(idx[hit]):
                    sel = idx == mod
                    d = self.defect_of[int(mod)]
                    t[sel] += d.rise(u[sel], v[sel], g, self.dt_open[mod])
        return t

    def is_frame(self, u: FloatArray, v: FloatArray) -> BoolArray:
        """True on the module frame [-]."""
        return (u < self.frame_u) | (u > 1 - self.frame_u) | (v < self.frame_v) | (v > 1 - self.frame_v)

    def true_scene(self, x: FloatArray, y: FloatArray) -> SceneSample:
        """True temperature and radiometric parameters of map points.

        Returns
        -------
        SceneSample
            ``temp`` [degC], ``material`` (GROUND, GLASS, FRAME, OBJECT), ``idx`` (module or -1),
            ``u``, ``v``, ``emissivity`` [-], ``temp_sky`` [degC], ``tau`` [-], ``temp_atm`` [degC].
        """
        fld = self.field
        idx, u, v, s, w = fld.locate(x, y)
        mod = idx >= 0
        gcfg = self.sc["ground"]
        shade = np.zeros(idx.shape, bool)
        shade[~mod] = self.in_shadow(s[~mod], w[~mod])
        sun = self.poa_mean * self.cloud_factor(x, y) / 1000.0 * gcfg["sun_rise_k"] * self.ground_sun_factor
        temp = self.temp_air_mean + np.where(shade, gcfg["shade_rise_k"], sun) + gcfg["texture_k"] * self.texture(x, y)
        if self.ground_field is not None:  # site-wide variation (moisture, soil, vegetation)
            temp = temp + float(gcfg["field_k"]) * self.ground_field(x, y)
        material = np.full(idx.shape, GROUND, np.int8)
        for _kind, s0, s1, w0, w1, rise in self.objects:
            inside = (s >= s0) & (s <= s1) & (w >= w0) & (w <= w1) & ~mod
            temp = np.where(inside, self.temp_air_mean + rise, temp)
            material[inside] = OBJECT
        emis = np.full(idx.shape, float(gcfg["emissivity"]))
        tsky = np.full(idx.shape, self.temp_sky)
        tau = np.full(idx.shape, self.tau_ground)
        tatm = np.full(idx.shape, self.temp_air_mean)
        if mod.any():
            im, um, vm = idx[mod], u[mod], v[mod]
            temp[mod] = self.module_temperature(im, um, vm)
            material[mod] = np.where(self.is_frame(um, vm), FRAME, GLASS)
            emis[mod] = float(self.sc["module"]["emissivity"])
            bump = np.zeros(im.shape)
            for r in self.reflections:
                bump += r(x[mod], y[mod])
            tsky[mod] = self.temp_sky + bump
            tau[mod] = self.tau[im]
            tatm[mod] = self.temp_air[im]
        return {"temp": temp, "material": material, "idx": idx, "u": u, "v": v,
                "emissivity": emis, "temp_sky": tsky, "tau": tau, "temp_atm": tatm}

    def apparent(self, scene: SceneSample) -> FloatArray:
        """Apparent temperature of the export for the output of :meth:`true_scene` [degC]."""
        ex = self.sc["export"]
        return radiance.apparent_temperature(
            scene["temp"], emissivity=scene["emissivity"], temp_sky_c=scene["temp_sky"],
            transmission=scene["tau"], temp_air_c=scene["temp_atm"],
            export_emissivity=float(ex["emissivity"]), export_reflected_c=float(ex["reflected_c"]),
            band_um=tuple(self.sc["camera"]["band_um"]))

    # ------------------------------------------------------------------ camera
    def pixel_centres(self, row0: int, col0: int, nrows: int, ncols: int) -> tuple[FloatArray, FloatArray]:
        """Map coordinates of pixel centres of a window of the global grid [m]."""
        cols = np.arange(col0, col0 + ncols)
        rows = np.arange(row0, row0 + nrows)
        x = self.x0 + (cols + 0.5) * self.gsd
        y = self.y1 - (rows + 0.5) * self.gsd
        return np.meshgrid(x, y)

    def _seen_points(self, row0: int, col0: int, x: FloatArray, y: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Map points the ortho pixels show: shifted inside misaligned seam rectangles, then
        displaced by relief (:mod:`pvscan.simulate.optics`) [m]."""
        rr = np.arange(row0, row0 + x.shape[0])[:, None]
        cc = np.arange(col0, col0 + x.shape[1])[None, :]
        xs, ys = x, y
        for (r0, r1, c0, c1, _), (dx, dy) in zip(self.seams, self.seam_shift):
            if dx or dy:
                inside = (rr >= r0) & (rr < r1) & (cc >= c0) & (cc < c1)
                xs, ys = xs + np.where(inside, dx, 0.0), ys + np.where(inside, dy, 0.0)
        if self.relief_fraction > 0:
            nx, ny = self.frames.nadir(x, y)
            sh = self.shadow
            s, w = self.field.to_field(xs, ys)
            s_c, w_c = self.field.to_field(*np.mean(self.plan.centres, axis=0))
            alt = self.altitude_m - (sh.ground_z(s, w) - sh.ground_z(s_c, w_c))
            f = self.relief_fraction
            starts = (f * self.h_high, f * (self.h_low + self.h_high) / 2, f * self.h_low)
            xs, ys, _ = relief_source(xs, ys, nx, ny, self.raised_height, alt, starts=starts)
        return xs, ys

    def render_block(self, row0: int, col0: int, nrows: int, ncols: int) -> FloatArray:
        """Final apparent temperature of a window of the global grid [degC], NaN = nodata.

        The window is rendered with a halo so the point-spread function is exact at its
        edges; noise is seeded by the window's position, so the result does not depend on
        which other windows are rendered.
        """
        cam = self.sc["camera"]
        sigma = float(cam["psf_sigma_px"])
        trail = self.motion_trail_px
        halo = (int(math.ceil(4 * sigma)) + 1 if sigma > 0 else 0) + (int(math.ceil(7 * trail)) + 2 if trail > 0 else 0)
        x, y = self.pixel_centres(row0 - halo, col0 - halo, nrows + 2 * halo, ncols + 2 * halo)
        xs, ys = self._seen_points(row0 - halo, col0 - halo, x, y)
        scene = self.true_scene(xs, ys)
        app = np.asarray(self.apparent(scene), float)
        vig = float(cam["vignetting"])
        if sigma > 0 or vig > 0 or trail > 0:
            # the lens mixes radiance, not temperature: blur the band radiance of the apparent
            # temperature (affine in the sensor radiance for any export emissivity); vignetting
            # scales the sensor radiance
            band = tuple(cam["band_um"])
            rad = radiance.band_radiance(app + _ZERO_C, band)
            if sigma > 0:
                rad = ndimage.gaussian_filter(rad, sigma, mode="nearest")
            if trail > 0:  # motion blur: the trail behind the travel of the frame kept there
                k = self.frames.index(x, y)
                fwd = (self.plan.headings[k] @ self.plan.headings[0]) > 0
                h0 = self.plan.headings[0]
                rad = np.where(fwd, smear(rad, trail, h0), smear(rad, trail, -h0))
            if vig > 0:
                ex_eps = float(self.sc["export"]["emissivity"])
                l_refl = radiance.band_radiance(float(self.sc["export"]["reflected_c"]) + _ZERO_C, band)
                nx, ny = self.frames.nadir(x, y)
                f = vignetting_factor(np.hypot(x - nx, y - ny), self.altitude_m, vig)
                rad = (f * (ex_eps * rad + (1 - ex_eps) * l_refl) - (1 - ex_eps) * l_refl) / ex_eps
            app = np.asarray(radiance.band_temperature(rad, band), float) - _ZERO_C
        app = app[halo:halo + nrows, halo:halo + ncols]
        # mosaic seams: steps between frames, sharp (applied after each frame's blur)
        rr = np.arange(row0, row0 + nrows)[:, None]
        cc = np.arange(col0, col0 + ncols)[None, :]
        for r0, r1, c0, c1, step in self.seams:
            app = app + np.where((rr >= r0) & (rr < r1) & (cc >= c0) & (cc < c1), step, 0.0)
        rng = np.random.default_rng([self.seed, 8, row0, col0])
        app = app + rng.normal(0.0, float(cam["netd_k"]), app.shape)
        xc, yc = x[halo:halo + nrows, halo:halo + ncols], y[halo:halo + nrows, halo:halo + ncols]
        border = float(self.sc["ortho"]["nodata_border_m"])
        if border > 0:
            e = self.extent
            dist = np.minimum.reduce([xc - e[0], e[2] - xc, yc - e[1], e[3] - yc])
            app = np.where(dist < border * (1.0 + 0.6 * np.tanh(self.wobble(xc, yc))), np.nan, app)
        return app
