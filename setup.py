"""Package list for setuptools (all other metadata is in pyproject.toml).

Every package under pvscan/ is found automatically; the top-level folders pipelines/ and
schemas/ are mapped into the package as pvscan.pipelines and pvscan.schemas
([tool.setuptools.package-dir] in pyproject.toml), which discovery alone cannot express.
"""
from setuptools import find_packages, setup

setup(packages=find_packages(include=["pvscan", "pvscan.*"])
      + ["pvscan.pipelines", "pvscan.schemas", "pvscan.schemas.pipeline"])
