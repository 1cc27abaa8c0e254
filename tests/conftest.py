"""Shared fixtures: tiny synthetic GeoTIFFs and module frames.

Keep them general; add new fixtures with small edits. Everything is seeded and small
(a few hundred pixels a side) so each test file runs in seconds.
"""
from __future__ import annotations

import os
import warnings
from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine
from rasterio.errors import NotGeoreferencedWarning

#: Projected CRS in metres used by the synthetic rasters (UTM zone 33N; invented site).
TEST_CRS = "EPSG:32633"
#: Origin (upper-left corner) of the synthetic rasters [m].
TEST_ORIGIN = (500_000.0, 4_000_000.0)
FRAME_COLUMNS = ["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]

#: Seed of the test suite when PVSCAN_TEST_SEED is not set (the demo's seed).
DEFAULT_TEST_SEED = 20260614


def test_seed(offset: int = 0) -> int:
    """The suite's random seed: env ``PVSCAN_TEST_SEED`` (default :data:`DEFAULT_TEST_SEED`)
    plus ``offset`` (distinct draws within one test). Every test that draws or simulates
    takes its seed from here, so ``PVSCAN_TEST_SEED=N pytest`` reruns the suite on other draws."""
    raw = os.environ.get("PVSCAN_TEST_SEED", "").strip()
    try:
        base = int(raw) if raw else DEFAULT_TEST_SEED
    except ValueError:
        raise ValueError(f"PVSCAN_TEST_SEED must be an integer, got {raw!r}") from None
    return base + int(offset)


test_seed.__test__ = False  # a helper, not a test


@pytest.fixture
def seed() -> int:
    """The suite's random seed (:func:`test_seed`)."""
    return test_seed()


@pytest.fixture
def rng():
    """A generator seeded from :func:`test_seed`, so every test is deterministic for a seed."""
    return np.random.default_rng(test_seed())


@pytest.fixture
def write_tif(tmp_path):
    """Factory writing a single- or multi-band GeoTIFF; returns its path.

    ``write_tif(name, data, gsd=0.05, origin=TEST_ORIGIN, crs=TEST_CRS, nodata=None,
    transform=None, tiled=True, block=64, compress="deflate", mask=None, driver="GTiff")``;
    ``data`` is 2-D (one band) or 3-D (bands first). ``crs=None`` writes no CRS,
    ``transform=False`` no geotransform.
    """

    def _write(
        name,
        data,
        *,
        gsd=0.05,
        origin=TEST_ORIGIN,
        crs=TEST_CRS,
        nodata=None,
        transform=None,
        tiled=True,
        block=64,
        compress="deflate",
        mask=None,
        driver="GTiff",
    ) -> Path:
        data = np.asarray(data)
        if data.ndim == 2:
            data = data[None]
        count, height, width = data.shape
        path = tmp_path / name
        profile = dict(driver=driver, width=width, height=height, count=count, dtype=data.dtype.name)
        if transform is None:
            transform = Affine(gsd, 0.0, origin[0], 0.0, -gsd, origin[1])
        if transform is not False:
            profile["transform"] = transform
        if crs is not None:
            profile["crs"] = crs
        if nodata is not None:
            profile["nodata"] = nodata
        if driver == "GTiff":
            if tiled:
                profile.update(tiled=True, blockxsize=block, blockysize=block)
            if compress:
                profile["compress"] = compress
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)  # transform=False on purpose
            with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=True), rasterio.open(path, "w", **profile) as ds:
                ds.write(data)
                if mask is not None:
                    ds.write_mask(np.where(mask, 255, 0).astype("uint8"))
        return path

    return _write


def frames_from_params(x0, y0, angle_deg, length_m, width_m) -> np.ndarray:
    """Module-local frames (n, 6) from the lower-left corner, rotation and size.

    ``u`` runs along the long side at ``angle_deg`` counter-clockwise from east, ``v``
    across the short side, 90 degrees further (right-handed frame).
    """
    x0, y0, ang, ln, wd = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (x0, y0, angle_deg, length_m, width_m))
    )
    t = np.radians(ang)
    return np.stack(
        [x0, y0, ln * np.cos(t), ln * np.sin(t), -wd * np.sin(t), wd * np.cos(t)], axis=-1
    ).reshape(-1, 6)


def modules_gdf(frames: np.ndarray, crs=TEST_CRS) -> gpd.GeoDataFrame:
    """A minimal modules GeoDataFrame with the documented frame columns and footprints."""
    frames = np.asarray(frames, dtype=float).reshape(-1, 6)
    u = np.array([0.0, 1.0, 1.0, 0.0])
    v = np.array([0.0, 0.0, 1.0, 1.0])
    x = frames[:, 0:1] + u * frames[:, 2:3] + v * frames[:, 4:5]
    y = frames[:, 1:2] + u * frames[:, 3:4] + v * frames[:, 5:6]
    n = len(frames)
    gdf = gpd.GeoDataFrame(
        {
            "module_id": [f"M{i + 1:05d}" for i in range(n)],
            "table_id": ["T0001"] * n,
            "string_id": [None] * n,
            "string_index": [None] * n,
            "table_row": [1] * n,
            "table_col": list(range(1, n + 1)),
        },
        geometry=shapely.polygons(np.stack([x, y], axis=-1)),
        crs=crs,
    )
    for k, col in enumerate(FRAME_COLUMNS):
        gdf[col] = frames[:, k]
    gdf["lower_edge"] = "u"
    return gdf


@pytest.fixture
def make_modules():
    """Factory ``make_modules(x0, y0, angle_deg, length_m=2.0, width_m=1.0)`` -> GeoDataFrame."""

    def _make(x0, y0, angle_deg=0.0, length_m=2.0, width_m=1.0):
        return modules_gdf(frames_from_params(x0, y0, angle_deg, length_m, width_m))

    return _make


@pytest.fixture
def module_spec():
    """A 72-cell full-cell module with three bypass diodes (invented datasheet)."""
    from pvscan.io.manifest import ModuleSpec

    return ModuleSpec(
        pmax_w=410.0, width_m=1.038, length_m=2.094, cells_across=6, cells_along=12, bypass_diodes=3
    )


@pytest.fixture
def module_spec_half_cut():
    """A 144-half-cell module with three bypass diodes (invented datasheet)."""
    from pvscan.io.manifest import ModuleSpec

    return ModuleSpec(
        pmax_w=550.0, width_m=1.134, length_m=2.278, cells_across=6, cells_along=12, bypass_diodes=3,
        half_cut=True,
    )  # fmt: skip


def pixel_centres(transform: Affine, shape) -> tuple[np.ndarray, np.ndarray]:
    """Map coordinates (x, y) of every pixel centre of a north-up raster [m]."""
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    x = transform.c + transform.a * (cols + 0.5)
    y = transform.f + transform.e * (rows + 0.5)
    return x, y


@pytest.fixture
def centres():
    """``centres(transform, shape) -> (x, y)`` of every pixel centre [m]."""
    return pixel_centres

