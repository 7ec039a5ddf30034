"""Bench logs: CSV files of measured states and applied actions, read into segments.

A log has a header row and one row per control period: ``t`` (seconds), one column per state
name of the env (as ``pretrial envs ID`` lists them) and one per action name, the action in its
physical unit where it has one (``force`` in N) and otherwise as the normalized command in
[-1, 1]. The action is held until the next row (zero-order hold). Rows are counted as lines of
the file, the header being row 1, so an error's row is the line an editor shows.

The control period comes from ``t``: steps must agree to 1 % (:data:`PERIOD_TOLERANCE`); a step
longer than :data:`GAP_FACTOR` periods is a gap and starts a new segment, as does a new file.
Velocity columns may be left out when their position column is there: they are then estimated
with a Savitzky-Golay derivative (``scipy.signal.savgol_filter``, ``deriv=1``) per segment.
Which state is the rate of which is read off the plant's own equations (:func:`kinematic_pairs`).
"""

from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pretrial.errors import InputError
from pretrial_envs.core import Physics

#: steps of ``t`` may differ from the period by this share (the contract: uniform to 1 %)
PERIOD_TOLERANCE = 0.01
#: a step of ``t`` longer than this many periods is a gap: a new segment starts (one missing row gives 2)
GAP_FACTOR = 1.5
#: Savitzky-Golay defaults for estimated velocities: 7 samples, quadratic (common practice for
#: differentiating sampled positions: a short odd window, low order)
SAVGOL_WINDOW = 7
SAVGOL_ORDER = 2
TIME = "t"


@dataclass(frozen=True)
class Segment:
    """An unbroken run of rows at the control period.

    Attributes
    ----------
    source : str
        The file it came from.
    first_row : int
        Row (line of the file) of its first sample.
    t : (T,) array
        Time, s.
    states : (T, S) array
        Measured states in the env's state order (estimated velocities filled in).
    actions : (T, A) array
        Actions as logged (physical unit, or the normalized command for a unitless action).
    """

    source: str
    first_row: int
    t: np.ndarray
    states: np.ndarray
    actions: np.ndarray

    @property
    def label(self) -> str:
        return f"{self.source}:{self.first_row}"


@dataclass(frozen=True)
class BenchLog:
    """Every segment of the logs given, at one control period ``dt`` (s)."""

    segments: tuple[Segment, ...]
    dt: float
    estimated: tuple[str, ...]  # velocity states estimated from positions (Savitzky-Golay)

    @property
    def samples(self) -> int:
        return sum(len(s.t) for s in self.segments)


def kinematic_pairs(physics: Physics) -> dict[str, str]:
    """``{velocity state: position state}`` where the plant's equations say ``d position / dt = velocity``.

    Found numerically: at a few states around the start, derivative row ``p`` equals state column
    ``v`` exactly. No naming convention is assumed.
    """
    rng = np.random.default_rng(0)  # any states will do; fixed so the answer never changes
    params = np.tile(physics.param_table.nominal, (8, 1))
    state = physics.start_center(params) + rng.normal(0.0, 0.1, (8, physics.state_dim))
    force = physics.actuate(rng.uniform(-0.5, 0.5, (8, physics.action_dim)), params)
    with np.errstate(all="ignore"):
        f = physics.derivatives(state, force, params)
    pairs = {}
    for v, vel in enumerate(physics.state_names):
        for p, pos in enumerate(physics.state_names):
            if p != v and np.array_equal(f[:, p], state[:, v]):
                pairs[vel] = pos
                break
    return pairs


def read_logs(paths: Sequence[str | Path], physics: Physics, dt: float | None = None,
              savgol_window: int = SAVGOL_WINDOW) -> BenchLog:
    """Read bench logs into segments for ``physics``.

    Parameters
    ----------
    paths : sequence of path
        CSV logs (see the module docstring for the format).
    physics : Physics
        The plant: its state and action names are the columns.
    dt : float, optional
        The control period the plant is built with (``--option dt``): it must agree with ``t`` to 1 %
        and is then used as the period.
    savgol_window : int
        Savitzky-Golay window (odd, samples) for estimated velocities.

    Raises
    ------
    InputError
        One line naming the file, row and column: a missing, unknown or repeated column, a value that
        is not a finite number, time that does not increase, uneven steps, a segment too short to
        estimate a velocity over, or a period that disagrees with ``dt``.
    """
    if not paths:
        raise InputError("calibrate: no log given")
    pairs = kinematic_pairs(physics)
    tables = [_read_table(str(p), physics, pairs) for p in paths]
    missing = sorted({name for _, cols, _ in tables for name in physics.state_names if name not in cols},
                     key=physics.state_names.index)
    steps = np.concatenate([np.diff(data[:, 0]) for _, _, data in tables])
    if steps.size == 0:
        raise InputError(f"{paths[0]}: needs at least two rows to give a control period")
    period = _period(tables, steps, dt)
    segments = [seg for path, cols, data in tables
                for seg in _segments(path, cols, data, physics, period, pairs, savgol_window)]
    return BenchLog(tuple(segments), period, tuple(missing))


