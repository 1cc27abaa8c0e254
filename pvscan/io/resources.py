"""The package's data files (pipeline settings, JSON Schemas), and JSON-Schema validation.

The repository keeps them in its top-level folders ``pipelines/`` and ``schemas/``; the build
maps those folders into the package as ``pvscan.pipelines`` and ``pvscan.schemas``
(``[tool.setuptools.package-dir]`` in ``pyproject.toml``), so an installed pvscan (editable or
not) reads them with :mod:`importlib.resources`. A source checkout used without installing
falls back to the top-level folders themselves.
"""
from __future__ import annotations

import json
from functools import cache
from importlib import resources
from importlib.resources.abc import Traversable
from os import PathLike
from pathlib import Path
from typing import Any

import jsonschema

__all__ = ["PIPELINES_DIR", "SCHEMAS_DIR", "DEFAULT_PIPELINE", "load_schema", "schema_errors",
           "describe_error", "read_toml_file", "read_json_file"]


def _data_dir(package: str, folder: str) -> Traversable:
    """The folder of package data ``package`` (``pvscan.pipelines``), or the repository's
    ``folder`` when pvscan runs from a source checkout that was not installed."""
    try:
        return resources.files(package)
    except ModuleNotFoundError:
        here = Path(__file__).resolve().parents[2] / folder
        if here.is_dir():
            return here
        raise ImportError(f"pvscan is installed without its data files ({package}); reinstall it") from None


PIPELINES_DIR: Traversable = _data_dir("pvscan.pipelines", "pipelines")
SCHEMAS_DIR: Traversable = _data_dir("pvscan.schemas", "schemas")
DEFAULT_PIPELINE: Traversable = PIPELINES_DIR / "post_flight.toml"


@cache
def load_schema(name: str) -> dict:
    """Load ``schemas/<name>`` (e.g. ``"flight.schema.json"`` or ``"pipeline/zonal.schema.json"``)."""
    node = SCHEMAS_DIR
    for part in name.split("/"):
        node = node / part
    return json.loads(node.read_text(encoding="utf-8"))


def schema_errors(instance: Any, schema: dict) -> list[jsonschema.ValidationError]:
    """All validation errors of ``instance`` against a JSON Schema 2020-12, best first."""
    validator = jsonschema.Draft202012Validator(schema, format_checker=jsonschema.FormatChecker())
    return sorted(validator.iter_errors(instance), key=lambda e: (len(list(e.path)), str(e.path)))


def describe_error(err: jsonschema.ValidationError, prefix: str = "") -> str:
    """One line naming the key path and what is wrong."""
    path = ".".join(str(p) for p in err.absolute_path)
    if err.validator == "additionalProperties":
        extra = sorted(set(err.instance) - set(err.schema.get("properties", {})))
        where = f"{prefix}{path + '.' if path else ''}"
        return f"unknown key {where}{extra[0]}" + (f" (and {len(extra) - 1} more)" if len(extra) > 1 else "")
    if err.validator == "required":
        missing = [k for k in err.validator_value if k not in err.instance]
        where = f"{prefix}{path + '.' if path else ''}"
        return f"missing key {where}{missing[0]}"
    where = f"{prefix}{path}" if (prefix or path) else "(top level)"
    return f"key {where}: {err.message}"


def read_toml_file(path: str | PathLike[str] | Traversable, error_cls: type[Exception],
                   what: str = "file") -> dict:
    """Parse a TOML file, mapping every failure to ``error_cls`` with a one-line message.

    Parameters
    ----------
    path : path-like or importlib.resources.abc.Traversable
    error_cls : type
        A :class:`pvscan.errors.PvscanError` subclass.
    what : str
        What the file is, for the "not found" message (e.g. "flight manifest").
    """
    import tomllib

    if not isinstance(path, Traversable):
        path = Path(path)
    try:
        with path.open("rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise error_cls(f"{path}: {what} not found") from None
    except IsADirectoryError:
        raise error_cls(f"{path}: is a folder, not a {what}") from None
    except tomllib.TOMLDecodeError as exc:
        raise error_cls(f"{path}: not valid TOML: {exc}") from None
    except OSError as exc:
        raise error_cls(f"{path}: cannot read: {exc.strerror}") from None


def read_json_file(path: str | PathLike[str], error_cls: type[Exception], missing: str = "file not found", *,
                   what: str | None = None) -> Any:
    """Parse a JSON file, mapping every failure to ``error_cls`` with a one-line message
    (``<path>: cannot read <what>: ...`` when ``what`` names the file's role)."""
    path = Path(path)
    head = f"{path}: cannot read {what}:" if what else f"{path}:"
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except FileNotFoundError:
        raise error_cls(f"{head} {missing}") from None
    except json.JSONDecodeError as exc:
        raise error_cls(f"{head} not valid JSON: {exc.msg} at line {exc.lineno}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise error_cls(f"{head}{'' if what else ' cannot read:'} {getattr(exc, 'strerror', None) or exc}") from None
