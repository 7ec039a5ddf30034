"""What produced a file: versions of the libraries that shape the numbers (for manifests, never hashed files)."""

from __future__ import annotations

import platform
from importlib.metadata import PackageNotFoundError, version

#: the distributions whose versions can change a result, in the order manifests list them
PACKAGES = ("numpy", "scipy", "gymnasium", "neat-python", "matplotlib")


def versions() -> dict[str, str]:
    """Python's version and each of :data:`PACKAGES`' installed versions (a missing one is left out)."""
    out = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            pass
    return out
