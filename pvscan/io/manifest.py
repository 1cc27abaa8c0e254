"""The flight manifest: the facts of one flight, read from ``flight.toml``.

A manifest names the orthomosaic tiles and the layout (paths relative to the manifest's
folder), the time span of the flight, the conditions, the module datasheet and the array
geometry. :func:`load_flight` reads it into frozen dataclasses after validating it against
``schemas/flight.schema.json`` (JSON Schema 2020-12); unknown or misspelled keys, wrong
types and missing files are reported in one line naming the key or path.

Examples
--------
>>> flight = load_flight("demo_site/flight/flight.toml")      # doctest: +SKIP
>>> flight.module.efficiency                                   # doctest: +SKIP
0.1886...
"""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

from pvscan.errors import ManifestError
from pvscan.io.resources import describe_error, load_schema, read_toml_file, schema_errors
from pvscan.io.times import parse_datetime

__all__ = [
    "Flight",
    "Site",
    "FlightInfo",
    "OrthoSpec",
    "ConditionsSpec",
    "ModuleSpec",
    "LayoutSpec",
    "load_flight",
    "flight_from_dict",
]


@dataclass(frozen=True)
class Site:
    """The plant.

    Attributes
    ----------
    name : str
        Free text.
    specific_yield_kwh_per_kwp : float or None
        Yearly specific yield [kWh/kWp/year]; when None, loss.py estimates it.
    tariff_per_kwh : float or None
        Value of energy [currency/kWh], for a yearly cost.
    currency : str or None
    id : str
        Identifier of the site (defaults to the name).
    """

    name: str
    specific_yield_kwh_per_kwp: float | None = None
    tariff_per_kwh: float | None = None
    currency: str | None = None
    id: str = ""


@dataclass(frozen=True)
class FlightInfo:
    """Paths and time span of the flight (paths resolved against the manifest's folder).

    Attributes
    ----------
    id : str
        Flight identifier (default: the start time, ``YYYYMMDDTHHMM`` UTC).
    orthos : tuple of Path
        Single-band GeoTIFF tiles of one flight.
    layout : Path or None
        Module or table polygons (GeoJSON, GeoPackage or Shapefile); None when the manifest
        gives none (``pvscan inspect`` then detects the module layout in the ortho).
    start, end : datetime
        Time span of the flight (timezone-aware).
    frames : Path or None
        Footprints of the camera frames with their ``time``.
    altitude_m : float or None
        Flight height above the modules [m] (for atmospheric transmission).
    """

    id: str
    orthos: tuple[Path, ...]
    layout: Path | None
    start: datetime
    end: datetime
    frames: Path | None = None
    altitude_m: float | None = None

    @property
    def mid(self) -> datetime:
        """Middle of the flight [aware datetime]."""
        return self.start + (self.end - self.start) / 2


@dataclass(frozen=True)
class OrthoSpec:
    """How to read the orthomosaic values: ``value = raw * scale + offset`` in ``units``.

    Attributes
    ----------
    units : {"celsius", "kelvin"}
    scale, offset : float
    nodata : float or None
        Overrides the GeoTIFF's nodata tag.
    emissivity : float
        Emissivity the export assumed when it wrote temperatures [-].
    reflected_c : float
        Reflected apparent temperature the export assumed [degC].
    """

    units: str = "celsius"
    scale: float = 1.0
    offset: float = 0.0
    nodata: float | None = None
    emissivity: float = 1.0
    reflected_c: float = 20.0


@dataclass(frozen=True)
class ConditionsSpec:
    """Conditions during the flight: constants, or a weather series.

    Attributes
    ----------
    poa_irradiance_w_m2 : float or None
        Plane-of-array irradiance [W/m2].
    ambient_c : float or None
        Air temperature [degC].
    wind_m_s : float or None
        Wind speed [m/s].
    sky_c : float or None
        Apparent sky temperature reflected by the glass [degC]; estimated when None.
    relative_humidity_pct : float or None
        Relative humidity [%].
    series : Path or None
        CSV with columns time, poa_irradiance_w_m2, ambient_c, wind_m_s.
    """

    poa_irradiance_w_m2: float | None = None
    ambient_c: float | None = None
    wind_m_s: float | None = None
    sky_c: float | None = None
    relative_humidity_pct: float | None = None
    series: Path | None = None


