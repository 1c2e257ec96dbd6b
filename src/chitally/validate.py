"""Validators of every parameter (temporary shim; replaced by the full module)."""

from __future__ import annotations

import math
from typing import Any

from .sources import InputError, validate_points
from .sources import validate_eps as _eps
from .sources import validate_max_dim as _max_dim


def validate_eps(eps: Any, *, name: str = "eps") -> float:
    return _eps(eps)


def validate_max_dim(max_dim: Any, *, name: str = "max_dim") -> int | None:
    return _max_dim(max_dim)


def validate_positive(value: Any, *, name: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a finite number > 0, got {value!r}") from None
    if isinstance(value, bool) or not math.isfinite(v) or v <= 0:
        raise InputError(f"{name} must be a finite number > 0, got {value!r}")
    return v


def validate_count(value: Any, *, name: str, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


__all__ = ["InputError", "validate_count", "validate_eps", "validate_max_dim", "validate_points",
           "validate_positive"]
