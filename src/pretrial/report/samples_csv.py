"""``montecarlo.csv``: the Monte Carlo samples, one row each, written as they finish and read back for plots."""

from __future__ import annotations

import csv
import queue
import threading
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.errors import InputError, PretrialError
from pretrial.files import atomic_write_text
from pretrial.report.csv_format import csv_text

#: keys of the Monte Carlo samples that are not varied names, in their CSV order
SAMPLE_COLUMNS = ("seed", "success", "failure", "score")


def varied_names(samples: Mapping[str, Any]) -> list[str]:
    return [k for k in samples if k not in SAMPLE_COLUMNS]


def check_samples(samples: Mapping[str, Any]) -> int:
    """Number of Monte Carlo samples; InputError when a column is missing or the lengths differ."""
    missing = [k for k in SAMPLE_COLUMNS if k not in samples]
    if missing:
        raise InputError(f"Monte Carlo samples: missing column(s) {', '.join(missing)}")
    lengths = {k: len(np.atleast_1d(v)) for k, v in samples.items()}
    if len(set(lengths.values())) > 1:
        raise InputError("Monte Carlo samples: columns differ in length ("
                         + ", ".join(f"{k} {n}" for k, n in lengths.items()) + ")")
    return next(iter(lengths.values()), 0)


def _sample_headers(names: Sequence[str], units: Mapping[str, str] | None) -> list[str]:
    units = units or {}
    return [f"{n} [{units[n]}]" if units.get(n) else n for n in names] + list(SAMPLE_COLUMNS)


def _sample_rows(samples: Mapping[str, Any], names: Sequence[str]) -> list[tuple[Any, ...]]:
    columns = [np.atleast_1d(np.asarray(samples[k])).tolist() for k in [*names, *SAMPLE_COLUMNS]]
    return list(zip(*columns))


def write_samples_csv(path: str | Path, samples: Mapping[str, Any], units: Mapping[str, str] | None = None) -> None:
    """The Monte Carlo samples as CSV: one column per varied name, then seed, success, failure, score.

    A varied column is headed ``name [unit]`` when ``units`` gives it a unit (plain ``name`` otherwise);
    success is ``true``/``false``; floats are written exactly (``repr``). Written atomically;
    :class:`SamplesCSV` writes the same bytes a block of rows at a time.
    """
    check_samples(samples)
    names = varied_names(samples)
    atomic_write_text(path, csv_text(_sample_headers(names, units), _sample_rows(samples, names)))


class SamplesCSV:
    """``montecarlo.csv`` written a block of samples at a time, as the blocks finish.

    The bytes equal :func:`write_samples_csv` of all blocks joined. A background thread formats
    and writes each block while the caller runs the next (formatting 10^7 rows takes about a
    minute); at most one block waits for it. The file is written in place (not atomically): write
    it into a directory that is renamed into place when complete.

    Parameters
    ----------
    path : Path
    names : sequence of str
        The varied names, in column order.
    units : mapping, optional
        Unit of each varied name, for its header.
    """

    #: rows formatted at a time (bounds the text held in memory)
    ROWS = 8192

    def __init__(self, path: str | Path, names: Sequence[str], units: Mapping[str, str] | None = None):
        self.path = Path(path)
        self.columns = [*names, *SAMPLE_COLUMNS]
        self._names = list(names)
        try:
            self._file = open(self.path, "w", encoding="utf-8", newline="")
        except OSError as exc:
            raise PretrialError(f"{self.path}: cannot write ({exc.strerror})") from None
        self._error: BaseException | None = None
        self._put(csv_text(_sample_headers(self._names, units), []))
        self._queue: queue.Queue[dict[str, np.ndarray] | None] = queue.Queue(maxsize=1)
        self._thread = threading.Thread(target=self._drain, name="montecarlo.csv", daemon=True)
        self._thread.start()

    def __enter__(self) -> SamplesCSV:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, *exc: object) -> None:
        self.close(report=exc_type is None)  # an error already on its way wins over the writer's

    def close(self, report: bool = True) -> None:
        """Write what is queued, close the file; raise the writer's error (a full disk) if ``report``."""
        if self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()
        self._file.close()
        if report and self._error is not None:
            raise self._error

    def write(self, block: Mapping[str, Any]) -> None:
        """Queue a block's rows: one array per varied name plus "seed", "success", "failure", "score"."""
        if self._error is not None:
            raise self._error
        part = {k: np.atleast_1d(np.asarray(block[k])) for k in self.columns}
        check_samples(part)
        self._queue.put(part)

    def _drain(self) -> None:
        while (block := self._queue.get()) is not None:
            if self._error is not None:
                continue  # keep taking blocks, so the caller never waits on a dead writer
            try:
                for lo in range(0, len(block["score"]), self.ROWS):
                    part = {k: v[lo:lo + self.ROWS] for k, v in block.items()}
                    self._put(csv_text(None, _sample_rows(part, self._names)))
            except BaseException as exc:  # handed to the caller's thread
                self._error = exc

    def _put(self, text: str) -> None:
        try:
            self._file.write(text)
        except OSError as exc:
            raise PretrialError(f"{self.path}: write failed ({exc.strerror})") from None


def _column_name(header: str) -> str:
    """``"pole_mass [kg]"`` -> ``"pole_mass"`` (the unit suffix :func:`write_samples_csv` adds)."""
    name, sep, _unit = header.partition(" [")
    return name if sep else header


def _float(text: str) -> float:
    return float("nan") if text == "" else float(text)


def read_sample_blocks(path: str | Path, rows: int = 65536) -> Iterator[dict[str, np.ndarray]]:
    """Blocks of ``montecarlo.csv`` as arrays: each varied name, "seed", "success", "failure", "score".

    Reads ``rows`` lines at a time, so a file of 10^7 samples never sits in memory whole.
    InputError names the file and line of a value that is not what :func:`write_samples_csv` writes.
    """
    p = Path(path)
    try:
        handle = open(p, encoding="utf-8", newline="")
    except OSError as exc:
        raise InputError(f"{p}: cannot read ({exc.strerror})") from None
    with handle:
        reader = csv.reader(handle)
        header = next(reader, None)
        if header is None or tuple(header[-len(SAMPLE_COLUMNS):]) != SAMPLE_COLUMNS:
            raise InputError(f"{p}: not a Monte Carlo samples file (its last columns must be "
                             f"{', '.join(SAMPLE_COLUMNS)})")
        names = [_column_name(h) for h in header]
        varied = names[: -len(SAMPLE_COLUMNS)]
        while True:
            chunk = [r for _, r in zip(range(rows), reader)]
            if not chunk:
                return
            try:
                if any(len(r) != len(names) for r in chunk):
                    raise ValueError("a row has the wrong number of columns")
                cols = list(zip(*chunk))
                block = {n: np.array([_float(v) for v in cols[i]]) for i, n in enumerate(varied)}
                k = len(varied)
                block["seed"] = np.array([int(v) for v in cols[k]], dtype=np.uint64)  # seeds span 64 bits
                if any(v not in ("true", "false") for v in cols[k + 1]):
                    raise ValueError("success must be true or false")
                block["success"] = np.array([v == "true" for v in cols[k + 1]])
                block["failure"] = np.array(cols[k + 2], dtype=object)
                block["score"] = np.array([_float(v) for v in cols[k + 3]])
            except (ValueError, OverflowError) as exc:
                raise InputError(f"{p}: near line {reader.line_num}: {exc}") from None
            yield block
