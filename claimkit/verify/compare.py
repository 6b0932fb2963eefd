"""Comparing stored numbers with re-derived ones, up to the precision they were stored with."""

from __future__ import annotations

import math

__all__ = ["differences"]

#: Keys whose values are times of the run itself, never compared.
_RUN_TIMES = ("time", "examined_at")


def differences(a, b, path: str = "") -> list[str]:
    """Differences between two JSON values; floats equal up to the stored precision."""
    if isinstance(a, dict) and isinstance(b, dict):
        out = []
        for k in sorted(set(a) | set(b)):
            if k in _RUN_TIMES:
                continue
            if k not in a or k not in b:
                out.append(f"{path}.{k}: present on one side only")
            else:
                out += differences(a[k], b[k], f"{path}.{k}")
        return out
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [f"{path}: {len(a)} items stored, {len(b)} reproduced"]
        out = []
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            out += differences(x, y, f"{path}[{i}]")
        return out
    if isinstance(a, bool) or isinstance(b, bool) or not isinstance(a, (int, float)) \
            or not isinstance(b, (int, float)):
        return [] if a == b else [f"{path}: stored {a!r}, reproduced {b!r}"]
    if a == b:
        return []
    # Rounded values may differ by one unit in their last stored digit.
    digits = max(_decimals(a), _decimals(b))
    tol = 1.01 * 10.0 ** (-digits) if digits else 0.0
    if isinstance(a, float) and isinstance(b, float) and a != 0 and b != 0 and \
            abs(math.log10(abs(a)) - math.log10(abs(b))) < 1e-9:
        return []
    return [] if abs(a - b) <= tol else [f"{path}: stored {a!r}, reproduced {b!r}"]


def _decimals(x) -> int:
    t = repr(x)
    if "e" in t or "." not in t:
        return 0
    return len(t.split(".")[1])
