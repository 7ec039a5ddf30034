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
