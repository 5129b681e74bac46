"""Shared fixtures: river's bundled real series, loaded once per session."""

from __future__ import annotations

from datetime import UTC

import numpy as np
import pytest
from river import datasets


@pytest.fixture(scope="session")
def airline() -> np.ndarray:
    """Box and Jenkins' monthly airline passenger totals 1949-1960 (river's bundled copy)."""
    return np.array([y for _, y in datasets.AirlinePassengers()], dtype=float)


@pytest.fixture(scope="session")
def waterflow() -> tuple[list, np.ndarray]:
    """river's bundled hourly pipeline flow: (UTC hours, litres per second)."""
    rows = list(datasets.WaterFlow())
    hours = [x["Time"].astimezone(UTC) for x, _ in rows]
    return hours, np.array([y for _, y in rows], dtype=float)
