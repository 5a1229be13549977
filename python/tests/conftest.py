"""Shared paths of the Python tests: the repository's committed fixtures."""

from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture
def fixtures() -> Path:
    return REPO / "fixtures"
