"""An example third-party check package for qcflag.

It adds one check, ``beyond_rating``, through the ``qcflag.checks`` entry-point group.
The check is invented for this example: a CTD or float sensor is rated to a maximum
pressure by its maker, and values logged deeper than that rating are suspect (the housing
and the sensor calibration are not guaranteed there). The rating is a parameter in the
rule set, because it differs from one instrument to the next.

A check follows qcflag's contract: a pure function of a :class:`qcflag.ProfileBatch`
and keyword parameters, vectorised over all levels, returning a
:class:`qcflag.checks.CheckResult` with a continuous statistic and a grade.
"""

from __future__ import annotations

import numpy as np

from qcflag.checks import CheckResult
from qcflag.checks.registry import CheckSpec

__all__ = ["BEYOND_RATING", "beyond_rating"]
__version__ = "0.1.0"


def beyond_rating(batch, *, variable=None, rated_pressure=6000.0, margin=0.0):
    """Grade levels logged deeper than the instrument's rated pressure.

    Parameters
    ----------
    batch : qcflag.ProfileBatch
        Profiles to check.
    variable : str, optional
        The variable the rule step judges; every variable measured beyond the rating is
        suspect alike, so it does not change the result.
    rated_pressure : float, default=6000.0
        Maximum pressure the instrument is rated for, dbar.
    margin : float, default=0.0
        Fraction of the rating below it where levels are already probably bad
        (``0.05`` marks the last 5 % of the rating as probably bad).

    Returns
    -------
    CheckResult
        ``statistic`` is pressure divided by the rating (dimensionless; NaN where the
        pressure is missing); ``grade`` is 4 above the rating, 3 within the margin below
        it, 1 elsewhere and 0 where the pressure is missing.
    """
    if not rated_pressure > 0:
        raise ValueError(f"rated_pressure must be positive, got {rated_pressure!r}")
    ratio = np.asarray(batch.pressure, dtype=np.float64) / float(rated_pressure)
    grade = np.where(ratio > 1.0, 4, np.where(ratio > 1.0 - float(margin), 3, 1))
    grade = np.where(np.isnan(ratio), 0, grade).astype(np.int8)
    return CheckResult(statistic=ratio, grade=grade)


# What the entry point hands to qcflag: the function plus how rule files may use it. (An
# entry point may also name a bare function; it is then registered under the entry point's
# name for temperature and salinity, with its keyword parameters unchecked.)
BEYOND_RATING = CheckSpec(
    "beyond_rating",
    beyond_rating,
    variables=("temperature", "salinity", "pressure"),
    params={"rated_pressure": "float+", "margin": "float+"},
    required=("rated_pressure",),
    description="level deeper than the instrument's rated pressure (example plug-in)",
)