def _read_table(path: str, physics: Physics, pairs: dict[str, str]) -> tuple[str, list[str], np.ndarray]:
    """Header and numbers of one log, checked: (path, column names, (rows, columns) array)."""
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{path}: no such file" if not p.exists() else f"{path}: is a directory, expected a CSV log")
    try:
        with open(p, newline="", encoding="utf-8") as f:
            rows = list(csv.reader(f))
    except UnicodeDecodeError:
        raise InputError(f"{path}: not a text file (expected a CSV log)") from None
    except (OSError, csv.Error) as exc:
        raise InputError(f"{path}: cannot read ({exc})") from None
    if not rows:
        raise InputError(f"{path}: file is empty (expected a header row: t, states, actions)")
    header = [h.strip() for h in rows[0]]
    _check_header(path, header, physics, pairs)
    body = rows[1:]
    if not body:
        raise InputError(f"{path}: no data rows under the header")
    for i, row in enumerate(body):  # ragged rows: csv gives lists of any length
        if len(row) != len(header):
            raise InputError(f"{path}: row {i + 2}: {len(row)} values for {len(header)} columns")
    cells = np.array(body, dtype=object)
    data = _numbers(path, header, cells)
    t = data[:, 0]
    back = np.flatnonzero(np.diff(t) <= 0)
    if back.size:
        r = int(back[0]) + 1
        raise InputError(f"{path}: row {r + 2}, column {TIME}: time {t[r]:g} s does not increase "
                         f"(row {r + 1} has {t[r - 1]:g} s)")
    return path, header, data


def _check_header(path: str, header: list[str], physics: Physics, pairs: dict[str, str]) -> None:
    known = [TIME, *physics.state_names, *physics.action_names]
    for i, name in enumerate(header):
        if name not in known:
            from pretrial_envs.core import unknown_name_message

            raise InputError(f"{path}: row 1, column {i + 1}: {unknown_name_message('column', name, known)}")
        if name in header[:i]:
            raise InputError(f"{path}: row 1, column {i + 1}: {name!r} appears twice")
    if header[0] != TIME:
        raise InputError(f"{path}: row 1, column 1: expected {TIME!r} (time, s) first, got {header[0]!r}")
    for name in [*physics.state_names, *physics.action_names]:
        if name in header:
            continue
        if name in pairs and pairs[name] in header:
            continue  # a velocity estimated from its position
        hint = f" (or its position {pairs[name]!r}, to estimate it)" if name in pairs else ""
        raise InputError(f"{path}: row 1: missing column {name!r}{hint}")


def _numbers(path: str, header: list[str], cells: np.ndarray) -> np.ndarray:
    """Cells as floats; InputError naming the first cell that is not a finite number."""
    try:
        data = cells.astype(float)
    except ValueError:
        data = None
    if data is not None and np.isfinite(data).all():
        return data
    bad = ~np.isfinite(data) if data is not None else ~np.vectorize(_finite, otypes=[bool])(cells)
    r, c = (int(i) for i in np.argwhere(bad)[0])
    raise InputError(f"{path}: row {r + 2}, column {header[c]}: {str(cells[r, c]).strip()!r} is not a finite number")


def _finite(text: str) -> bool:
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


def _period(tables: list[tuple[str, list[str], np.ndarray]], steps: np.ndarray, dt: float | None) -> float:
    """The control period from every step of ``t``; InputError at the first uneven step."""
    typical = float(np.median(steps))
    for path, _, data in tables:
        d = np.diff(data[:, 0])
        uneven = np.flatnonzero((np.abs(d / typical - 1.0) > PERIOD_TOLERANCE) & (d <= GAP_FACTOR * typical))
        if uneven.size:
            r = int(uneven[0]) + 1
            raise InputError(f"{path}: row {r + 2}, column {TIME}: step {d[r - 1]:g} s is not the control period "
                             f"{typical:g} s to {PERIOD_TOLERANCE:.0%} (nor a gap of more than {GAP_FACTOR:g} "
                             "periods); the steps must be uniform")
    period = float(np.mean(steps[steps <= GAP_FACTOR * typical]))
    if dt is None:
        return period
    if abs(period / dt - 1.0) > PERIOD_TOLERANCE:
        raise InputError(f"--option dt={dt:g}: the logs' column {TIME} steps by {period:g} s; they must agree "
                         f"to {PERIOD_TOLERANCE:.0%}")
    return float(dt)


def _segments(path: str, header: list[str], data: np.ndarray, physics: Physics, period: float,
              pairs: dict[str, str], savgol_window: int) -> list[Segment]:
    """Cut one file at its gaps; states and actions in the env's order, missing velocities estimated."""
    cuts = np.flatnonzero(np.diff(data[:, 0]) > GAP_FACTOR * period) + 1
    col = {name: i for i, name in enumerate(header)}
    out = []
    for start, part in zip(np.concatenate([[0], cuts]), np.split(data, cuts)):
        states = np.empty((len(part), physics.state_dim))
        for j, name in enumerate(physics.state_names):
            if name in col:
                states[:, j] = part[:, col[name]]
            else:
                pos = part[:, col[pairs[name]]]
                states[:, j] = _derivative(pos, period, savgol_window, path, int(start) + 2, name)
        actions = part[:, [col[a] for a in physics.action_names]]
        out.append(Segment(path, int(start) + 2, part[:, 0].copy(), states, actions))
    return out


def _derivative(x: np.ndarray, dt: float, window: int, path: str, row: int, name: str) -> np.ndarray:
    """Savitzky-Golay first derivative of samples ``x`` at period ``dt`` (window shortened to fit)."""
    from scipy.signal import savgol_filter

    w = min(window, len(x) if len(x) % 2 else len(x) - 1)
    if w <= SAVGOL_ORDER:
        raise InputError(f"{path}: row {row}, column {name}: a segment of {len(x)} rows is too short to estimate "
                         f"{name} from positions (needs {SAVGOL_ORDER + 1}); log the velocity or longer segments")
    return savgol_filter(x, w, SAVGOL_ORDER, deriv=1, delta=dt)
