"""Learning graded flags: ordinal estimators, grouped evaluation, model store, runs log.

See :mod:`qcflag.learn.estimators` (models), :mod:`qcflag.learn.metrics` and
:mod:`qcflag.learn.evaluation` (scores, grouped cross-validation), :mod:`qcflag.learn.model`
(:class:`QCModel`, :func:`train_model`), :mod:`qcflag.learn.store` (model files without
code) and :mod:`qcflag.learn.runs` (the SQLite runs log).
"""

from __future__ import annotations

from qcflag.learn.estimators import (
    GRADES,
    AlwaysGood,
    CumulativeBoostedClassifier,
    CumulativeObliviousClassifier,
    NominalLogistic,
    OrdinalLogistic,
    RulesOnly,
    make_estimator,
)
from qcflag.learn.evaluation import CVReport, grouped_cross_validate
from qcflag.learn.model import QCModel, data_fingerprint, labels_for, train_model
from qcflag.learn.runs import list_runs, log_run, runs_db_for
from qcflag.learn.store import FORMAT_VERSION, load_model, save_model

__all__ = [
    "FORMAT_VERSION",
    "GRADES",
    "AlwaysGood",
    "CVReport",
    "CumulativeBoostedClassifier",
    "CumulativeObliviousClassifier",
    "NominalLogistic",
    "OrdinalLogistic",
    "QCModel",
    "RulesOnly",
    "data_fingerprint",
    "grouped_cross_validate",
    "labels_for",
    "list_runs",
    "load_model",
    "log_run",
    "make_estimator",
    "runs_db_for",
    "save_model",
    "train_model",
]
