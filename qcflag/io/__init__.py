"""Readers and writers: canonical CSV, CF DSG profile NetCDF, Argo profile NetCDF.

See :mod:`qcflag.io.csv`, :mod:`qcflag.io.netcdf`, :mod:`qcflag.io.argo` for the formats and
:mod:`qcflag.io.common` for the units policy and its thresholds.
"""

from __future__ import annotations

from qcflag.io.atomic import atomic_output, check_writable
from qcflag.io.common import AddedColumn
from qcflag.io.csv import TruncatedInputWarning, read_csv, write_csv
from qcflag.io.files import expand_paths, iter_batches, read_file, read_files, write
from qcflag.io.netcdf import from_dataset, read_netcdf, to_dataset, write_netcdf

__all__ = [
    "AddedColumn",
    "TruncatedInputWarning",
    "atomic_output",
    "check_writable",
    "expand_paths",
    "from_dataset",
    "iter_batches",
    "read_csv",
    "read_file",
    "read_files",
    "read_netcdf",
    "to_dataset",
    "write",
    "write_csv",
    "write_netcdf",
]
