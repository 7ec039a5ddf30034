"""Fault tolerance: kill -9 and resume, worker processes that die, Ctrl-C, a full or unwritable disk.

The commands run for real (``python -m pretrial`` in subprocesses, the real executors) on a tiny
cart-pole config; "the same result" always means byte-identical files, compared with one
uninterrupted run of the same config and seed.
"""

from __future__ import annotations

import contextlib
import csv
import errno
import gc
import hashlib
import itertools
import json
import os
import random
import re
import shutil
import signal
import stat
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from helpers import snapshot

from pretrial import files
from pretrial.analysis import sweep as sweep_run
from pretrial.cli.main import main
from pretrial.errors import PretrialError
from pretrial.evolution import checkpoint
from pretrial.evolution.config import load_config
from pretrial.evolution.loop import Evolution
from pretrial.sim import execution
from pretrial.sim.execution import DaskExecutor, Executor, ProcessExecutor
from pretrial.sim.signals import Terminated, stop_on_signals

ROOT = Path(__file__).resolve().parents[2]
CARTPOLE_PLAN = ROOT / "configs" / "sweeps" / "cartpole.toml"
PRETRIAL = [sys.executable, "-m", "pretrial"]
ENV = {**os.environ, "MPLBACKEND": "Agg"}
#: about 0.05 s per generation here, so a run takes ~3 s of evolution after ~1 s of start-up
GENERATIONS = 60
KILLS = 5
GEN_LINE = re.compile(rb"(?m)^gen +\d+ ")


def write_config(path: Path, checkpoint_every: int = 1, pop_size: int = 20) -> Path:
    path.write_text(
        '[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 4\nhorizon = 2.0\n\n'
        f"[neat]\npop_size = {pop_size}\n\n"
        f"[run]\ngenerations = {GENERATIONS}\nseed = 11\ncheckpoint_every = {checkpoint_every}\n"
    )
    return path


def wait_for(condition: Callable[[], object], timeout: float, what: str) -> None:
    end = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > end:
            pytest.fail(f"timed out after {timeout} s waiting for {what}")
        time.sleep(0.02)


@contextlib.contextmanager
def deadline(seconds: float) -> Iterator[None]:
    """Fail (instead of blocking CI) if the block takes longer than ``seconds``."""

    def expired(signum, frame):
        raise TimeoutError(f"still running after {seconds} s: a hang")

    old = signal.signal(signal.SIGALRM, expired)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def _newest(recorded: dict[str, str]) -> str:
    return max(recorded, key=lambda n: int(re.findall(r"\d+", n)[-1]))


def check_run_dir(run_dir: Path) -> int | None:
    """What a stopped run must be: the newest checkpoint's generation (None before the first manifest)."""
    if not (run_dir / "manifest.json").exists():
        return None
    manifest = json.loads((run_dir / "manifest.json").read_text())  # parses: never half written
    recorded = manifest["checkpoints"]
    assert "generation-0.pkl" in recorded  # the first manifest already records generation 0
    for name, digest in recorded.items():
        assert hashlib.sha256((run_dir / "checkpoints" / name).read_bytes()).hexdigest() == digest, name
    newest = _newest(recorded)
    state = checkpoint.load(run_dir / "checkpoints" / newest, recorded[newest])
    assert newest == f"generation-{state['generation']}.pkl"
    if (run_dir / "history.csv").exists():  # rewritten whole each generation, just before the checkpoint
        with open(run_dir / "history.csv", newline="") as f:
            rows = list(csv.DictReader(f))
        assert [int(r["generation"]) for r in rows] == list(range(len(rows)))
        assert len(rows) in (state["generation"], state["generation"] + 1)
    return state["generation"]


def assert_same_run(run_dir: Path, reference: Path) -> None:
    for name in ("history.csv", "champion.json"):
        assert (run_dir / name).read_bytes() == (reference / name).read_bytes(), name


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> tuple[Path, Path]:
    """The config, and one uninterrupted run of it that every interrupted run must reproduce."""
    root = tmp_path_factory.mktemp("faults")
    cfg = write_config(root / "cart.toml")
    run_dir = root / "uninterrupted"
    assert main(["evolve", str(cfg), "--out", str(run_dir), "--workers", "1", "--quiet"]) == 0
    return cfg, run_dir


