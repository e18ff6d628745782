"""Packaged reference fields: annual climatology and bathymetry, their loaders and builder.

The fields are derived from the public-domain Levitus climatology and ETOPO5 bathymetry in
Debian's ``ferret-datasets`` package by :mod:`qcflag.reference.build`; provenance is stored in
the files' global attributes. See :mod:`qcflag.reference.fields` for the interpolation.
"""

from __future__ import annotations

from qcflag.reference.fields import (
    BATHYMETRY_PATH,
    CLIMATOLOGY_PATH,
    ClimatologyAtLevels,
    ClimatologyColumns,
    climatology_at,
    climatology_columns,
    climatology_for,
    load_bathymetry,
    load_climatology,
    pressure_to_depth,
    seafloor_depth,
)

__all__ = [
    "BATHYMETRY_PATH",
    "CLIMATOLOGY_PATH",
    "ClimatologyAtLevels",
    "ClimatologyColumns",
    "climatology_at",
    "climatology_columns",
    "climatology_for",
    "load_bathymetry",
    "load_climatology",
    "pressure_to_depth",
    "seafloor_depth",
]
