"""Site history over many flights: trend plots (words, whole markers, temperatures) and
degradation (normalised delta T per flight, Theil-Sen slope per year), library and CLI."""
from __future__ import annotations

import csv
import json
import math
from datetime import datetime, timedelta, timezone

import geopandas as gpd
import numpy as np
import pytest
from click.testing import CliRunner
from history_site import SPRING, SUMMER, write_result
from matplotlib.dates import date2num

from pvscan import history as H
from pvscan.cli.main import cli
from pvscan.history.degradation import module_degradation
from pvscan.history.trend import trend_figures

#: Five flights over two years (local time +02:00), the fourth one an odd flight.
STARTS = [datetime(2025, 4, 10, 10, 30), datetime(2025, 9, 2, 11, 0), datetime(2026, 3, 20, 10, 45),
          datetime(2026, 8, 12, 12, 15), datetime(2027, 2, 25, 11, 30)]
TZ = timezone(timedelta(hours=2))
SLOPE = 3.0  # K/yr, the hot spot's true growth
ODD = 3      # index of the flight that reads the hot spot 20 K too warm (a reflection)


def _years(k: int) -> float:
    """Time since the first flight in Julian years, as the history computes it (UTC)."""
    return (STARTS[k] - STARTS[0]).total_seconds() / 86400.0 / 365.25


@pytest.fixture
def five_flights(tmp_path):
    db = tmp_path / "site.gpkg"
    for k, start in enumerate(STARTS):
        dtn = 10.0 + SLOPE * _years(k) + (20.0 if k == ODD else 0.0)
        anomalies = [{"module_id": "T01-R1-C01", "defect": "hot_cell", "severity": "repair", "dtn": dtn, "loss": 20},
                     {"module_id": "T02-R2-C03", "defect": "hot_cell", "severity": "monitor", "dtn": 8.0, "loss": 5}]
        if k >= 2:  # a defect that appears later, on the module's own median (bypassed substring)
            anomalies.append({"module_id": "T01-R2-C02", "defect": "bypassed_substring", "severity": "repair",
                              "dtn": 5.0 + k, "loss": 130})
        s = start.replace(tzinfo=TZ)
        write_result(tmp_path / f"r{k}", flight_id=f"F{k}", start=s.isoformat(),
                     end=(s + timedelta(minutes=40)).isoformat(), conditions=SPRING if k % 2 == 0 else SUMMER,
                     anomalies=anomalies, seed=10 + k)
        H.add_flight(db, tmp_path / f"r{k}")
    return db


def test_theil_sen_slope_ignores_one_odd_flight(five_flights):
    """Theil-Sen (Theil 1950, Sen 1968): with one outlier among five points on a line, six of
    the ten pairwise slopes are the line's, so their median is the true slope exactly, while
    least squares is pulled away by the odd flight."""
    deg = module_degradation(five_flights)
    m = deg.modules.set_index("module_id")
    assert set(m.index) == {"T01-R1-C01", "T02-R2-C03", "T01-R2-C02"}
    hot = m.loc["T01-R1-C01"]
    assert hot["slope_k_per_year"] == pytest.approx(SLOPE, abs=1e-6)  # years kept to 1e-6 yr (30 s)
    assert hot["slope_low_k_per_year"] <= SLOPE <= hot["slope_high_k_per_year"]
    ser = deg.series[deg.series["module_id"] == "T01-R1-C01"]
    assert list(ser["flight_id"]) == [f"F{k}" for k in range(5)] and set(ser["source"]) == {"anomaly"}
    assert ser["years"].to_numpy() == pytest.approx([_years(k) for k in range(5)], abs=1e-6)
    lsq = np.polyfit(ser["years"], ser["delta_t_norm_k"], 1)[0]
    assert abs(lsq - SLOPE) > 1.0  # what a plain fit would have said
    assert m.loc["T02-R2-C03", "slope_k_per_year"] == pytest.approx(0.0, abs=1e-9)  # a stable hot cell
    later = m.loc["T01-R2-C02"]  # anomalous from the third flight on, measured in all five
    assert later["n_flights"] == 5 and later["n_flights_anomalous"] == 3
    assert later["first_flight"] == "F0" and later["defects"] == "bypassed_substring"


