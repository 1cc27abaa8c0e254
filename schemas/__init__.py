"""JSON Schemas shipped with pvscan (``pvscan.schemas``; data files only).

The build maps this folder into the package (``pyproject.toml``); read the files with
:mod:`importlib.resources` through :mod:`pvscan.io.resources`, never by path.
"""
