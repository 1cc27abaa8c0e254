"""Power and energy loss rules, checked against pvlib (single-diode model, PVsyst and Faiman
temperature models, clear-sky models) and handbook arithmetic."""
from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pvlib
import pytest
from pvlib.singlediode import bishop88, estimate_voc

from pvscan.diagnose import energy, loss
from pvscan.io.manifest import ModuleSpec
from pvscan.io.settings import load_pipeline

# An invented 72-cell, 3-substring module: 400 W on a 2.0 m x 1.0 m footprint (eta = 0.2).
SPEC = ModuleSpec(pmax_w=400.0, width_m=1.0, length_m=2.0, cells_across=6, cells_along=12, bypass_diodes=3,
                  gamma_pmax_pct_per_k=-0.35)
COND = {"poa_global": 850.0, "temp_air": 25.0, "wind_speed": 2.0}
U0, U1 = 25.0, 6.84   # Faiman 2008 (pvlib's defaults), the pipeline's [heat]
HEAT = {"u0": U0, "u1": U1}


def _row(defect, region, delta_t_k, region_uv=(), idx=(0,), **kw):
    return dict(module_index=idx[0], module_id=f"M{idx[0]}", module_indices=list(idx), defect=defect,
                region=region, region_uv=list(region_uv), delta_t_k=delta_t_k, severity="repair",
                confidence=0.8, **kw)


# --------------------------------------------------------------------------- electrical rules


def _substring_iv(n_sub: int):
    """IV curve of one substring of an invented module, from pvlib's single-diode model."""
    # invented module at STC: Desoto reference parameters for the whole module
    il, i0, rs, rsh, nnsvth = pvlib.pvsystem.calcparams_desoto(
        1000.0, 25.0, alpha_sc=0.004, a_ref=1.9, I_L_ref=10.5, I_o_ref=1e-10, R_sh_ref=400.0, R_s=0.35)
    sub = dict(photocurrent=il, saturation_current=i0, resistance_series=rs / n_sub,
               resistance_shunt=rsh / n_sub, nNsVth=nnsvth / n_sub)
    voc = float(estimate_voc(il, i0, nnsvth / n_sub))
    i, v, _ = bishop88(np.linspace(-2.0, 1.1 * voc, 20001), **sub)
    keep = i >= 0
    order = np.argsort(i[keep])
    full = pvlib.pvsystem.singlediode(il, i0, rs, rsh, nnsvth)
    return i[keep][order], v[keep][order], float(il), float(full["p_mp"])


@pytest.mark.parametrize("n_sub", [3, 4])
def test_bypassed_substring_against_single_diode(n_sub):
    """k/n rule vs the IV curve of n-1 substrings in series with a conducting bypass diode.

    Reference: pvlib.singlediode.bishop88 (Bishop 1988) on an invented module. The bypass
    diode's forward drop is 0.5 V (from memory: Schottky bypass diodes drop about 0.4-0.6 V).
    """
    i, v, il, p_full_pvlib = _substring_iv(n_sub)
    grid = np.linspace(0.0, 0.9999 * il, 20001)
    v_sub = np.interp(grid, i, v)
    p_all = float(np.max(grid * n_sub * v_sub))
    # the series stack of n equal substrings is the whole module (pvlib's own single diode, 0.01 %)
    assert p_all == pytest.approx(p_full_pvlib, rel=1e-4)
    p_bypassed = float(np.max(grid * ((n_sub - 1) * v_sub - 0.5)))
    ratio_pvlib = p_bypassed / p_all
    ratio_rule = 1.0 - loss.bypass_loss(p_all, n_sub, 1) / p_all
    assert ratio_rule == pytest.approx((n_sub - 1) / n_sub)
    # within 3 %: the rule ignores the diode drop (0.5 V of ~40 V) and the shifted maximum power point
    assert ratio_rule == pytest.approx(ratio_pvlib, rel=0.03)
    assert ratio_pvlib < ratio_rule  # the diode drop only ever costs power


