"""Shared fixtures: simulated data with known truth (invented), the Agg backend."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import pytest
from helpers import simulate


@pytest.fixture
def small_counts():
    return simulate(groups=25, seed=3)[0]


@pytest.fixture
def demo_csv():
    from workbench.api import demo_data_path

    return demo_data_path()