# --------------------------------------------------------------------------- #
# 1. kill -9
# --------------------------------------------------------------------------- #
def test_kill_9_at_random_moments_then_resume_is_the_uninterrupted_run(reference, tmp_path, capsys):
    cfg, ref = reference
    rng = random.Random(20240611)
    run_dir = tmp_path / "killed"
    new = ["evolve", str(cfg), "--out", str(run_dir), "--workers", "1"]
    resume = ["evolve", str(cfg), "--resume", str(run_dir), "--workers", "1"]
    argv, killed_at = new, []
    for session in range(KILLS + 3):  # bounded: a run that never completes fails the test
        log = tmp_path / f"session-{session}.log"
        with open(log, "wb") as out:
            proc = subprocess.Popen([*PRETRIAL, *argv], stdout=out, stderr=subprocess.STDOUT, env=ENV)
        try:
            if len(killed_at) < KILLS:
                if session == 0:  # any moment: start-up, create(), the first generations
                    time.sleep(rng.uniform(0.0, 1.5))
                else:  # in the middle of the work: evaluating, or writing history, checkpoint, manifest
                    wait_for(lambda log=log, proc=proc: GEN_LINE.search(log.read_bytes()) or proc.poll() is not None,
                             60, "a generation")
                    time.sleep(rng.uniform(0.0, 0.3))
                if proc.poll() is None:
                    proc.send_signal(signal.SIGKILL)
            rc = proc.wait(timeout=120)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
        if rc == 0:
            break
        assert rc == -signal.SIGKILL, log.read_text()
        generation = check_run_dir(run_dir)
        killed_at.append(generation)
        if generation is None:  # killed before the first manifest: the message says what to do
            capsys.readouterr()
            assert main(resume) == 2
            err = capsys.readouterr().err
            assert err.count("\n") == 1 and ("delete the directory" in err or "not a run directory" in err), err
            shutil.rmtree(run_dir, ignore_errors=True)
            argv = new
        else:
            argv = resume
    else:
        pytest.fail(f"the run did not complete (killed at generations {killed_at})")

    # every kill after the first landed mid-run, and each resume went on from where the last one stopped
    later = killed_at[1:]
    assert len(killed_at) == KILLS and all(g is not None for g in later), killed_at
    assert all(a < b for a, b in itertools.pairwise(later)) and later[-1] < GENERATIONS, killed_at
    assert_same_run(run_dir, ref)
    recorded = json.loads((run_dir / "manifest.json").read_text())["checkpoints"]
    assert set(recorded) == {f"generation-{k}.pkl" for k in range(GENERATIONS + 1)}
    assert check_run_dir(run_dir) == GENERATIONS
    assert not list(run_dir.rglob("*.tmp"))  # temporary files of killed writes were cleared on resume


def test_a_run_stopped_right_after_create_resumes_from_generation_0(reference, tmp_path):
    cfg, ref = reference
    run_dir = tmp_path / "created"
    Evolution(load_config(cfg), run_dir, Executor(), lambda line: None).create()  # and then killed
    assert check_run_dir(run_dir) == 0
    assert main(["evolve", str(cfg), "--resume", str(run_dir), "--workers", "1", "--quiet"]) == 0
    assert_same_run(run_dir, ref)


