"""Fixtures shared by several test files: the open penguins data and the demo study."""
from __future__ import annotations

import pandas as pd
import pytest
from palmerpenguins import load_penguins

from gapbook.demo import demo_params
from gapbook.intake import load_study


@pytest.fixture(scope="session")
def penguins() -> pd.DataFrame:
    """palmerpenguins (PyPI package palmerpenguins): 344 rows, 11 missing sex."""
    return load_penguins()


@pytest.fixture(scope="session")
def demo():
    """The demo params and the study after intake."""
    params = demo_params()
    return params, load_study(params)
