"""Shared fixtures: paths to ../shared and small batches."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SHARED = ROOT.parent / "shared"
ARGO_DIR = SHARED / "data" / "argo"


def _argo_files() -> list[Path]:
    return sorted(ARGO_DIR.glob("*.nc")) if ARGO_DIR.is_dir() else []


@pytest.fixture(scope="session")
def argo_files() -> list[Path]:
    """The real Argo profiles in ../shared/data/argo (skip when ../shared is absent)."""
    files = _argo_files()
    if not files:
        pytest.skip("../shared/data/argo is not here (a user's clone has no ../shared)")
    return files