def test_electrical_rules_in_estimate_loss():
    an = pd.DataFrame([
        _row("bypassed_substring", "substring", 6.0, [(0, 1, 0, 1 / 3)]),
        _row("several_bypassed_substrings", "substrings", 9.0, [(0, 1, 0, 2 / 3)], idx=(1,)),
        _row("open_module", "module", 7.0, idx=(2,)),
        _row("open_string", "modules", 7.0, idx=(3, 4, 5, 6)),
    ])
    out = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0})
    # common practice: k of n substrings bypassed -> k/n of pmax; open module/string -> all of it
    assert out["power_loss_w"].tolist() == pytest.approx([400 / 3, 800 / 3, 400.0, 4 * 400.0])
    assert (out["loss_method"] == "electrical_rule").all()
    # at the flight: the same share of the operating power pmax * G/1000 * (1 + gamma (T - 25)),
    # T from pvlib's Faiman model
    t = float(pvlib.temperature.faiman(850.0, 25.0, 2.0))
    p_op = 400.0 * 0.85 * (1 - 0.0035 * (t - 25.0))
    assert out["power_loss_w_flight"].tolist() == pytest.approx([p_op / 3, 2 * p_op / 3, p_op, 4 * p_op])
    # energy: kW x kWh/kWp/yr
    assert out["energy_loss_kwh_per_year"].tolist() == pytest.approx(out["power_loss_w"] / 1000 * 1000.0)
    # without irradiance the STC rule still holds, the flight value is unknown (NaN, not an error)
    nog = loss.estimate_loss(an, SPEC, None, {"specific_yield_kwh_per_kwp": 1000.0})
    assert nog["power_loss_w"].tolist() == pytest.approx(out["power_loss_w"].tolist())
    assert nog["power_loss_w_flight"].isna().all()


def test_open_string_shares_never_double_count():
    an = pd.DataFrame([_row("open_string", "modules", 7.0, idx=(2, 3, 4)),
                       _row("hot_cell", "cell", 15.0, [(0.5, 0.6, 0.0, 0.17)], idx=(0,))])
    out = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1200.0})
    shares = loss.module_losses(out, 6, pmax_w=400.0)
    assert shares.loc[[2, 3, 4], "power_loss_w"].tolist() == pytest.approx([400.0] * 3)
    assert shares["power_loss_w"].sum() == pytest.approx(out["power_loss_w"].sum())
    assert shares["energy_loss_kwh_per_year"].sum() == pytest.approx(out["energy_loss_kwh_per_year"].sum())
    assert shares.loc[[1, 5], "power_loss_w"].tolist() == [0.0, 0.0]
    # two anomalies on one module can never lose more than its nameplate
    both = pd.DataFrame([_row("open_module", "module", 7.0), _row("hot_cell", "cell", 15.0, [(0, 0.1, 0, 0.2)])])
    s2 = loss.module_losses(loss.estimate_loss(both, SPEC, COND, {"specific_yield_kwh_per_kwp": 1.0}), 1, 400.0)
    assert s2["power_loss_w"].iloc[0] == pytest.approx(400.0)


# --------------------------------------------------------------------------- thermal models


def test_loss_uses_the_pipelines_heat_model():
    """The heat balance of the losses is the pipeline's [heat] Faiman model (Faiman 2008,
    Prog. Photovolt. 16:307; pvlib's defaults): a tuned u0 changes the heat-balance loss."""
    p = load_pipeline()
    assert (p["heat"]["u0"], p["heat"]["u1"]) == (U0, U1)
    an = pd.DataFrame([_row("hot_cell", "cell", 20.0, [(0.0, 1 / 12, 0.0, 1 / 6)])])
    base = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0}, p)
    tuned = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0},
                               p.replace(heat={"u0": 2 * U0, "u1": 2 * U1}))
    # twice U sheds the same rise's heat twice over, and the halo shrinks by sqrt(2); the
    # share of the operating power is read at the Faiman temperature of each U
    u = U0 + U1 * 2.0
    area = (2.0 / 12) * (1.0 / 6)
    halo = (2.0 / 12 + 1.0 / 6) * math.sqrt(0.03 / u)   # inner edges of a corner cell [m] x L
    tf = [1.0 - 0.0035 * float(pvlib.temperature.faiman(850.0, 25.0, 2.0, u0=k * U0, u1=k * U1) - 25.0)
          for k in (1, 2)]
    ratio = 2.0 * (area + halo / math.sqrt(2.0)) / (area + halo) * tf[0] / tf[1]
    assert tuned["power_loss_w"].iloc[0] / base["power_loss_w"].iloc[0] == pytest.approx(ratio, rel=1e-6)


