"""Pipeline settings: how to process (thresholds, margins, reference conditions).

The facts of a flight live in its manifest (:mod:`pvscan.io.manifest`); how to process them
lives in a pipeline file, by default ``pipelines/post_flight.toml``. Each top-level table
of that file is a *section* owned by one pipeline stage, validated by its own schema
``schemas/pipeline/<section>.schema.json``. A user copies the file, tunes it and passes it
with ``pvscan inspect --pipeline FILE``; keys left out of the copy keep their defaults.
"""
from __future__ import annotations

from collections.abc import Iterator, Mapping
from functools import lru_cache
from importlib.resources.abc import Traversable
from pathlib import Path
from types import MappingProxyType
from typing import Any

from pvscan.errors import PipelineError
from pvscan.io.resources import (
    DEFAULT_PIPELINE,
    SCHEMAS_DIR,
    describe_error,
    load_schema,
    read_toml_file,
    schema_errors,
)

__all__ = ["Pipeline", "load_pipeline", "section", "SECTIONS"]


def _sections() -> tuple[str, ...]:
    return tuple(sorted(p.name.split(".")[0] for p in (SCHEMAS_DIR / "pipeline").iterdir()
                        if p.name.endswith(".schema.json")))


SECTIONS = _sections()


def _freeze(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return MappingProxyType({k: _freeze(v) for k, v in obj.items()})
    if isinstance(obj, list):
        return tuple(_freeze(v) for v in obj)
    return obj


def _merge(base: dict, over: Mapping) -> dict:
    out = dict(base)
    for k, v in over.items():
        if isinstance(v, Mapping) and isinstance(out.get(k), Mapping):
            out[k] = _merge(dict(out[k]), v)
        else:
            out[k] = v
    return out


def _thaw(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {k: _thaw(v) for k, v in obj.items()}
    if isinstance(obj, tuple):
        return [_thaw(v) for v in obj]
    return obj


class Pipeline(Mapping):
    """Read-only nested mapping of pipeline settings: ``pipeline["zonal"]["edge_margin"]``."""

    def __init__(self, data: Mapping, path: Path | Traversable | None = None):
        self._data = _freeze(data)
        self.path = path

    def __getitem__(self, key: str) -> Any:
        try:
            return self._data[key]
        except KeyError:
            raise PipelineError(f"pipeline {self.path or '(default)'}: no section [{key}]") from None

    def __iter__(self) -> Iterator[str]:
        return iter(self._data)

    def __contains__(self, key: object) -> bool:
        return key in self._data

    def __len__(self) -> int:
        return len(self._data)

    def to_dict(self) -> dict:
        return _thaw(self._data)

    def replace(self, **sections: Mapping) -> Pipeline:
        """A copy with some sections (partly) overridden, e.g. ``p.replace(zonal={"edge_margin": 0})``."""
        data = _merge(self.to_dict(), sections)
        validate_pipeline(data, self.path)
        return Pipeline(data, self.path)


def _read_toml(path: Path | Traversable) -> dict:
    return read_toml_file(path, PipelineError, "pipeline file")


def validate_pipeline(data: Mapping, path: Path | Traversable | None = None) -> None:
    where = str(path) if path else "pipeline"
    for section in data:
        if section not in SECTIONS:
            raise PipelineError(f"{where}: unknown section [{section}] (known: {', '.join(SECTIONS)})")
    for section in SECTIONS:
        if section not in data:
            continue
        errs = schema_errors(_thaw(data[section]), load_schema(f"pipeline/{section}.schema.json"))
        if errs:
            raise PipelineError(f"{where}: {describe_error(errs[0], prefix=section + '.')}")


def load_pipeline(path: str | Path | None = None) -> Pipeline:
    """Load pipeline settings.

    Parameters
    ----------
    path : path-like, optional
        A pipeline TOML file. Its keys override the defaults of
        ``pipelines/post_flight.toml``; omitted keys keep their defaults.

    Raises
    ------
    PipelineError
        On a missing file, invalid TOML, an unknown section or key, or a value of the wrong type.
    """
    defaults = _read_toml(DEFAULT_PIPELINE)
    validate_pipeline(defaults, DEFAULT_PIPELINE)
    if path is None:
        return Pipeline(defaults, DEFAULT_PIPELINE)
    path = Path(path)
    user = _read_toml(path)
    validate_pipeline(user, path)
    merged = _merge(defaults, user)
    return Pipeline(merged, path)


@lru_cache(maxsize=1)
def _default_pipeline() -> Pipeline:
    return load_pipeline()


def section_defaults(section: str) -> Mapping[str, Any]:
    """The default settings of one section (convenience for tests and library callers)."""
    return _default_pipeline()[section]


def section(settings: Mapping[str, Any] | None, name: str) -> Mapping[str, Any]:
    """Section ``name`` of some settings, over the defaults of ``pipelines/post_flight.toml``.

    The one way a stage reads its settings: the defaults live in the pipeline file only, and
    a caller may hand a stage a whole pipeline, a plain mapping of sections, the section's
    own mapping (possibly with only some keys) or nothing.

    Parameters
    ----------
    settings : Pipeline or mapping, optional
        A :class:`Pipeline`, a mapping of sections (its ``[name]`` is taken), or a mapping
        of the section's own keys. None gives the defaults.
    name : str
        Section name, e.g. ``"classify"``.

    Returns
    -------
    Mapping
        Read-only: the defaults of the section updated with the keys given.
    """
    base = dict(section_defaults(name))
    if settings is None:
        return MappingProxyType(base)
    sec: Any = settings
    if name in settings and isinstance(settings[name], Mapping):
        sec = settings[name]
    elif any(k in SECTIONS and isinstance(v, Mapping) for k, v in settings.items()):
        sec = {}  # a pipeline without this section: its defaults
    base.update(dict(sec))
    return MappingProxyType(base)
