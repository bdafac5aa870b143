"""Shared test fixtures."""

from __future__ import annotations

from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
#: Real receiver captures, read in place (never copied): see ../shared/data/real/PROVENANCE.md.
REAL_DATA = REPO.parent / "shared" / "data" / "real"


@pytest.fixture(scope="session")
def real_data() -> Path:
    """Directory of the real captures; tests fail loudly if it is missing (CI lays it beside us)."""
    assert REAL_DATA.is_dir(), f"missing real data at {REAL_DATA}"
    return REAL_DATA
