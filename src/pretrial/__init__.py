"""pretrial: evolve neural controllers with NEAT and stress them before a hardware trial.

The Python API (numpydoc in :mod:`pretrial.api`; the README's "Python API" shows it at work):

- :func:`evolve` a controller from a run config, optionally against a sweep plan -> :class:`Run`
- :func:`sweep` a controller with a perturbation plan -> :class:`SweepResults` (verdict, requirements, report)
- :func:`replay` a controller on chosen conditions -> a measured replay
- :func:`calibrate` plant parameters from bench logs -> :class:`Calibration`
- :func:`load_policy`, :func:`export_policy` (C99 or Python), :func:`read_sweep`

Each takes paths or loaded objects; bad input raises :class:`InputError` with a one-line message.
"""

from pretrial.analysis.results import SweepResults
from pretrial.api import Calibration, Run, calibrate, evolve, export_policy, load_policy, read_sweep, replay, sweep
from pretrial.errors import FileFormatError, InputError, PretrialError
from pretrial.version import __version__

__all__ = [
    "Calibration",
    "FileFormatError",
    "InputError",
    "PretrialError",
    "Run",
    "SweepResults",
    "__version__",
    "calibrate",
    "evolve",
    "export_policy",
    "load_policy",
    "read_sweep",
    "replay",
    "sweep",
]

