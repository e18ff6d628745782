"""Readers and writers: canonical CSV, CF DSG profile NetCDF, Argo profile NetCDF."""

from __future__ import annotations

from qcflag.io.atomic import atomic_output

__all__ = ["atomic_output"]