@dataclass(frozen=True)
class ModuleSpec:
    """Module datasheet.

    Attributes
    ----------
    pmax_w : float
        Nameplate power at STC [W].
    gamma_pmax_pct_per_k : float
        Temperature coefficient of pmax [%/K].
    width_m, length_m : float
        Short and long side [m].
    cells_across, cells_along : int
        Full cells across the short side and along the long side.
    half_cut : bool
        Half-cut cells: twice as many cells along the long side.
    bypass_diodes : int
        Number of bypass diodes (substrings), each a strip running the full length.
    emissivity : float
        Emissivity of the front glass in the camera band [-].
    junction_box : {"edge", "split"}
        One box at the centre of a short edge, or split boxes on the middle line
        (default: split for half-cut modules, else edge).
    voc_v, isc_a, vmp_v, imp_a : float or None
        Electrical datasheet values at STC [V], [A].
    alpha_isc_pct_per_k, beta_voc_pct_per_k : float or None
        Temperature coefficients of Isc and Voc [%/K].
    model : str
    """

    pmax_w: float
    width_m: float
    length_m: float
    cells_across: int
    cells_along: int
    bypass_diodes: int
    gamma_pmax_pct_per_k: float = -0.35
    half_cut: bool = False
    emissivity: float = 0.85
    junction_box: str = "edge"
    voc_v: float | None = None
    isc_a: float | None = None
    vmp_v: float | None = None
    imp_a: float | None = None
    alpha_isc_pct_per_k: float | None = None
    beta_voc_pct_per_k: float | None = None
    model: str = ""

    @property
    def area_m2(self) -> float:
        """Module area [m2]."""
        return self.width_m * self.length_m

    @property
    def efficiency(self) -> float:
        """Efficiency at STC, pmax / (1000 W/m2 x area) [-]."""
        return self.pmax_w / (1000.0 * self.area_m2)

    @property
    def n_along(self) -> int:
        """Cells along the long side of the cell grid (doubled when half-cut)."""
        return self.cells_along * (2 if self.half_cut else 1)

    @property
    def n_across(self) -> int:
        """Cells across the short side."""
        return self.cells_across

    @property
    def n_cells(self) -> int:
        """Cells in the grid."""
        return self.n_along * self.n_across


@dataclass(frozen=True)
class LayoutSpec:
    """Array facts. rows/cols/orientation/gap apply to table polygons.

    Attributes
    ----------
    rows, cols : int or None
        Module rows across a table, modules along its long axis.
    orientation : {"portrait", "landscape"}
        Portrait: the module's long side runs across the table's long axis.
    gap_m : float
        Gap between modules [m].
    tilt_deg : float
        Module tilt [deg]; 0 horizontal.
    azimuth_deg : float
        Direction the modules face (the lower edge) [deg from north, clockwise].
    """

    rows: int | None = None
    cols: int | None = None
    orientation: str = "portrait"
    gap_m: float = 0.02
    tilt_deg: float = 25.0
    azimuth_deg: float = 180.0


@dataclass(frozen=True)
class Flight:
    """All facts of one flight."""

    path: Path
    root: Path
    site: Site
    flight: FlightInfo
    ortho: OrthoSpec
    conditions: ConditionsSpec
    module: ModuleSpec
    layout: LayoutSpec = field(default_factory=LayoutSpec)


def _suggest(err_msg: str, data: dict) -> str:
    """Add a 'did you mean' hint to an unknown-key message."""
    if not err_msg.startswith("unknown key "):
        return err_msg
    dotted = err_msg.split()[2]
    parts = dotted.split(".")
    schema = load_schema("flight.schema.json")
    node = schema
    for p in parts[:-1]:
        node = node.get("properties", {}).get(p, {})
    known = list(node.get("properties", {}))
    close = difflib.get_close_matches(parts[-1], known, n=1)
    return err_msg + (f" (did you mean {close[0]}?)" if close else "")


def _non_finite(data: dict, prefix: str = "") -> tuple[str, float] | None:
    """The first number that is NaN or infinite (TOML writes them as nan and inf, and JSON
    Schema ranges let them through), but a NaN ortho.nodata, a common nodata value."""
    for k, v in data.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            hit = _non_finite(v, key + ".")
            if hit is not None:
                return hit
        elif isinstance(v, float) and not math.isfinite(v) and not (key == "ortho.nodata" and math.isnan(v)):
            return key, v
    return None


def _resolve(root: Path, rel: str, key: str, where: str, must_exist: bool = True) -> Path:
    p = Path(rel)
    if not p.is_absolute():
        p = root / p
    if must_exist and not p.exists():
        raise ManifestError(f"{where}: key {key}: file not found: {p}")
    return p