def test_degradation_layer_and_csv(five_flights, tmp_path):
    layer = gpd.read_file(five_flights, layer="module_degradation", engine="pyogrio")
    assert len(layer) == 3 and layer.crs.to_epsg() == 4326
    row = layer.set_index("module_id").loc["T01-R1-C01"]
    assert row["slope_k_per_year"] == pytest.approx(SLOPE, abs=1e-6)
    assert [f for f, _ in json.loads(row["series_json"])] == [f"F{k}" for k in range(5)]
    out = tmp_path / "deg.csv"
    r = CliRunner().invoke(cli, ["history", "degradation", str(five_flights), "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert "T01-R1-C01: +3.0 K/yr" in r.stdout
    with open(out, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [c for c in rows[0] if c.startswith("dtn_")] == [f"dtn_F{k}" for k in range(5)]
    hot = next(x for x in rows if x["module_id"] == "T01-R1-C01")
    assert float(hot["dtn_F0"]) == pytest.approx(10.0, abs=1e-3)
    before = out.read_bytes()
    r = CliRunner().invoke(cli, ["history", "degradation", str(five_flights), "--out", str(out)])
    assert r.exit_code == 1 and "--overwrite" in r.stderr and out.read_bytes() == before
    r = CliRunner().invoke(cli, ["history", "degradation", str(five_flights), "--out", str(out), "--overwrite"])
    assert r.exit_code == 0, r.output


def test_trend_plots_words_temperatures_and_whole_markers(five_flights, tmp_path):
    figs = trend_figures(H.site_trend(five_flights))
    assert set(figs) == {"counts.png", "loss.png", "temperature.png"}
    counts_ax = figs["counts.png"].axes[0]
    labels = [t.get_text() for t in counts_ax.get_legend().get_texts()]
    assert "hot cell" in labels and "bypassed substring" in labels
    assert not any("_" in t for t in labels)  # classes in words
    temp_ax = figs["temperature.png"].axes[0]
    names = [line.get_label() for line in temp_ax.get_lines()]
    assert names == ["modules (median)", "air"]
    air = temp_ax.get_lines()[1].get_ydata()
    assert list(air) == [SPRING["ambient_c"] if k % 2 == 0 else SUMMER["ambient_c"] for k in range(5)]
    # every marker lies inside its axes with room to spare: nothing is cut at the edge
    for fig in figs.values():
        for ax in fig.axes:
            (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
            for line in ax.get_lines():
                if not line.get_marker() or line.get_marker() == "None":
                    continue
                xs = np.asarray(date2num(line.get_xdata()), dtype=float)
                ys = np.asarray(line.get_ydata(), dtype=float)
                ok = np.isfinite(ys)
                pad_x, pad_y = 0.02 * (x1 - x0), 0.02 * (y1 - y0)
                assert np.all(xs > x0 + pad_x) and np.all(xs < x1 - pad_x), (ax.get_title(), line.get_label())
                assert np.all(ys[ok] > y0 + pad_y) and np.all(ys[ok] < y1 - pad_y), (ax.get_title(), line.get_label())
    paths = H.write_trend(H.site_trend(five_flights), tmp_path / "tr")
    assert sorted(p.name for p in paths) == ["counts.png", "flights.csv", "loss.png", "modules.csv",
                                             "temperature.png"]


def test_trend_normalised_rise_uses_the_pipeline_heat_model(five_flights):
    """The trend's normalised rise follows [heat] u0, u1 (pvscan.physics.heat, one copy of the
    Faiman model): a healthy module at g_ref and wind_ref runs g_ref / U(wind_ref) over the air."""
    from pvscan.io.settings import load_pipeline

    base = H.site_trend(five_flights).flights["median_rise_norm_k"].to_numpy()
    assert base == pytest.approx(1000.0 / (25.0 + 6.84), abs=0.6)
    pipe = {k: dict(v) for k, v in load_pipeline().items()}
    pipe["heat"] = {"u0": 20.0, "u1": 6.84}
    other = H.site_trend(five_flights, settings=pipe).flights["median_rise_norm_k"].to_numpy()
    assert not np.allclose(other, base)
    assert np.isfinite(other).all() and all(math.isfinite(x) for x in base)