def test_open_module_yardstick_against_pvsyst_model():
    """eta*G/U equals the PVsyst cell-temperature difference between an open and a working module.

    Reference: pvlib.temperature.pvsyst_cell, T = Ta + alpha G (1 - eta) / (u_c + u_v v);
    with alpha = 1 and the same U, T(eta = 0) - T(eta) = eta G / U.
    """
    g, ws, eta = 870.0, 2.1, 0.2
    u = 25.0 + 6.84 * ws
    t_open = pvlib.temperature.pvsyst_cell(g, 26.5, ws, u_c=25.0, u_v=6.84, module_efficiency=0.0,
                                           alpha_absorption=1.0)
    t_work = pvlib.temperature.pvsyst_cell(g, 26.5, ws, u_c=25.0, u_v=6.84, module_efficiency=eta,
                                           alpha_absorption=1.0)
    assert loss.open_module_yardstick(g, ws, eta, **HEAT) == pytest.approx(t_open - t_work, rel=1e-12)
    assert loss.open_module_yardstick(g, ws, eta, **HEAT) == pytest.approx(eta * g / u)
    # at the operating temperature the efficiency drops by gamma (datasheet convention)
    y_hot = loss.open_module_yardstick(g, ws, eta, temp_module=55.0, gamma_pmax_pct_per_k=-0.35, **HEAT)
    assert y_hot == pytest.approx(eta * (1 - 0.0035 * 30.0) * g / u)


def test_thermal_deficit_pid():
    """A PID module warmer by half the open-module rise has lost half its power."""
    g, ws, ta = COND["poa_global"], COND["wind_speed"], COND["temp_air"]
    t = float(pvlib.temperature.faiman(g, ta, ws))
    yard = loss.open_module_yardstick(g, ws, SPEC.efficiency, t, SPEC.gamma_pmax_pct_per_k, **HEAT)
    an = pd.DataFrame([_row("pid", "module", yard / 2), _row("pid", "module", -1.0, idx=(1,)),
                       _row("pid", "module", 3 * yard, idx=(2,)), _row("pid", "module", float("nan"), idx=(3,))])
    out = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0})
    assert (out["loss_method"] == "thermal_deficit").all()
    assert out["power_loss_w"].iloc[0] == pytest.approx(200.0, rel=1e-9)
    assert out["power_loss_w"].iloc[1] == 0.0  # cooler than the reference: no loss
    assert out["power_loss_w"].iloc[2] == pytest.approx(400.0)  # clipped at the whole module
    assert math.isnan(out["power_loss_w"].iloc[3])  # degenerate input: NaN, not an exception
    p_op = 400.0 * g / 1000.0 * (1 - 0.0035 * (t - 25.0))
    assert out["power_loss_w_flight"].iloc[0] == pytest.approx(p_op / 2, rel=1e-9)


def test_heat_balance_hot_cell():
    """The extra heat of a hot region, recovered from pvlib's PVsyst model, is the power lost.

    A region of area A converting dP less than its neighbours warms, by the PVsyst
    cell-temperature model (pvlib.temperature.pvsyst_cell), by dT = (dP/A) / U.
    """
    g, ta, ws = COND["poa_global"], COND["temp_air"], COND["wind_speed"]
    cell_uv = (0.5, 0.5 + 1 / 12, 0.0, 1 / 6)
    area = 2.0 / 12 * 1.0 / 6  # one cell [m2]
    d_p = 12.0  # W dissipated in the cell at the flight
    eta_loc = 0.2 - d_p / (g * area)
    dt = float(pvlib.temperature.pvsyst_cell(g, ta, ws, 25.0, 6.84, module_efficiency=eta_loc, alpha_absorption=1)
               - pvlib.temperature.pvsyst_cell(g, ta, ws, 25.0, 6.84, module_efficiency=0.2, alpha_absorption=1))
    an = pd.DataFrame([_row("hot_cell", "cell", dt, [cell_uv])])
    no_halo = {"sheet_conductance_w_k": 0.0}  # a region without lateral conduction, as the PVsyst model
    out = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0}, no_halo)
    assert out["loss_method"].iloc[0] == "heat_balance"
    assert out["power_loss_w_flight"].iloc[0] == pytest.approx(d_p, rel=1e-9)
    t = float(pvlib.temperature.faiman(g, ta, ws))
    assert out["power_loss_w"].iloc[0] == pytest.approx(d_p * 1000 / g / (1 - 0.0035 * (t - 25.0)), rel=1e-9)
    # with the default laminate the conduction halo adds U dT P L; P = the cell's three inner
    # edges (its edge at v = 0 lies on the module frame)
    halo = loss.estimate_loss(an, SPEC, COND, None, load_pipeline())
    kt = load_pipeline()["loss"]["sheet_conductance_w_k"]
    u = 25.0 + 6.84 * ws
    perim = 2 * (2.0 / 12) + 1.0 / 6
    # rel 1e-6: the outline is matched within 1 nm
    assert halo["power_loss_w_flight"].iloc[0] == pytest.approx(d_p + u * dt * perim * math.sqrt(kt / u), rel=1e-6)
    # bounded by the substring: a huge delta T cannot lose more than pmax / bypass_diodes
    big = loss.estimate_loss(pd.DataFrame([_row("hot_cell", "cell", 500.0, [cell_uv])]), SPEC, COND, None)
    assert big["power_loss_w"].iloc[0] == pytest.approx(400.0 / 3)
    # a spot spanning two substrings is bounded by two of them
    two = loss.estimate_loss(pd.DataFrame([_row("junction_box", "spot", 900.0, [(0.0, 0.1, 0.2, 0.5)])]),
                             SPEC, COND, None)
    assert two["power_loss_w"].iloc[0] == pytest.approx(800.0 / 3)


