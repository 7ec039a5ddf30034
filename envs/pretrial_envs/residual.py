"""A learned residual of the equations of motion: ``dx/dt = f_physics(x, u, p) + s * C phi(x, u)``.

Known physics leaves effects out (unmodelled friction, drag, cable and motor effects). A
residual model adds, to the derivatives of some states, a combination of fixed features of the
state and the physical input: linear in its coefficients ``C`` (one row per corrected state, one
column per feature), so it is fitted by ridge regression (:mod:`pretrial.residual_fit`) and
evaluated here in a few numpy operations per batch, inside the physics core's integrators.

The feature library (:class:`Library`) is built from the plant's names and units alone:

* base variables: every state that is not an angle, every action (its physical value, as
  ``Physics.derivatives`` receives it), and ``sin`` and ``cos`` of every angle (a state in
  ``rad``), so an angle's wrap never matters;
* every product of base variables up to ``degree`` (``1``, ``x``, ``theta_dot^2``,
  ``x_dot*cos(theta)``, ...);
* a smooth sign ``tanh(v/scale)`` of every velocity (a state in a unit per second): the shape of
  dry friction.

A residual is trusted only where the data it was fitted on reached: :class:`Envelope` keeps the
per-variable range of the fitted states and actions, and :meth:`Envelope.outside` says, for a
batch, which rows leave it widened by a stated margin.

``residual.json`` (schema ``pretrial.residual``, version 1) is read by :func:`load_residual`, which
checks everything against the plant it is given to and raises ValueError in one line naming the
file and key. This module needs numpy and the standard library only.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from itertools import combinations_with_replacement
from pathlib import Path
from typing import Any

import numpy as np

Array = np.ndarray

SCHEMA = "pretrial.residual"
VERSION = 1
#: keys every residual.json carries
REQUIRED = ("schema", "version", "env", "state", "action", "library", "features", "outputs", "coefficients",
            "envelope", "content_sha256")
#: highest polynomial degree of the library (the feature count grows as C(b + d, d) in b base variables)
MAX_DEGREE = 4
#: default velocity scale of the smooth sign tanh(v / scale), in the velocity's own unit (common practice for
#: smoothed Coulomb friction: a speed well below the motion of interest; the cart-pole's friction_speed is 0.01)
SIGN_SCALE = 0.01
#: default widening of the fitted envelope on each side, as a share of each variable's fitted span (our choice)
MARGIN = 0.1


def content_hash(body: Mapping[str, Any]) -> str:
    """SHA-256 of ``body`` without its ``content_sha256``, serialized as pretrial's files are hashed
    (sorted keys, no spaces, strict numbers: ``pretrial.files.canonical_json``)."""
    rest = {k: v for k, v in body.items() if k != "content_sha256"}
    text = json.dumps(rest, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _is_angle(unit: str) -> bool:
    return unit == "rad"


def _is_velocity(unit: str) -> bool:
    return unit.endswith("/s") and not unit.endswith("/s^2")


@dataclass(frozen=True)
class Library:
    """The feature library of a plant: names, and their batched evaluation.

    Parameters
    ----------
    state_names, state_units, action_names : sequence of str
        The plant's, in its order.
    degree : int
        Highest total degree of the products of base variables (0: the constant alone).
    sign_scale : float
        Velocity scale of the smooth signs ``tanh(v / sign_scale)``; 0 leaves them out.
    """

    state_names: tuple[str, ...]
    state_units: tuple[str, ...]
    action_names: tuple[str, ...]
    degree: int = 2
    sign_scale: float = SIGN_SCALE
    names: tuple[str, ...] = field(init=False)

    def __post_init__(self) -> None:
        if isinstance(self.degree, bool) or not isinstance(self.degree, int) or not 0 <= self.degree <= MAX_DEGREE:
            raise ValueError(f"degree: {self.degree!r} must be a whole number from 0 to {MAX_DEGREE}")
        if not (isinstance(self.sign_scale, (int, float)) and math.isfinite(self.sign_scale)
                and self.sign_scale >= 0):
            raise ValueError(f"sign_scale: {self.sign_scale!r} must be a finite number >= 0")
        base_names, base = [], []  # base variable: (kind, column); kind 0 state, 1 action, 2 sin, 3 cos
        for j, (n, u) in enumerate(zip(self.state_names, self.state_units)):
            if not _is_angle(u):
                base_names.append(n)
                base.append((0, j))
        base_names += list(self.action_names)
        base += [(1, j) for j in range(len(self.action_names))]
        for j, (n, u) in enumerate(zip(self.state_names, self.state_units)):
            if _is_angle(u):
                base_names += [f"sin({n})", f"cos({n})"]
                base += [(2, j), (3, j)]
        terms: list[tuple[int, ...]] = [()]
        for d in range(1, self.degree + 1):
            terms += list(combinations_with_replacement(range(len(base)), d))
        signs = [j for j, u in enumerate(self.state_units) if _is_velocity(u)] if self.sign_scale > 0 else []
        names = [_term_name(t, base_names) for t in terms]
        names += [f"tanh({self.state_names[j]}/{self.sign_scale:g})" for j in signs]
        object.__setattr__(self, "names", tuple(names))
        object.__setattr__(self, "_base", tuple(base))
        # each product is formed from the product of its first factors (listed earlier: terms go by degree)
        index = {t: k for k, t in enumerate(terms)}
        plan = tuple((k, index[t[:-1]], t[-1]) for k, t in enumerate(terms) if len(t) > 1)
        object.__setattr__(self, "_linear", tuple((k, t[0]) for k, t in enumerate(terms) if len(t) == 1))
        object.__setattr__(self, "_plan", plan)
        object.__setattr__(self, "_n_terms", len(terms))
        object.__setattr__(self, "_signs", tuple(signs))

    @property
    def size(self) -> int:
        return len(self.names)

    def to_dict(self) -> dict[str, Any]:
        return {"degree": self.degree, "sign_scale": self.sign_scale}

    def features(self, state: Array, force: Array) -> Array:
        """Feature matrix (N, F) for states (N, S) and physical inputs (N, A) (a transposed view of (F, N))."""
        n = state.shape[0]
        cols: list[Array] = []
        for kind, j in self._base:  # type: ignore[attr-defined]
            if kind == 0:
                cols.append(state[:, j])
            elif kind == 1:
                cols.append(force[:, j])
            elif kind == 2:
                cols.append(np.sin(state[:, j]))
            else:
                cols.append(np.cos(state[:, j]))
        # feature-major: each feature is a contiguous row while it is formed
        out = np.empty((self.size, n))
        out[0] = 1.0
        for k, b in self._linear:  # type: ignore[attr-defined]
            out[k] = cols[b]
        for k, prefix, b in self._plan:  # type: ignore[attr-defined]
            np.multiply(out[prefix], cols[b], out=out[k])
        k0 = self._n_terms  # type: ignore[attr-defined]
        for i, j in enumerate(self._signs):  # type: ignore[attr-defined]
            np.tanh(state[:, j] / self.sign_scale, out=out[k0 + i])
        return out.T


def _term_name(term: tuple[int, ...], base_names: Sequence[str]) -> str:
    if not term:
        return "1"
    parts = []
    for b in sorted(set(term)):
        power = term.count(b)
        parts.append(base_names[b] if power == 1 else f"{base_names[b]}^{power}")
    return "*".join(parts)


@dataclass(frozen=True)
class Envelope:
    """Per-variable range of the data a residual was fitted on: states, then actions (physical units).

    Attributes
    ----------
    names : tuple of str
        State names, then action names.
    low, high : (V,) arrays
        Smallest and largest fitted value of each.
    margin : float
        Default widening on each side, as a share of each variable's span ``high - low``.
    """

    names: tuple[str, ...]
    low: Array
    high: Array
    margin: float = MARGIN

    def bounds(self, margin: float | None = None) -> tuple[Array, Array]:
        """The trust region: ``[low - m (high - low), high + m (high - low)]`` per variable."""
        m = self.margin if margin is None else float(margin)
        if not (math.isfinite(m) and m >= 0):
            raise ValueError(f"margin: {margin!r} must be a finite number >= 0")
        span = self.high - self.low
        return self.low - m * span, self.high + m * span

    def outside_by(self, state: Array, force: Array, margin: float | None = None) -> Array:
        """(N, V) bool: variable ``v`` of row ``n`` is outside the trust region (NaN counts as outside)."""
        lo, hi = self.bounds(margin)
        z = np.concatenate([np.asarray(state, float), np.asarray(force, float)], axis=1)
        return ~((z >= lo) & (z <= hi))

    def outside(self, state: Array, force: Array, margin: float | None = None) -> Array:
        """(N,) bool: row ``n`` has some state or action outside the trust region."""
        return self.outside_by(state, force, margin).any(axis=1)

    def to_dict(self) -> dict[str, Any]:
        return {"names": list(self.names), "low": [float(v) for v in self.low],
                "high": [float(v) for v in self.high], "margin": float(self.margin)}


@dataclass(frozen=True)
class Residual:
    """A fitted residual: ``d state[outputs] / dt += coefficients @ features(state, force)``.

    Attributes
    ----------
    library : Library
    outputs : tuple of int
        State columns whose derivatives it corrects (e.g. the velocities: accelerations).
    coefficients : (K, F) array
        One row per output, one column per feature.
    envelope : Envelope
        What the fitted data covered.
    source : str
        The file it was read from ("" when built in memory).
    sha256 : str
        Its content hash ("" when built in memory).
    """

    library: Library
    outputs: tuple[int, ...]
    coefficients: Array
    envelope: Envelope
    source: str = ""
    sha256: str = ""

    def __post_init__(self) -> None:
        c = np.array(self.coefficients, dtype=float)
        if c.shape != (len(self.outputs), self.library.size):
            raise ValueError(f"coefficients: expected {len(self.outputs)} x {self.library.size} values, "
                             f"got shape {c.shape}")
        c.setflags(write=False)
        object.__setattr__(self, "coefficients", c)
        # per feature, its coefficients as a (K, 1) column
        object.__setattr__(self, "_coef_col", np.ascontiguousarray(c.T)[:, :, None])
        object.__setattr__(self, "_outputs", np.array(self.outputs, dtype=np.intp))

    def evaluate(self, state: Array, force: Array) -> Array:
        """The correction (N, K) of the derivatives of ``outputs`` at states (N, S) and physical inputs (N, A).

        Summed feature by feature in a fixed order, not by a matrix product: BLAS splits a product
        differently for different batch sizes, and a row's result must not depend on its batch
        (a sweep sample replays alone bit for bit).
        """
        x = self.library.features(state, force).T  # (F, N), contiguous rows
        c = self._coef_col  # type: ignore[attr-defined]
        acc = c[0] * x[0]
        tmp = np.empty_like(acc)
        for j in range(1, x.shape[0]):
            np.multiply(c[j], x[j], out=tmp)
            acc += tmp
        return acc.T

    def add_to(self, deriv: Array, state: Array, force: Array, scale: Array | None = None) -> Array:
        """``deriv`` (N, S) with the residual added, times ``scale`` (N, 1) per row (None: 1).

        Rows whose scale is 0 keep ``deriv`` exactly (not ``deriv + 0``, which turns -0.0 into 0.0
        and a non-finite correction into NaN); a scale of 1 adds the correction itself.
        """
        r = self.evaluate(state, force)
        cols = self._outputs  # type: ignore[attr-defined]
        if scale is None:
            deriv[:, cols] += r
        else:
            scale = np.asarray(scale, dtype=float).reshape(-1, 1)
            part = deriv[:, cols]
            deriv[:, cols] = np.where(scale != 0.0, part + scale * r, part)
        return deriv

    def without_signs(self) -> Residual:
        """This residual with the coefficients of its smooth signs ``tanh(v / scale)`` at 0.

        They stand for dry friction: a linear model takes them out as it takes out the plant's Coulomb
        friction (a sign function has no useful derivative at rest; ``tanh``'s slope there, 1 / scale,
        would read as a large viscous term).
        """
        c = np.array(self.coefficients)
        c[:, self.library._n_terms:] = 0.0  # type: ignore[attr-defined]
        return Residual(self.library, self.outputs, c, self.envelope, self.source, self.sha256)

    @property
    def has_signs(self) -> bool:
        """Whether some smooth-sign feature has a non-zero coefficient."""
        return bool(np.any(self.coefficients[:, self.library._n_terms:]))  # type: ignore[attr-defined]

    def to_dict(self, state_names: Sequence[str]) -> dict[str, Any]:
        """The parts of residual.json this object holds (features named, outputs by state name)."""
        return {"library": self.library.to_dict(), "features": list(self.library.names),
                "outputs": [state_names[j] for j in self.outputs],
                "coefficients": [[float(v) for v in row] for row in self.coefficients],
                "envelope": self.envelope.to_dict()}


# --------------------------------------------------------------------------- #
# residual.json
# --------------------------------------------------------------------------- #
def _names(label: str, value: Any) -> tuple[str, ...]:
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise ValueError(f"{label}: expected a list of names")
    return tuple(value)


def _numbers(label: str, value: Any, shape: tuple[int, ...]) -> Array:
    try:
        a = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{label}: expected numbers") from None
    if a.shape != shape:
        raise ValueError(f"{label}: expected shape {shape}, got {a.shape}")
    if not np.isfinite(a).all():
        raise ValueError(f"{label}: not every value is a finite number")
    return a


def residual_from_dict(data: Any, physics: Any, source: str = "") -> Residual:
    """A :class:`Residual` from the parsed ``residual.json`` ``data`` for ``physics`` (its names and units).

    Raises ValueError naming the key: another schema or version, a missing key, names that do not
    match the plant, a feature list the library does not give, coefficients or an envelope of the
    wrong shape or not finite, or content that does not match its hash.
    """
    if not isinstance(data, dict) or data.get("schema") != SCHEMA:
        found = data.get("schema") if isinstance(data, dict) else type(data).__name__
        raise ValueError(f"schema: {found!r}, expected {SCHEMA!r} (not a residual file)")
    if data.get("version") != VERSION:
        raise ValueError(f"version: {data.get('version')!r}; this pretrial reads version {VERSION}")
    for key in REQUIRED:
        if key not in data:
            raise ValueError(f"{key}: missing")
    env = data["env"]
    env_id = env.get("id") if isinstance(env, dict) else None
    if env_id != physics.env_id:
        raise ValueError(f"env: fitted on {env_id!r}, this plant is {physics.env_id!r}")
    state = _names("state", data["state"])
    if state != tuple(physics.state_names):
        raise ValueError(f"state: fitted on states {', '.join(state)}; this plant has "
                         f"{', '.join(physics.state_names)}")
    action = _names("action", data["action"])
    if action != tuple(physics.action_names):
        raise ValueError(f"action: fitted on actions {', '.join(action)}; this plant has "
                         f"{', '.join(physics.action_names)}")
    lib = data["library"]
    if not isinstance(lib, dict) or set(lib) != {"degree", "sign_scale"}:
        raise ValueError("library: expected degree and sign_scale")
    library = Library(tuple(physics.state_names), tuple(physics.state_units), tuple(physics.action_names),
                      lib["degree"], lib["sign_scale"])
    features = _names("features", data["features"])
    if features != library.names:
        diff = next((f"{a!r} where the library has {b!r}" for a, b in zip(features, library.names) if a != b),
                    f"{len(features)} names where the library has {library.size}")
        raise ValueError(f"features: do not match the library of degree {library.degree} on this plant ({diff})")
    outputs = _names("outputs", data["outputs"])
    unknown = [n for n in outputs if n not in state]
    if unknown or len(set(outputs)) != len(outputs) or not outputs:
        raise ValueError(f"outputs: expected distinct state names of this plant, got {', '.join(outputs) or 'none'}")
    coef = _numbers("coefficients", data["coefficients"], (len(outputs), library.size))
    envelope = data["envelope"]
    if not isinstance(envelope, dict):
        raise ValueError("envelope: expected names, low, high and margin")
    names = _names("envelope.names", envelope.get("names"))
    if names != state + action:
        raise ValueError("envelope.names: expected the state names then the action names")
    low = _numbers("envelope.low", envelope.get("low"), (len(names),))
    high = _numbers("envelope.high", envelope.get("high"), (len(names),))
    if (low > high).any():
        raise ValueError(f"envelope: low above high for {names[int(np.argmax(low > high))]}")
    margin = envelope.get("margin")
    if isinstance(margin, bool) or not isinstance(margin, (int, float)) or not (math.isfinite(margin) and margin >= 0):
        raise ValueError(f"envelope.margin: {margin!r} must be a finite number >= 0")
    try:
        digest = content_hash(data)
    except ValueError:  # a non-finite number somewhere else in the file
        raise ValueError("content_sha256: the content holds a number JSON does not allow (NaN or infinity); "
                         "edited or damaged") from None
    if data["content_sha256"] != digest:
        raise ValueError("content_sha256: does not match the content (edited or damaged); fit it again with "
                         "pretrial calibrate --residual")
    return Residual(library, tuple(state.index(n) for n in outputs), coef,
                    Envelope(names, low, high, float(margin)), source, digest)


def residual_document(residual: Residual, physics: Any, extra: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The whole ``residual.json`` content for ``residual`` on ``physics``, ``extra`` keys added, hashed last."""
    body: dict[str, Any] = {"schema": SCHEMA, "version": VERSION, "env": {"id": physics.env_id},
                            "state": list(physics.state_names), "action": list(physics.action_names),
                            **residual.to_dict(physics.state_names), **dict(extra or {})}
    body.pop("content_sha256", None)
    return {**body, "content_sha256": content_hash(body)}


def load_residual(path: str | Path, physics: Any) -> Residual:
    """Read ``residual.json`` at ``path`` for ``physics``; ValueError ``residual: PATH: key: what is wrong``."""
    p = Path(path)
    prefix = f"residual: {p}"
    if not p.is_file():
        raise ValueError(f"{prefix}: no such file (expected a residual.json from pretrial calibrate --residual)")
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise ValueError(f"{prefix}: not a residual file (not valid JSON: {exc})") from None
    try:
        return residual_from_dict(data, physics, str(path))
    except ValueError as exc:
        raise ValueError(f"{prefix}: {exc}") from None
