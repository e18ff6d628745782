"""qcflag: graded quality-control flags for hydrographic profiles.

Automated flags assist expert quality control; they do not replace it, and the data
programme's own standards prevail.
"""

from __future__ import annotations

from qcflag._version import __version__
from qcflag.exceptions import (
    InputFileError,
    InvalidProfileError,
    ModelFileError,
    QCFlagError,
    RuleSetError,
    UnitsError,
)
from qcflag.profiles import ProfileBatch
from qcflag.schemes import Grade, State, get_scheme

# Registers the ``ds.qcflag`` xarray accessor; flag_dataset is the same door as a function.
from qcflag import accessor as _accessor  # noqa: F401  isort: skip
from qcflag.chain import check_dataset, flag_dataset  # isort: skip

__all__ = [
    "Grade",
    "InputFileError",
    "InvalidProfileError",
    "ModelFileError",
    "ProfileBatch",
    "QCFlagError",
    "RuleSetError",
    "State",
    "UnitsError",
    "__version__",
    "check_dataset",
    "flag_dataset",
    "get_scheme",
    "show_versions",
]


def show_versions() -> dict[str, str]:
    """Return the versions of qcflag and the packages it depends on (for bug reports)."""
    import importlib.metadata as md
    import platform
    import sys

    out = {"qcflag": __version__, "python": sys.version.split()[0],
           "platform": platform.platform()}
    for pkg in ("numpy", "pandas", "scikit-learn", "mord", "xarray", "netCDF4", "gsw",
                "typer", "matplotlib", "jinja2", "dask", "distributed"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = "not installed"
    return out