def test_hot_cell_cluster_uses_each_cells_rise():
    """A cluster of a 30 K and a 10 K cell is not a 2-cell region at 30 K (heat balance per cell)."""
    from types import SimpleNamespace

    cells = [(0.5, 0.5 + 1 / 12, 0.5, 0.5 + 1 / 6), (0.5 + 1 / 12, 0.5 + 2 / 12, 0.5, 0.5 + 1 / 6)]
    grid = np.full((1, 12, 6), 40.0)
    grid[0, 6, 3], grid[0, 7, 3] = 70.0, 50.0
    stats = SimpleNamespace(cell_p95=grid)
    an = pd.DataFrame([_row("several_hot_cells", "cells", 30.0, cells)])
    kw = dict(conditions=COND, site=None, settings={"sheet_conductance_w_k": 0.0})
    plain = loss.estimate_loss(an, SPEC, **kw)
    per_cell = loss.estimate_loss(an, SPEC, **kw, stats=stats, reference_c=[40.0])
    u = 25.0 + 6.84 * COND["wind_speed"]
    a_cell = 2.0 / 12 * 1.0 / 6
    assert plain["power_loss_w_flight"].iloc[0] == pytest.approx(u * 2 * a_cell * 30.0)
    assert per_cell["power_loss_w_flight"].iloc[0] == pytest.approx(u * a_cell * (30.0 + 10.0))
    # a single-box region keeps the anomaly's own statistic
    one = loss.estimate_loss(pd.DataFrame([_row("hot_cell", "cell", 30.0, cells[:1])]), SPEC, **kw,
                             stats=stats, reference_c=[45.0])
    assert one["power_loss_w_flight"].iloc[0] == pytest.approx(u * a_cell * 30.0)


def test_conduction_halo_against_fin_equation():
    """Heat shed by the halo beyond a warm edge equals the infinite-fin result U dT L.

    Reference: the thin-fin equation k t theta'' = 2 h theta (here U covers both faces),
    solved numerically with scipy.integrate.solve_bvp, against Incropera & DeWitt, section
    3.6.2 (infinite fin: q = sqrt(h P k A) theta_b).
    """
    from scipy.integrate import solve_bvp, trapezoid

    kt, ws, dt = 0.03, 2.0, 20.0
    u = U0 + U1 * ws
    lam = float(loss.lateral_spread_m(ws, kt, **HEAT))
    assert lam == pytest.approx(math.sqrt(kt / u))
    x = np.linspace(0.0, 20 * lam, 401)
    sol = solve_bvp(lambda x, y: np.vstack([y[1], u / kt * y[0]]), lambda a, b: np.array([a[0] - dt, b[0]]),
                    x, np.vstack([dt * (1 - x / x[-1]), np.full_like(x, -dt / x[-1])]), tol=1e-6,
                    max_nodes=100000)
    assert sol.success
    shed = trapezoid(u * sol.sol(x)[0], x)  # W per metre of edge
    assert float(loss.heat_balance_loss(dt, 0.0, ws, perimeter_m=1.0, sheet_conductance_w_k=kt, **HEAT)) == \
        pytest.approx(shed, rel=1e-3)
    # conduction into the fin at its root, -k t theta'(0), is the same heat (energy balance)
    assert -kt * sol.sol(0.0)[1] == pytest.approx(shed, rel=1e-3)


