"""Animations of a recorded episode: GIF (Pillow), MP4 (ffmpeg) or a window.

Frames are drawn by the env's own renderer (``Physics.draw`` through the
gymnasium front doors' :class:`~pretrial_envs.core._Renderer`), with the time
and a note (e.g. the perturbation) in each frame. Frames are thinned to at most
:data:`MAX_FPS` per second of simulated time, so playback runs in real time;
the renderer's figure is 600 x 400 px.
"""

from __future__ import annotations

import math
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

from pretrial.errors import InputError
from pretrial.files import atomic_write_bytes
from pretrial_envs.core import Physics, Renderer

#: highest frame rate written (common practice for GIFs: browsers slow faster ones down)
MAX_FPS = 25.0

#: matplotlib backends that cannot open a window
_HEADLESS = {"agg", "cairo", "pdf", "pgf", "ps", "svg", "template"}

FFMPEG_HINT = ("ffmpeg is not installed or not on PATH; install it (e.g. `apt install ffmpeg`, `brew install ffmpeg` "
               "or `conda install ffmpeg`) or write a GIF with --gif")


def frame_steps(steps: int, dt: float, max_fps: float = MAX_FPS) -> tuple[np.ndarray, float]:
    """Recorded state indices to draw (first and last included) and the real-time frame rate."""
    stride = max(1, math.ceil(1.0 / (dt * max_fps) - 1e-9))
    idx = np.arange(0, steps + 1, stride)
    if idx[-1] != steps:
        idx = np.append(idx, steps)
    return idx, 1.0 / (dt * stride)


def _wrap(note: str) -> str:
    return "\n".join(textwrap.wrap(note, 60)) if note else ""


def check_mp4() -> None:
    """Raise InputError (saying how to get ffmpeg) unless matplotlib can write MP4."""
    from matplotlib.animation import FFMpegWriter

    if not FFMpegWriter.isAvailable():
        raise InputError(f"--mp4: {FFMPEG_HINT}")


def write_animation(path: str | Path, physics: Physics, states: np.ndarray, params: np.ndarray, steps: int,
                    note: str = "") -> int:
    """Write one episode as GIF or MP4 (by suffix: ``.mp4`` -> MP4, else GIF), atomically.

    Parameters
    ----------
    path : path-like
    physics : Physics
    states : (T+1, S) array
        The episode's recorded states.
    params : (P,) array
    steps : int
        Control periods the episode lasted (later states are not drawn).
    note : str
        Text shown in every frame next to the time (e.g. the ``--set`` words).

    Returns
    -------
    int
        Frames written.
    """
    from matplotlib.animation import FFMpegWriter, PillowWriter

    path = Path(path)
    mp4 = path.suffix.lower() == ".mp4"
    if mp4:
        check_mp4()
    idx, fps = frame_steps(int(steps), physics.dt)
    renderer = Renderer(physics, "rgb_array")
    text = _wrap(note)
    renderer.frame(states[0], params, 0.0, text)  # creates the figure the writer records
    writer = FFMpegWriter(fps=fps) if mp4 else _drawn_frames_writer(PillowWriter)(fps=fps)
    with tempfile.TemporaryDirectory(prefix=".pretrial-anim-", dir=path.parent) as tmp:
        out = Path(tmp) / f"frames{path.suffix or '.gif'}"
        with writer.saving(renderer.fig, str(out), dpi=renderer.fig.dpi):
            for k in idx:
                renderer.frame(states[k], params, float(k * physics.dt), text)
                writer.grab_frame()
        atomic_write_bytes(path, out.read_bytes())
    renderer.close()
    return len(idx)


def _drawn_frames_writer(base: type) -> type:
    """matplotlib's Pillow writer, taking each frame from the canvas the renderer has just drawn.

    The stock writer draws the figure again for every frame and lets Pillow
    pick a palette per frame at save time; this halves the drawing and
    quantizes each frame once, with Pillow's fast octree method.
    """
    from PIL import Image

    class Writer(base):
        def grab_frame(self, **savefig_kwargs: object) -> None:
            canvas = self.fig.canvas
            rgba = Image.frombuffer("RGBA", canvas.get_width_height(), canvas.buffer_rgba(), "raw", "RGBA", 0, 1)
            self._frames.append(rgba.convert("RGB").quantize(method=Image.Quantize.FASTOCTREE))

    return Writer


def display_available() -> tuple[bool, str]:
    """Whether matplotlib can open a window here, and its backend name."""
    import matplotlib.pyplot as plt  # importing pyplot resolves the backend for this machine

    backend = str(plt.get_backend())
    return backend.lower() not in _HEADLESS, backend


def show_episode(physics: Physics, states: np.ndarray, params: np.ndarray, steps: int, note: str = "") -> None:
    """Play one episode in a window at real time, then keep the window open until closed."""
    import matplotlib.pyplot as plt

    idx, fps = frame_steps(int(steps), physics.dt)
    renderer = Renderer(physics, "human")
    text = _wrap(note)
    for k in idx:
        start = time.perf_counter()
        renderer.frame(states[k], params, float(k * physics.dt), text)
        time.sleep(max(0.0, 1.0 / fps - (time.perf_counter() - start)))
    plt.show()
    renderer.close()
