"""stagewatch's estimator: the pure numerics of the cascade soft sensor.

Train description, mole balances, exact propagation, the extended Kalman filter,
observability and the plant simulator. Nothing here does I/O beyond reading a
train file, and nothing imports a web or database library.

Importing the package points numba's on-disk cache at a folder named after a digest
of this package's sources (unless ``NUMBA_CACHE_DIR`` is already set): numba checks
a cached kernel against its own file only, so a kernel that inlines functions from
another module would otherwise be reused stale after that module changed. The root
folder is ``STAGEWATCH_CACHE_DIR`` or ``~/.cache/stagewatch``.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path


def _set_numba_cache_dir() -> None:
    if "NUMBA_CACHE_DIR" in os.environ:
        return
    digest = hashlib.sha256()
    for path in sorted(Path(__file__).parent.glob("*.py")):
        digest.update(path.name.encode())
        digest.update(path.read_bytes())
    root = os.environ.get("STAGEWATCH_CACHE_DIR") or str(Path.home() / ".cache" / "stagewatch")
    os.environ["NUMBA_CACHE_DIR"] = str(Path(root) / f"numba-{digest.hexdigest()[:16]}")


_set_numba_cache_dir()
