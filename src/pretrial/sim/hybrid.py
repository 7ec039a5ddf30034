"""Which learned residual a hybrid plant carries: its record, where its path resolves, and whether it is
the one a policy was trained on.

A residual is named by its file and identified by its content hash (``residual.json``'s
``content_sha256``). A policy evolved on a hybrid plant records ``training.residual = {path, sha256}``
in ``champion.json``; replay and sweep refuse to run it on a residual file whose hash differs
(the residual would not be the plant it was trained and judged on).
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from pretrial.errors import InputError

#: the env option that names a residual.json
OPTION = "residual"


def residual_record(physics: Any) -> dict[str, Any] | None:
    """``{path, sha256, margin}`` of the plant's residual (None without one)."""
    res = getattr(physics, "residual", None)
    if res is None:
        return None
    return {"path": res.source, "sha256": res.sha256, "margin": float(res.envelope.margin)}


def resolve_residual_path(options: Mapping[str, Any], base: str | Path) -> dict[str, Any]:
    """``options`` with a relative ``residual`` path made absolute against the directory ``base``.

    A config or plan names its residual relative to itself, so the files move together; any other
    value (absolute, not a string) is left for the plant to accept or refuse.
    """
    out = dict(options)
    value = out.get(OPTION)
    if isinstance(value, str) and value.strip() and not Path(value).is_absolute():
        out[OPTION] = str((Path(base) / value).resolve())
    return out


def check_trained_residual(policy: Any, physics: Any, policy_label: str, where: str) -> None:
    """Refuse a plant whose residual differs from the one ``policy`` was trained on (by content hash).

    ``where`` names what set the residual (a plan's ``scenario.options``, ``--option``, the policy's own
    options). A policy trained without a residual, or a plant without one, is not checked.

    Raises
    ------
    InputError
        One line naming both files and both hashes.
    """
    trained = (getattr(policy, "training", None) or {}).get(OPTION)
    now = residual_record(physics)
    if not isinstance(trained, Mapping) or now is None or trained.get("sha256") == now["sha256"]:
        return
    was = str(trained.get("sha256"))[:16]
    raise InputError(f"{where}: residual {now['path']} (sha256 {now['sha256'][:16]}…) is not the residual the policy "
                     f"{policy_label} was trained on: {trained.get('path')} (sha256 {was}…)")