def test_a_run_stopped_before_its_first_checkpoint_says_delete_and_start_again(tmp_path, monkeypatch, capsys):
    cfg = write_config(tmp_path / "cart.toml")
    run_dir = tmp_path / "run"

    def stopped(*args, **kwargs):
        raise KeyboardInterrupt  # as if killed while writing generation 0, before the first manifest

    monkeypatch.setattr(checkpoint, "save", stopped)
    assert main(["evolve", str(cfg), "--out", str(run_dir), "--workers", "1", "--quiet"]) == 130
    monkeypatch.undo()
    assert (run_dir / "config.resolved.toml").exists() and not (run_dir / "manifest.json").exists()
    before = snapshot(run_dir)
    for argv, needle in (
        (["--resume", str(run_dir)], "stopped before its first checkpoint"),
        (["--out", str(run_dir)], "already holds files"),
    ):
        capsys.readouterr()
        assert main(["evolve", str(cfg), *argv, "--workers", "1"]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and needle in err and "delete the directory and start" in err, err
    assert snapshot(run_dir) == before


def test_partial_writes_are_recognised_and_nothing_else(tmp_path):
    ours = [".history.csv.k3j9x0qa.tmp", ".generation-4.pkl.0123abcd.tmp"]  # mkstemp's and ours
    theirs = ["notes.tmp", ".notes.tmp", "history.csv", ".history.csv.k3j9.tmp"]
    for name in ours + theirs:
        (tmp_path / name).write_text("x")
    removed = files.remove_partial_writes(tmp_path)
    assert sorted(p.name for p in removed) == sorted(ours)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(theirs)


# --------------------------------------------------------------------------- #
# 2. worker processes that die
# --------------------------------------------------------------------------- #
def _square_but_die_once(item: tuple[str, int]) -> int:
    """x squared; the first call anywhere (marker file created atomically) kills its own process."""
    marker, x = item
    try:
        fd = os.open(marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        return x * x
    os.close(fd)
    os._exit(1)  # no exception, no result: the process is simply gone, as after the OOM killer


def _always_die(item: tuple[str, int]) -> int:
    os._exit(1)


@pytest.mark.parametrize("where", ["processes", "dask"])
def test_a_dying_worker_is_retried_and_one_that_keeps_dying_is_reported(where, tmp_path):
    if where == "dask":
        pytest.importorskip("dask.distributed", reason="dask.distributed is not installed (pretrial[cluster])")
    marker = str(tmp_path / "died")
    items = [(marker, x) for x in range(6)]
    with deadline(120):
        with DaskExecutor("local", 2) if where == "dask" else ProcessExecutor(2) as ex:
            assert ex.map(_square_but_die_once, items) == [x * x for x in range(6)]
            assert Path(marker).exists()  # a worker did die, and its work was done again elsewhere
            t0 = time.monotonic()
            with pytest.raises(PretrialError) as info:
                ex.map(_always_die, items)
            seconds = time.monotonic() - t0
            assert ex.map(_square_but_die_once, [(marker, 7)]) == [49]  # and the executor still works
    msg = info.value.message
    assert "\n" not in msg and "died" in msg and "--workers 1" in msg, msg
    if where == "dask":
        # the scheduler moves a task whose worker died to another worker, 3 times (allowed-failures), then gives up
        # (under heavy load a death can also be counted by a missed heartbeat, so only the form is fixed)
        assert "KilledWorker" in msg and re.search(r"died \d+ times", msg), msg
    else:
        assert "died twice" in msg, msg
    assert seconds < 60


class FailsOnCall(Executor):
    """Serial, except that map call number ``n`` fails as a pool whose workers keep dying does."""

    def __init__(self, n: int):
        self.n, self.calls = n, 0

    def map(self, fn, items):
        self.calls += 1
        if self.calls == self.n:
            raise PretrialError("a worker process died twice while running the same batch (simulated)")
        return super().map(fn, items)


def test_a_failed_evaluation_leaves_a_run_that_resumes(reference, tmp_path, monkeypatch, capsys):
    _, ref = reference
    # checkpoints every 10 generations, so the one written at the failure is the newest
    cfg = write_config(tmp_path / "every10.toml", checkpoint_every=10)
    run_dir = tmp_path / "failed"
    monkeypatch.setattr(execution, "make_executor", lambda *a, **k: FailsOnCall(24))  # one map per generation
    capsys.readouterr()
    assert main(["evolve", str(cfg), "--out", str(run_dir), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("pretrial: error: generation 23: a worker process died"), err
    assert f"--resume {run_dir}" in err and "Traceback" not in err
    monkeypatch.undo()
    recorded = json.loads((run_dir / "manifest.json").read_text())["checkpoints"]
    assert sorted(recorded, key=lambda n: int(re.findall(r"\d+", n)[-1])) == [
        "generation-0.pkl", "generation-10.pkl", "generation-20.pkl", "generation-23.pkl"]
    assert check_run_dir(run_dir) == 23

    assert main(["evolve", str(cfg), "--resume", str(run_dir), "--workers", "1", "--quiet"]) == 0
    assert (run_dir / "history.csv").read_bytes() == (ref / "history.csv").read_bytes()
    # champion.json records the config's hash (so its own hash differs), and checkpoint_every is in the config
    got, want = (json.loads((d / "champion.json").read_text()) for d in (run_dir, ref))
    for doc in (got, want):
        doc["training"].pop("config_sha256")
        doc.pop("content_sha256")
    assert got == want


# --------------------------------------------------------------------------- #
# 3. Ctrl-C
# --------------------------------------------------------------------------- #
def _live_members(sid: int) -> list[int]:
    """Processes of a session that still run (zombies do not: they only wait to be reaped).

    The session, not the process group: whatever a command starts stays in its session unless it
    calls setsid(2), orphans re-parented to init included (proc(5): field 6 of /proc/PID/stat).
    """
    live = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[3]) == sid and fields[0] != "Z":
            live.append(int(entry.name))
    return live


def interrupt(argv: list[str], tmp_path: Path, ready: re.Pattern[bytes], delay: float,
              send: Callable[[int], None] | None = None) -> tuple[int, str, str]:
    """Run ``pretrial ARGV``; once ``ready`` is printed and ``delay`` s have passed, ``send(pid)``
    (default: Ctrl-C, SIGINT to the whole process group as a terminal sends it)."""
    out_path, err_path = tmp_path / "stdout.log", tmp_path / "stderr.log"
    # a shell's `pytest ... &` ignores SIGINT and children inherit an ignored signal: start them with the default
    old = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        with open(out_path, "wb") as out, open(err_path, "wb") as err:
            # a session of its own, so SIGINT can go to the whole process group as a terminal's Ctrl-C does
            proc = subprocess.Popen([*PRETRIAL, *argv], stdout=out, stderr=err, env=ENV, start_new_session=True)
    finally:
        signal.signal(signal.SIGINT, old)
    try:
        wait_for(lambda: ready.search(out_path.read_bytes()) or proc.poll() is not None, 60, ready.pattern)
        time.sleep(delay)
        assert proc.poll() is None, "finished before it could be interrupted"
        if send is None:
            os.killpg(proc.pid, signal.SIGINT)
        else:
            send(proc.pid)
        rc = proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    if Path("/proc/self/stat").exists():  # no worker left running behind the command
        wait_for(lambda: not _live_members(proc.pid), 10, "the workers to exit")
    return rc, out_path.read_text(), err_path.read_text()


def test_pool_workers_leave_ctrl_c_to_the_parent(capfd):
    # a terminal's Ctrl-C reaches the workers too; a worker that took it would die with a traceback of its own
    import multiprocessing

    before = {p.pid for p in multiprocessing.active_children()}
    with deadline(60), ProcessExecutor(2) as ex:
        assert ex.map(abs, [-1, -2, -3]) == [1, 2, 3]
        workers = [p for p in multiprocessing.active_children() if p.pid not in before]
        assert len(workers) == 2  # the first map starts them all
        for p in workers:
            os.kill(p.pid, signal.SIGINT)
        time.sleep(0.5)
        assert all(p.is_alive() for p in workers)
        assert ex.map(abs, [-4, -5]) == [4, 5]
        assert [p for p in multiprocessing.active_children() if p.pid not in before] == workers  # none replaced
    assert "Traceback" not in capfd.readouterr().err


def test_ctrl_c_stops_evolve_cleanly_and_the_run_resumes(reference, tmp_path):
    cfg, ref = reference
    run_dir = tmp_path / "run"
    argv = ["evolve", str(cfg), "--out", str(run_dir), "--workers", "2"]
    rc, out, err = interrupt(argv, tmp_path, re.compile(rb"(?m)^gen +2 "), random.Random(5).uniform(0.0, 0.3))
    assert rc == 130
    assert err == "pretrial: interrupted\n"  # nothing from the workers: they leave Ctrl-C to the parent
    assert "Traceback" not in out and f"--resume {run_dir}" in out
    assert 2 < check_run_dir(run_dir) < GENERATIONS
    assert main(["evolve", str(cfg), "--resume", str(run_dir), "--workers", "1", "--quiet"]) == 0
    assert_same_run(run_dir, ref)


@pytest.mark.parametrize(
    "executor",
    [["--workers", "1"], ["--workers", "2"], ["--dask", "local", "--workers", "2"]],
    ids=["serial", "processes", "dask"],
)
def test_ctrl_c_stops_a_sweep_and_leaves_no_directory(executor, tmp_path):
    if "--dask" in executor:
        pytest.importorskip("dask.distributed", reason="dask.distributed is not installed (pretrial[cluster])")
    where = tmp_path / "sweeps"
    where.mkdir()
    argv = ["sweep", "lqr", "--plan", str(CARTPOLE_PLAN), "--out", str(where / "D"), *executor]
    # the whole plan takes ~10 s serial: the interrupt lands in the middle of the analyses
    delay = random.Random(" ".join(executor)).uniform(0.5, 2.0)
    rc, out, err = interrupt(argv, tmp_path, re.compile(rb"sweeping"), delay)
    assert rc == 130
    assert err == "pretrial: interrupted\n" and "Traceback" not in out
    assert list(where.iterdir()) == []  # no D, and no hidden .D.partial-* beside it


@pytest.mark.parametrize("stop", [KeyboardInterrupt, PretrialError("disk full (simulated)")])
def test_a_sweep_stopped_while_writing_leaves_no_directory(stop, tmp_path, monkeypatch):
    from pretrial.analysis.results import seal
    from pretrial.report import sweep_report as report

    def write_report(*args, **kwargs):
        raise stop

    monkeypatch.setattr(report, "write_report", write_report)
    out = tmp_path / "D"
    with pytest.raises(stop if isinstance(stop, type) else type(stop)):
        sweep_run.write_outputs(out, seal({"schema": "test"}), None, {"pretrial": "test"})
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- #
# 4. a full or unwritable disk
# --------------------------------------------------------------------------- #
@pytest.fixture
def nearly_full_disk(monkeypatch):
    real = shutil.disk_usage
    monkeypatch.setattr(shutil, "disk_usage", lambda p: real(p)._replace(free=5 * 2**20))


@pytest.mark.parametrize("command", ["evolve", "resume", "sweep"])
def test_too_little_free_space_is_refused_before_any_work(command, reference, nearly_full_disk, tmp_path,
                                                          monkeypatch, capsys):
    cfg, ref = reference
    out = tmp_path / "out"
    if command == "sweep":
        def no_work(*args, **kwargs):
            raise AssertionError("the sweep started")

        monkeypatch.setattr(sweep_run, "sweep", no_work)
        argv = ["sweep", "lqr", "--plan", str(CARTPOLE_PLAN), "--out", str(out), "--workers", "1"]
    elif command == "resume":
        shutil.copytree(ref, out)
        argv = ["evolve", str(cfg), "--resume", str(out), "--workers", "1"]
    else:
        argv = ["evolve", str(cfg), "--out", str(out), "--workers", "1"]
    before = snapshot(tmp_path)
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "only 5.0 MiB free, 64 MiB needed" in err and "Traceback" not in err, err
    assert snapshot(tmp_path) == before


def test_free_space_threshold(tmp_path, monkeypatch):
    real = shutil.disk_usage
    for free, ok in ((files.MIN_FREE_BYTES, True), (files.MIN_FREE_BYTES - 1, False)):
        monkeypatch.setattr(shutil, "disk_usage", lambda p, free=free: real(p)._replace(free=free))
        if ok:
            files.check_writable_dir(tmp_path / "new" / "dir")
        else:
            with pytest.raises(PretrialError, match="MiB free"):
                files.check_writable_dir(tmp_path / "new" / "dir")
    assert not (tmp_path / "new").exists()


class _FillsUp:
    """A file whose write stores half the data, then fails as a full disk does (or is interrupted)."""

    def __init__(self, f, exc: BaseException):
        self._f, self._exc = f, exc

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._f.close()

    def write(self, data: bytes) -> int:
        self._f.write(data[: len(data) // 2])
        self._f.flush()
        raise self._exc

    def __getattr__(self, name):
        return getattr(self._f, name)


@pytest.mark.parametrize("where", ["write", "fsync", "interrupt"])
def test_a_failed_write_keeps_the_old_file_and_leaves_no_temporary(where, tmp_path, monkeypatch):
    target = tmp_path / "manifest.json"
    files.atomic_write_bytes(target, b"old\n")
    enospc = OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    if where == "fsync":  # delayed allocation: a full disk often shows only when the data is flushed
        def fsync(fd):
            raise enospc

        monkeypatch.setattr(os, "fsync", fsync)
    else:
        real_fdopen = os.fdopen
        exc = enospc if where == "write" else KeyboardInterrupt()
        monkeypatch.setattr(os, "fdopen", lambda fd, *a, **k: _FillsUp(real_fdopen(fd, *a, **k), exc))
    expected = KeyboardInterrupt if where == "interrupt" else PretrialError
    with pytest.raises(expected) as info:
        files.atomic_write_bytes(target, b"new content\n" * 1000)
    monkeypatch.undo()
    assert target.read_bytes() == b"old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["manifest.json"]
    if expected is PretrialError:
        msg = info.value.message
        assert "\n" not in msg and str(target) in msg and "No space left on device" in msg and "intact" in msg


@pytest.mark.parametrize("umask", [0o022, 0o077, 0o002])
def test_written_files_follow_the_umask_like_open(umask, tmp_path):
    old = os.umask(umask)
    try:
        files.atomic_write_bytes(tmp_path / "atomic.json", b"{}\n")
        files.atomic_write_bytes(tmp_path / "atomic.json", b"{}\n")  # replacing a file, too
        with open(tmp_path / "plain.json", "wb") as f:
            f.write(b"{}\n")
    finally:
        os.umask(old)
    modes = {p.name: stat.S_IMODE(p.stat().st_mode) for p in tmp_path.iterdir()}
    # POSIX open(2): a new file gets the requested mode (0666 for open(..., "w")) less the umask
    assert modes == {"atomic.json": 0o666 & ~umask, "plain.json": 0o666 & ~umask}


# --------------------------------------------------------------------------- #
# 5. SIGTERM, and a command that dies without cleaning up
# --------------------------------------------------------------------------- #
def _sigterm_parent(pid: int) -> None:
    os.kill(pid, signal.SIGTERM)  # `kill PID`, and what the OOM killer's victim gets instead of a clean-up


def _sigterm_then_group(pid: int) -> None:
    # coreutils `timeout` (from memory: timeout.c) signals the command, then its whole process group, so the
    # command gets two; systemd signals every process of the unit at once
    os.kill(pid, signal.SIGTERM)
    os.killpg(pid, signal.SIGTERM)


@pytest.mark.parametrize("send", [_sigterm_parent, _sigterm_then_group], ids=["kill", "timeout"])
def test_sigterm_stops_evolve_like_ctrl_c_and_the_run_resumes(send, reference, tmp_path):
    cfg, ref = reference
    run_dir = tmp_path / "run"
    argv = ["evolve", str(cfg), "--out", str(run_dir), "--workers", "2"]
    rc, out, err = interrupt(argv, tmp_path, re.compile(rb"(?m)^gen +2 "), random.Random(7).uniform(0.0, 0.3), send)
    assert rc == 128 + signal.SIGTERM  # 143: 128 + the signal's number, as a shell reports it (common practice)
    assert err == "pretrial: terminated (SIGTERM)\n"
    assert "Traceback" not in out and f"--resume {run_dir}" in out
    assert 2 < check_run_dir(run_dir) < GENERATIONS  # checkpointed where it stopped
    assert main(["evolve", str(cfg), "--resume", str(run_dir), "--workers", "1", "--quiet"]) == 0
    assert_same_run(run_dir, ref)


@pytest.mark.slow
def test_sigterm_stops_a_sweep_and_leaves_no_directory(tmp_path):
    where = tmp_path / "sweeps"
    where.mkdir()
    argv = ["sweep", "lqr", "--plan", str(CARTPOLE_PLAN), "--out", str(where / "D"), "--workers", "2"]
    rc, out, err = interrupt(argv, tmp_path, re.compile(rb"sweeping"), random.Random(3).uniform(0.5, 2.0),
                             _sigterm_then_group)
    assert rc == 128 + signal.SIGTERM
    assert err == "pretrial: terminated (SIGTERM)\n" and "Traceback" not in out
    assert list(where.iterdir()) == []


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc (Linux)")
@pytest.mark.parametrize("executor", [["--workers", "2"], ["--dask", "local", "--workers", "2"]],
                         ids=["processes", "dask"])
def test_kill_9_leaves_no_worker_behind(executor, tmp_path):
    if "--dask" in executor:
        pytest.importorskip("dask.distributed", reason="dask.distributed is not installed (pretrial[cluster])")
    cfg = write_config(tmp_path / "cart.toml", pop_size=40)  # two chunks of 32 genomes: both workers busy
    argv = [*PRETRIAL, "evolve", str(cfg), "--out", str(tmp_path / "run"), *executor]
    # stdout a pipe, as in `pretrial evolve ... | tee log`: it ends only when no process holds it open
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, env=ENV, start_new_session=True)
    try:
        with deadline(120):
            seen = b""
            while not GEN_LINE.search(seen) and proc.poll() is None:
                seen += proc.stdout.readline()
        assert proc.poll() is None, seen.decode()
        # the command, the resource tracker and two workers (whatever else the executor starts)
        assert len(_live_members(proc.pid)) >= 4, _live_members(proc.pid)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        with deadline(30):
            proc.stdout.read()  # end of file: every process that held the pipe has exited
        wait_for(lambda: not _live_members(proc.pid), 10, "every process of the command to exit")
    finally:
        for pid in _live_members(proc.pid):  # only if the test failed: leave nothing running
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)
        proc.stdout.close()


_CHILD = """
import os, sys, time
from pretrial.sim.execution import exit_with_parent
exit_with_parent(os.getppid(), use_prctl=sys.argv[1] == "prctl")
print("watching", flush=True)
time.sleep(300)
"""
_PARENT = """
import subprocess, sys, time
subprocess.Popen([sys.executable, "-c", sys.argv[1], sys.argv[2]])
time.sleep(300)
"""


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc (Linux)")
@pytest.mark.parametrize("how", ["prctl", "poll"])
def test_a_worker_ends_with_its_parent(how, tmp_path):
    # both ways a worker watches its parent: the kernel's death signal, and the portable thread
    proc = subprocess.Popen([sys.executable, "-c", _PARENT, _CHILD, how], stdout=subprocess.PIPE, env=ENV,
                            start_new_session=True)
    try:
        with deadline(60):
            assert proc.stdout.readline() == b"watching\n"
            assert len(_live_members(proc.pid)) == 2
            proc.send_signal(signal.SIGKILL)  # the parent dies with no chance to end its child
            proc.wait()
            assert proc.stdout.read() == b""  # end of file: the child exited too
        wait_for(lambda: not _live_members(proc.pid), 10, "the orphaned child to exit")
    finally:
        for pid in _live_members(proc.pid):
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)
        proc.stdout.close()


@pytest.fixture
def default_sigint():
    # a shell's `pytest ... &` ignores SIGINT; stop_on_signals leaves an ignored SIGINT ignored
    old = signal.signal(signal.SIGINT, signal.default_int_handler)
    yield
    signal.signal(signal.SIGINT, old)


@pytest.mark.parametrize("signum, stop", [(signal.SIGTERM, Terminated), (signal.SIGINT, KeyboardInterrupt)],
                         ids=["SIGTERM", "SIGINT"])
def test_an_interrupt_python_discards_in_a_gc_callback_is_delivered_again(signum, stop, default_sigint, capfd):
    # A signal handler runs between any two bytecodes, also inside a gc callback (dask installs one), where
    # Python discards the exception ("Exception ignored in"): the command would run on as if never signalled.
    sent = []

    def callback(phase: str, info: dict) -> None:
        if phase == "start" and not sent:
            sent.append(signum)
            signal.raise_signal(signum)  # the handler runs here, inside the callback

    gc.callbacks.append(callback)
    try:
        with deadline(30), pytest.raises(stop):
            with stop_on_signals():
                gc.collect()
                assert sent == [signum]
                for _ in range(1000):  # delivered again within a moment
                    time.sleep(0.01)
                pytest.fail("the interrupt was lost")
    finally:
        gc.callbacks.remove(callback)
    assert "Exception ignored" not in capfd.readouterr().err


def test_a_second_sigterm_does_not_interrupt_the_clean_up():
    cleaned, before = [], signal.getsignal(signal.SIGTERM)
    with pytest.raises(Terminated):
        with stop_on_signals():
            try:
                signal.raise_signal(signal.SIGTERM)
            finally:
                signal.raise_signal(signal.SIGTERM)  # `timeout`'s second one, to the process group
                cleaned.append(True)
    assert cleaned == [True]
    assert signal.getsignal(signal.SIGTERM) is before  # restored on leaving
