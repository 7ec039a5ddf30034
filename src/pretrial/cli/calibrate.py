"""``pretrial calibrate``: plant parameters from bench logs, with their uncertainty."""

from __future__ import annotations

from pretrial.calibration.calibrate import configure_cli as configure
from pretrial.calibration.calibrate import run_cli as run

__all__ = ["configure", "run"]
