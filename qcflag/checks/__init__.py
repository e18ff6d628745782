"""Physically motivated checks, each a pure vectorised function over a ProfileBatch."""

from __future__ import annotations

from qcflag.checks.base import CheckResult, CheckTable

__all__ = ["CheckResult", "CheckTable"]
