"""Pipeline settings shipped with pvscan (``pvscan.pipelines``; data files only).

The build maps this folder into the package (``pyproject.toml``); read the files with
:mod:`importlib.resources` through :mod:`pvscan.io.resources`, never by path.
"""
