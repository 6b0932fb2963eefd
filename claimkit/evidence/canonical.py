"""Canonical JSON: the exact bytes that claimkit signs and stores.

The encoding follows the JSON Canonicalization Scheme (RFC 8785):

- UTF-8, no insignificant white space;
- object members sorted by the UTF-16 code units of their names;
- strings escaped only where JSON requires it (``\\"``, ``\\\\``, ``\\b``,
  ``\\f``, ``\\n``, ``\\r``, ``\\t``, other control characters as
  ``\\u00xx`` in lower case), everything else written as is;
- numbers written as ECMAScript writes a double: the shortest decimal that
  reads back to the same binary64 value, in fixed notation for magnitudes in
  [1e-6, 1e21) and ``d.ddde±x`` otherwise; ``-0`` is written ``0``;
- NaN and infinities are refused, as are integers beyond 2**53 (they would not
  survive a round trip through a double in other implementations).

Tuples are written as arrays and NumPy scalars as the Python number they hold,
so that callers can pass their parameters as they have them; the stored record
is the decoded canonical form, so what is kept is exactly what was signed.
"""

from __future__ import annotations

import json
import math
from typing import Any

__all__ = ["canonical_json", "canonicalize", "format_number"]

_MAX_SAFE_INT = 2**53
_encode_string = json.encoder.encode_basestring  # the escaping RFC 8785 asks for


def format_number(value: float) -> str:
    """Write a number as RFC 8785 (ECMAScript ``Number.prototype.toString``) does.

    Parameters
    ----------
    value : float or int
        A finite number.

    Returns
    -------
    str
        The canonical text.

    Notes
    -----
    Python's ``repr`` of a float is already the shortest string that reads back
    to the same double; only its layout (where the point goes, when an
    exponent is used, how the exponent is written) differs from ECMAScript.
    """
    if isinstance(value, bool):
        raise TypeError("a boolean is not a number")
    if isinstance(value, int):
        if abs(value) > _MAX_SAFE_INT:
            raise ValueError(f"integer {value} is too large for canonical JSON (|n| > 2**53)")
        return str(value)
    x = float(value)
    if not math.isfinite(x):
        raise ValueError("NaN and infinity have no JSON form")
    if x == 0:
        return "0"
    if x < 0:
        return "-" + format_number(-x)
    text = repr(x)
    mantissa, _, exp = text.partition("e")
    int_part, _, frac_part = mantissa.partition(".")
    digits = int_part + frac_part
    # value = 0.DIGITS x 10**n
    n = int(exp or 0) + len(int_part)
    stripped = digits.lstrip("0")
    n -= len(digits) - len(stripped)
    digits = stripped.rstrip("0") or "0"
    k = len(digits)
    if k <= n <= 21:
        return digits + "0" * (n - k)
    if 0 < n <= 21:
        return digits[:n] + "." + digits[n:]
    if -6 < n <= 0:
        return "0." + "0" * (-n) + digits
    e = n - 1
    sign = "+" if e >= 0 else "-"
    head = digits if k == 1 else digits[0] + "." + digits[1:]
    return f"{head}e{sign}{abs(e)}"


def _utf16_key(name: str) -> bytes:
    return name.encode("utf-16-be", "surrogatepass")


def _write(obj: Any, out: list[str]) -> None:
    if obj is None:
        out.append("null")
    elif obj is True:
        out.append("true")
    elif obj is False:
        out.append("false")
    elif isinstance(obj, str):
        out.append(_encode_string(obj))
    elif isinstance(obj, (int, float)):
        out.append(format_number(obj))
    elif isinstance(obj, dict):
        for key in obj:
            if not isinstance(key, str):
                raise TypeError(f"object member names must be strings, not {type(key).__name__}")
        out.append("{")
        first = True
        for key in sorted(obj, key=_utf16_key):
            if not first:
                out.append(",")
            first = False
            out.append(_encode_string(key))
            out.append(":")
            _write(obj[key], out)
        out.append("}")
    elif isinstance(obj, (list, tuple)):
        out.append("[")
        for i, item in enumerate(obj):
            if i:
                out.append(",")
            _write(item, out)
        out.append("]")
    elif hasattr(obj, "item") and callable(obj.item) and not hasattr(obj, "__len__"):
        # NumPy scalars: the engine passes measured values as it has them.
        _write(obj.item(), out)
    else:
        raise TypeError(f"{type(obj).__name__} has no canonical JSON form")


def canonical_json(obj: Any) -> bytes:
    """Encode ``obj`` as canonical JSON (RFC 8785) in UTF-8.

    Parameters
    ----------
    obj : dict, list, str, int, float, bool or None
        The value; nested containers allowed.

    Returns
    -------
    bytes
        The canonical encoding.

    Raises
    ------
    TypeError, ValueError
        For values JSON cannot hold (sets, bytes, NaN, lone surrogates ...).

    References
    ----------
    A. Rundgren, B. Jordan, S. Erdtman, "JSON Canonicalization Scheme (JCS)",
    RFC 8785, 2020. doi:10.17487/RFC8785
    """
    out: list[str] = []
    _write(obj, out)
    try:
        return "".join(out).encode("utf-8")
    except UnicodeEncodeError as exc:
        raise ValueError("string holds a lone surrogate; it has no UTF-8 form") from exc


def canonicalize(obj: Any) -> Any:
    """The value as it reads back from its canonical encoding (tuples become lists)."""
    return json.loads(canonical_json(obj))


def is_canonical(data: bytes) -> bool:
    """True when ``data`` is valid JSON and already in canonical form."""
    try:
        return canonical_json(json.loads(data.decode("utf-8"))) == data
    except (ValueError, TypeError, UnicodeDecodeError):
        return False
