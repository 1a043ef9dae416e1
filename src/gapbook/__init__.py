"""gapbook: a Jupyter-first kit for analysing incomplete study data."""
from __future__ import annotations

__version__ = "0.1.0"
