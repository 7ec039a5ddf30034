"""Shared test settings.

Under CI (``CI`` set in the environment) hypothesis draws a fixed sequence of
examples, so a run on a clean clone is reproducible; locally it explores fresh
examples each run and remembers failures in .hypothesis/.
"""

from __future__ import annotations

import os

import matplotlib
from hypothesis import settings

matplotlib.use("Agg")  # no display on CI or headless machines

settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")


#: whole files of end-to-end fault checks (processes killed, signals, full disks): slow by nature
_SLOW_FILES = {"test_faults.py"}


def pytest_collection_modifyitems(config, items):
    """Mark the fault checks and every Dask-backed case ``slow``, so ``pytest -m "not slow"`` is a fast inner loop.

    CI runs everything (the README's test command selects no marker).
    """
    import pytest

    for item in items:
        if item.path.name in _SLOW_FILES or "dask" in item.nodeid.lower():
            item.add_marker(pytest.mark.slow)