def test_region_geometry_helpers():
    # edges on the module outline do not count: a corner cell has two inner edges
    assert loss.region_inner_perimeter_m([(0, 0.5, 0, 0.5)], 2.0, 1.0) == pytest.approx(1.0 + 0.5)
    assert loss.region_inner_perimeter_m([(0.25, 0.5, 0.25, 0.5)], 2.0, 1.0) == pytest.approx(2 * (0.5 + 0.25))
    assert loss.region_inner_perimeter_m([], 2.0, 1.0) == 0.0
    assert loss.region_area_fraction([]) == 1.0
    assert loss.region_area_fraction([(0, 0.5, 0, 0.5), (0.25, 0.75, 0, 0.5)]) == pytest.approx(0.375)  # union
    assert loss.substrings_touched([(0, 1, 1 / 3, 2 / 3)], 3) == 1  # exact borders do not spill over
    assert loss.substrings_touched([(0, 1, 0.3, 0.7)], 3) == 3
    assert loss.substrings_touched([], 3) == 3


# --------------------------------------------------------------------------- energy


def test_specific_yield_clear_sky():
    lat, lon = 47.6, 9.13
    flat = energy.specific_yield(lat, lon, 0.0, 180.0, derate=1.0)
    with warnings.catch_warnings():
        # pvlib 0.13 calls pandas accessors that pandas 3 deprecates (not ours)
        warnings.simplefilter("ignore", DeprecationWarning)
        loc = pvlib.location.Location(lat, lon, tz="UTC", altitude=0.0)
        times = pd.date_range("2025-01-01 00:30", periods=8760, freq="1h", tz="UTC")
        sp = loc.get_solarposition(times)
        ghi_ineichen = float(loc.get_clearsky(times, solar_position=sp)["ghi"].sum()) / 1000.0
        ghi_haurwitz = float(pvlib.clearsky.haurwitz(sp["apparent_zenith"])["ghi"].sum()) / 1000.0
    # on a horizontal plane the isotropic transposition (Liu & Jordan 1963) returns GHI itself
    assert flat == pytest.approx(ghi_ineichen, rel=1e-6)
    # Haurwitz (1945) ignores turbidity, so it sits above Ineichen with climatological
    # turbidity, by up to ~20 % at a central European site (from memory)
    assert 0.8 * ghi_haurwitz < flat < ghi_haurwitz
    # a south-facing 30 deg tilt gains on a clear-sky year at 47.6 N (common practice: 10-30 %)
    tilted = energy.specific_yield(lat, lon, 30.0, 180.0, derate=1.0)
    assert 1.05 * flat < tilted < 1.35 * flat
    # facing north loses
    assert energy.specific_yield(lat, lon, 30.0, 0.0, derate=1.0) < flat
    # with the default derate the yield is in the range of central Europe, 900-1300 kWh/kWp
    # (from memory, solar atlases for southern Germany / Switzerland)
    assert 900.0 < energy.specific_yield(lat, lon, 30.0, 180.0, settings=load_pipeline()) < 1300.0


def test_energy_from_manifest_or_clear_sky_and_cost():
    import geopandas as gpd
    from shapely.geometry import box

    from pvscan.io.manifest import LayoutSpec, Site

    an = pd.DataFrame([_row("open_module", "module", 7.0)])
    site = Site(name="Invented Meadow", specific_yield_kwh_per_kwp=1150.0, tariff_per_kwh=0.08, currency="EUR")
    out = loss.estimate_loss(an, SPEC, COND, site, load_pipeline())
    assert out["energy_loss_kwh_per_year"].iloc[0] == pytest.approx(0.4 * 1150.0)  # kW x kWh/kWp
    assert out["yearly_cost"].iloc[0] == pytest.approx(0.4 * 1150.0 * 0.08)
    assert out["currency"].iloc[0] == "EUR"
    assert out.attrs["specific_yield_source"] == "manifest"
    # no yield in the manifest: the clear-sky year at the layout's centroid and plane of array
    mods = gpd.GeoDataFrame({"module_id": ["M0"]}, geometry=[box(510000, 5272000, 510001, 5272002)],
                            crs="EPSG:32632")
    lon, lat = energy.site_lonlat(mods)
    assert (lon, lat) == pytest.approx((9.1330, 47.6013), abs=1e-3)  # pyproj, UTM 32N
    lay = LayoutSpec(tilt_deg=30.0, azimuth_deg=180.0)
    cs = loss.estimate_loss(an, SPEC, COND, Site(name="x"), load_pipeline(), modules=mods, layout=lay)
    sy = energy.specific_yield(lat, lon, 30.0, 180.0, derate=float(load_pipeline()["loss"]["energy_derate"]))
    assert cs.attrs["specific_yield_source"] == "clear_sky"
    assert cs["energy_loss_kwh_per_year"].iloc[0] == pytest.approx(0.4 * sy)
    # nothing to locate: energy is unknown (NaN), the power loss stands
    none = loss.estimate_loss(an, SPEC, COND, Site(name="x"))
    assert math.isnan(none["energy_loss_kwh_per_year"].iloc[0]) and none["power_loss_w"].iloc[0] == 400.0


