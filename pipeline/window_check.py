"""The shape contract of in-memory window sets, checked the same way by every model family.

Reads window sets (any object with X (n, L, F), y (n, H), env (n,), env_names; pipeline.windows.WindowSet
is the one the pipeline builds); writes nothing; obeys no config key. numpy only, so the closed-form
families check their inputs without loading torch, and the training loop checks them the same way.
"""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np

from pipeline.errors import InputError


class WindowSetLike(Protocol):
    """The attributes of pipeline.windows.WindowSet that training needs (duck typing, no import)."""

    X: np.ndarray  # float32 (n, L, F), scaled features
    y: np.ndarray  # float32 (n, H), scaled target
    env: np.ndarray  # int64 (n,), index into env_names
    env_names: list
    target_index: int


def check_window_set(windows: Any, what: str) -> None:
    """One-line InputError when a window set lacks fields, has wrong shapes or non-finite values."""
    for attr in ("X", "y", "env", "env_names"):
        if not hasattr(windows, attr):
            raise InputError(f"missing attribute {attr!r}", field=what)
    X, y, env = windows.X, windows.y, windows.env
    if X.ndim != 3 or y.ndim != 2 or env.ndim != 1 or not (len(X) == len(y) == len(env)):
        raise InputError(f"expected X (n, L, F), y (n, H), env (n,), got {X.shape}, {y.shape}, {env.shape}",
                         field=what)
    for name, arr in (("X", X), ("y", y)):
        bad = int(np.size(arr) - np.count_nonzero(np.isfinite(arr)))
        if bad:
            raise InputError(f"{bad} non-finite values", field=f"{what}.{name}")
    if len(env) and (env.min() < 0 or env.max() >= len(windows.env_names)):
        raise InputError(f"env index outside 0..{len(windows.env_names) - 1}", field=f"{what}.env")