def flight_from_dict(data: dict, path: str | Path, check_files: bool = True) -> Flight:
    """Build a :class:`Flight` from a parsed manifest.

    Parameters
    ----------
    data : dict
        The parsed TOML.
    path : path-like
        The manifest's path (paths inside resolve against its folder).
    check_files : bool
        Check that referenced files exist.

    Raises
    ------
    ManifestError
        Naming the key and the problem.
    """
    path = Path(path)
    where = str(path)
    bad = _non_finite(data)
    if bad is not None:
        raise ManifestError(f"{where}: key {bad[0]}: {bad[1]} is not a finite number")
    errs = schema_errors(data, load_schema("flight.schema.json"))
    if errs:
        raise ManifestError(f"{where}: {_suggest(describe_error(errs[0]), data)}")
    root = path.parent.resolve()

    s = data["site"]
    site = Site(
        name=s["name"],
        specific_yield_kwh_per_kwp=s.get("specific_yield_kwh_per_kwp"),
        tariff_per_kwh=s.get("tariff_per_kwh"),
        currency=s.get("currency"),
        id=s.get("id", s["name"]),
    )

    f = data["flight"]
    start = parse_datetime(f["start"], f"{where}: key flight.start", ManifestError)
    end = parse_datetime(f["end"], f"{where}: key flight.end", ManifestError)
    if end < start:
        raise ManifestError(f"{where}: key flight.end: {f['end']} is before flight.start {f['start']}")
    orthos = tuple(
        _resolve(root, o, f"flight.orthos[{i}]", where, check_files) for i, o in enumerate(f["orthos"])
    )
    flight_id = f["id"] if "id" in f else start.astimezone(UTC).strftime("%Y%m%dT%H%MZ")
    info = FlightInfo(
        id=flight_id,
        orthos=orthos,
        layout=_resolve(root, f["layout"], "flight.layout", where, check_files) if "layout" in f else None,
        start=start,
        end=end,
        frames=_resolve(root, f["frames"], "flight.frames", where, check_files) if "frames" in f else None,
        altitude_m=f.get("altitude_m"),
    )

    o = data.get("ortho", {})
    ortho = OrthoSpec(
        units=o.get("units", "celsius"),
        scale=float(o.get("scale", 1.0)),
        offset=float(o.get("offset", 0.0)),
        nodata=o.get("nodata"),
        emissivity=float(o.get("emissivity", 1.0)),
        reflected_c=float(o.get("reflected_c", 20.0)),
    )

    c = data["conditions"]
    series = _resolve(root, c["series"], "conditions.series", where, check_files) if "series" in c else None
    if series is None:
        for key in ("poa_irradiance_w_m2", "ambient_c", "wind_m_s"):
            if key not in c:
                raise ManifestError(f"{where}: missing key conditions.{key} (or give conditions.series)")
    conditions = ConditionsSpec(
        poa_irradiance_w_m2=c.get("poa_irradiance_w_m2"),
        ambient_c=c.get("ambient_c"),
        wind_m_s=c.get("wind_m_s"),
        sky_c=c.get("sky_c"),
        relative_humidity_pct=c.get("relative_humidity_pct"),
        series=series,
    )

    m = data["module"]
    if m["width_m"] > m["length_m"]:
        raise ManifestError(
            f"{where}: key module.width_m ({m['width_m']}) is larger than module.length_m "
            f"({m['length_m']}); width is the short side"
        )
    half_cut = bool(m.get("half_cut", False))
    cells_across = int(m["cells_across"])
    if cells_across % int(m["bypass_diodes"]) != 0:
        raise ManifestError(
            f"{where}: key module.bypass_diodes: {m['bypass_diodes']} does not divide "
            f"module.cells_across ({cells_across}); each substring is a strip of whole cell columns"
        )
    module = ModuleSpec(
        pmax_w=float(m["pmax_w"]),
        width_m=float(m["width_m"]),
        length_m=float(m["length_m"]),
        cells_across=cells_across,
        cells_along=int(m["cells_along"]),
        bypass_diodes=int(m["bypass_diodes"]),
        gamma_pmax_pct_per_k=float(m.get("gamma_pmax_pct_per_k", -0.35)),
        half_cut=half_cut,
        emissivity=float(m.get("emissivity", 0.85)),
        junction_box=m.get("junction_box", "split" if half_cut else "edge"),
        voc_v=m.get("voc_v"),
        isc_a=m.get("isc_a"),
        vmp_v=m.get("vmp_v"),
        imp_a=m.get("imp_a"),
        alpha_isc_pct_per_k=m.get("alpha_isc_pct_per_k"),
        beta_voc_pct_per_k=m.get("beta_voc_pct_per_k"),
        model=m.get("model", ""),
    )

    lay = data.get("layout", {})
    layout = LayoutSpec(
        rows=lay.get("rows"),
        cols=lay.get("cols"),
        orientation=lay.get("orientation", "portrait"),
        gap_m=float(lay.get("gap_m", 0.02)),
        tilt_deg=float(lay.get("tilt_deg", 25.0)),
        azimuth_deg=float(lay.get("azimuth_deg", 180.0)),
    )
    return Flight(path=path.resolve(), root=root, site=site, flight=info, ortho=ortho,
                  conditions=conditions, module=module, layout=layout)


def load_flight(path: str | Path, check_files: bool = True) -> Flight:
    """Read and validate a flight manifest.

    Parameters
    ----------
    path : path-like
        ``flight.toml``.
    check_files : bool, default True
        Check that the orthos, layout, frames and series files exist.

    Returns
    -------
    Flight

    Raises
    ------
    ManifestError
        Missing or unreadable file, invalid TOML, unknown or misspelled key, wrong type or
        range, missing referenced file; the message names the file and the key.
    """
    path = Path(path)
    data = read_toml_file(path, ManifestError, "flight manifest")
    return flight_from_dict(data, path, check_files=check_files)