def test_loss_settings_schema_rejects_unknown_key():
    from pvscan.errors import PipelineError

    p = load_pipeline()
    with pytest.raises(PipelineError, match="loss"):
        p.replace(loss={"energy_derate": 1.5})
    with pytest.raises(PipelineError, match="unknown key"):
        p.replace(loss={"derate_typo": 0.5})


def test_patchy_pid_uses_the_mean_rise():
    """Heat balance: heat added = U x area x the *mean* rise. A patchy PID module whose median
    rise is a quarter of the open-module rise but whose mean is half has lost half its power."""
    from types import SimpleNamespace

    g, ws, ta = COND["poa_global"], COND["wind_speed"], COND["temp_air"]
    t = float(pvlib.temperature.faiman(g, ta, ws))
    yard = loss.open_module_yardstick(g, ws, SPEC.efficiency, t, SPEC.gamma_pmax_pct_per_k, **HEAT)
    an = pd.DataFrame([_row("pid", "module", yard / 4)])
    ref = np.array([40.0])
    stats = SimpleNamespace(table=pd.DataFrame({"t_median_c": ref + yard / 4, "t_mean_c": ref + yard / 2}))
    out = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0}, stats=stats,
                             reference_c=ref)
    assert out["power_loss_w"].iloc[0] == pytest.approx(200.0, rel=1e-9)
    plain = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0})
    assert plain["power_loss_w"].iloc[0] == pytest.approx(100.0, rel=1e-9)


@pytest.mark.parametrize("scale, severity", [(1.0, "repair"), (0.02, "monitor")])
def test_pid_string_carries_each_modules_own_loss(scale, severity):
    """A PID string is one anomaly over its modules (CONTRACT.md). By each module's heat
    balance (Faiman 2008) a module warmer by the share f of the open-module rise eta*G/U has
    lost f of its power, so a string whose modules fade from the negative end, 0.6, 0.3 and
    0.15 of the rise, loses 0.6 + 0.3 + 0.15 = 1.05 nameplates: its total is the string's, and
    each module keeps its own share in modules.geojson (no double count). A string losing less
    than repair_pid_power_loss_w (40 W at STC, pipelines/post_flight.toml) is monitored."""
    from types import SimpleNamespace

    g, ws, ta = COND["poa_global"], COND["wind_speed"], COND["temp_air"]
    t = float(pvlib.temperature.faiman(g, ta, ws))
    yard = loss.open_module_yardstick(g, ws, SPEC.efficiency, t, SPEC.gamma_pmax_pct_per_k, **HEAT)
    f = scale * np.array([0.6, 0.3, 0.15])
    ref = np.full(4, 40.0)
    t_med = ref + np.append(f * yard, 0.0)
    stats = SimpleNamespace(table=pd.DataFrame({"t_median_c": t_med, "t_mean_c": t_med}))
    an = pd.DataFrame([_row("pid", "modules", float(np.median(f)) * yard, idx=(0, 1, 2),
                            delta_t_norm_k=float(np.median(f)) * yard, t_max_c=50.0)])
    out = loss.estimate_loss(an, SPEC, COND, {"specific_yield_kwh_per_kwp": 1000.0}, stats=stats,
                             reference_c=ref)
    assert out["power_loss_w"].iloc[0] == pytest.approx(400.0 * f.sum(), rel=1e-9)
    shares = loss.module_losses(out, 4, pmax_w=400.0)
    assert shares["power_loss_w"].tolist() == pytest.approx(list(400.0 * f) + [0.0], rel=1e-9)
    assert shares["energy_loss_kwh_per_year"].sum() == pytest.approx(out["energy_loss_kwh_per_year"].iloc[0])
    assert out["severity"].iloc[0] == severity
