"""``pretrial calibrate --residual``: the residual fitted after the parameters, and ``residual.json``.

:func:`residual_step` runs :func:`pretrial.calibration.residual_fit.fit_residual` on the fit segments at the
calibrated values, validates it on the held-out windows (physics alone, then the hybrid, the
calibration's multi-step error), and returns the content of ``residual.json`` (schema
``pretrial.residual``, version 1, :func:`pretrial_envs.residual.residual_document`) with the
summary lines the calibration output carries.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from pretrial.calibration.benchlog import Segment
from pretrial.calibration.fit import Estimate, Model, Windows
from pretrial.calibration.residual_fit import PENALTIES, fit_residual, validate
from pretrial.errors import InputError
from pretrial.files import write_json
from pretrial_envs.residual import MAX_DEGREE, SIGN_SCALE, residual_document

FILE = "residual.json"
DEGREE = 2


def check_options(degree: int, margin: float) -> None:
    """InputError naming the flag for a degree or margin out of range."""
    if not 0 <= degree <= MAX_DEGREE:
        raise InputError(f"--residual-degree {degree!r}: must be a whole number from 0 to {MAX_DEGREE}")
    if not (np.isfinite(margin) and margin >= 0):
        raise InputError(f"--residual-margin {margin!r}: must be a finite share >= 0")


def residual_step(model: Model, est: Estimate, fit_segs: list[Segment], win: Windows, val: Windows | None,
                  degree: int, margin: float) -> dict[str, Any]:
    """Fit, validate and describe the residual; returns the whole ``residual.json`` content."""
    physics = model.physics
    found = fit_residual(model, est.estimate, fit_segs, est.scale, win.length, degree, SIGN_SCALE, margin)
    shown = val if val is not None else win
    plain, hybrid = validate(model, est.estimate, found.residual, shown)
    names = list(physics.state_names)
    params = dict(zip(physics.param_table.names, map(float, model.base)))
    params.update({n: float(v) for n, v in zip(model.names, est.estimate) if n in physics.param_table})
    extra = {
        "params": params,
        "validation": {"data": "held-out windows" if val is not None else "fitted windows (none held out)",
                       "windows": shown.count, "window_steps": shown.length,
                       "rmse_physics": dict(zip(names, map(float, plain))),
                       "rmse_hybrid": dict(zip(names, map(float, hybrid)))},
        "method": {"fit": "linearized multiple-shooting output error, ridge", "penalty": found.penalty,
                   "penalties": [float(p) for p in PENALTIES], "cv_rmse": [float(e) for e in found.cv_error],
                   "folds": found.folds, "fold_units": found.fold_kind, "samples": found.samples,
                   "error_scale": dict(zip(names, map(float, est.scale)))},
    }
    return residual_document(found.residual, physics, extra)


def write_residual(directory: Path, doc: dict[str, Any]) -> None:
    write_json(directory / FILE, doc)


def summary_entry(doc: dict[str, Any]) -> dict[str, Any]:
    """What calibration.json and the printed summary say of the residual."""
    v = doc["validation"]
    return {"file": FILE, "content_sha256": doc["content_sha256"], "features": len(doc["features"]),
            "outputs": doc["outputs"], "degree": doc["library"]["degree"], "penalty": doc["method"]["penalty"],
            "rmse_physics": v["rmse_physics"], "rmse_hybrid": v["rmse_hybrid"], "data": v["data"]}


def say(entry: dict[str, Any]) -> list[str]:
    """Text lines: validation error per state, physics alone and hybrid."""
    lines = [f"residual ({entry['features']} features x {len(entry['outputs'])} states, ridge penalty "
             f"{entry['penalty']:.3g}), simulation RMSE on {entry['data']}:"]
    for n, e in entry["rmse_physics"].items():
        h = entry["rmse_hybrid"][n]
        lines.append(f"  {n:>12}  physics {e:.4g}  hybrid {h:.4g}  ({h / e:.0%})" if e > 0 else
                     f"  {n:>12}  physics {e:.4g}  hybrid {h:.4g}")
    return lines
