"""Numbers in words for people: false-alarm probabilities and geometry, one formatter each.

Outside the numeric core on purpose: wording is for readers and changes with
them, while :mod:`claimkit.mark` computes. JSON keeps the numbers themselves
(``false_alarm_probability``, ``log10_false_alarm_probability``, ``geometry``);
these strings sit beside them.

A probability is written as a power of ten with its sign spelled out
("3.2 x 10^-7"), never as "3.2e-07": an exponent written with an "e" loses
its meaning, and sometimes its minus sign, when copied into prose or a
word processor.
"""

from __future__ import annotations

import math

__all__ = ["FLOOR_LOG10", "MARK_FOUND", "NO_MARK", "geometry", "probability", "ssim", "verdict"]

#: Below this the words stop at "below 10^-12": smaller numbers tell a reader nothing more
#: and rest ever harder on the model; the exact bound stays in the JSON (log10).
FLOOR_LOG10 = -12


#: The verdict of an examination, in the same words in every command (``examine``, ``scan``,
#: ``case examine``, the demo): the mark was found, or it was not.
MARK_FOUND = "MARK FOUND"
NO_MARK = "no mark of this owner found"


def verdict(rep: dict, evaluation: dict | None = None, *, mismatch: bool | None = None) -> str:
    """An examination's verdict: "MARK FOUND, work W-..." (qualified) or :data:`NO_MARK`.

    Where the examination was evaluated (``evaluation``, by default ``rep["evaluation"]``) and
    derivation from the named work is not claimed, the verdict says so in the same line, so
    that "MARK FOUND" is never read alone as a claim: the content line found that the picture
    does not correspond to the work (``mismatch``, by default ``rep["content_mismatch"]``), or
    it could not decide.
    """
    if not rep.get("detected"):
        return NO_MARK
    who = f"work {rep['work_id']}" if rep.get("work_id") else "payload unreadable"
    said = f"{MARK_FOUND}, {who}" + ("" if rep.get("registered") else " (not in this registry)")
    ev = rep.get("evaluation") if evaluation is None else evaluation
    if not ev or ev.get("propositions") is None or ev.get("derivation_claimed"):
        return said
    if rep.get("content_mismatch") if mismatch is None else mismatch:
        return said + ", but the picture does not correspond to it: no derivation claimed"
    return said + "; the content line could not check the picture: no derivation claimed"


def probability(log10p: float) -> str:
    """A probability given by its base-10 logarithm, in words that survive copying.

    Parameters
    ----------
    log10p : float
        log10 of the probability (at most 0).

    Returns
    -------
    str
        "below 10^-12" past :data:`FLOOR_LOG10`; "3.2 x 10^-7" below 10^-3;
        a plain decimal ("0.0032", "0.5") above.
    """
    if not math.isfinite(log10p) or log10p < FLOOR_LOG10:
        return f"below 10^{FLOOR_LOG10}"
    if log10p < -3:
        e = math.floor(log10p)
        m = 10.0 ** (log10p - e)
        if round(m, 1) >= 10.0:       # 9.96 x 10^-5 rounds to 10.0: write 1.0 x 10^-4
            m, e = m / 10.0, e + 1
        return f"{m:.1f} x 10^{e}"
    return f"{10.0 ** log10p:.2g}"


def ssim(quality: dict) -> str:
    """A marked picture's SSIM as it was measured, for a line of text.

    ``quality`` holds ``ssim`` and, from a large picture, ``ssim_sampled`` and
    ``ssim_standard_error`` (a mark report or work record): "SSIM 0.9912"
    when the whole picture was measured, "SSIM 0.9960 (sampled, standard
    error 0.000082)" when it was estimated from patches.
    """
    text = f"SSIM {float(quality.get('ssim', float('nan'))):.4f}"
    se = quality.get("ssim_standard_error")
    if quality.get("ssim_sampled") and se:
        digits = max(0, 1 - math.floor(math.log10(se)))    # two significant digits, no "e"
        return f"{text} (sampled, standard error {se:.{digits}f})"
    return f"{text} (sampled)" if quality.get("ssim_sampled") else text


def _turn(geom: dict) -> tuple[float, float, float, bool]:
    return (float(geom["rotation_deg"]), float(geom["scale"]), float(geom.get("aspect", 1.0)),
            bool(geom.get("flipped")))


def geometry(geom: dict | None, *, short: bool = False) -> str:
    """What was done to a copy's geometry, in words.

    Parameters
    ----------
    geom : dict or None
        ``rotation_deg``, ``scale``, ``aspect`` (optional), ``flipped``; None
        or empty when the mark was not found.
    short : bool
        The compact table form ("+4.0° x0.800 mirrored") instead of the
        sentence form ("rotated 4.0°, scaled to 80 %, mirrored").
    """
    if not geom:
        return "not found" if short else "no geometry (mark not found)"
    rot, scale, aspect, flipped = _turn(geom)
    if short:
        # Adding 0.0 turns a rounded -0.0 into 0.0.
        parts = [f"{round(rot, 1) + 0.0:+.1f}°", f"x{scale:.3f}"]
        if abs(aspect - 1.0) >= 0.005:
            parts.append(f"aspect {aspect:.2f}")
        if flipped:
            parts.append("mirrored")
        return " ".join(parts)
    parts = []
    if abs(rot) >= 0.05:
        parts.append(f"rotated {rot:.1f}°")
    if abs(scale - 1) >= 0.005:
        parts.append(f"scaled to {100 * scale:.0f} %")
    if abs(aspect - 1) >= 0.005:
        parts.append(f"aspect changed to {aspect:.2f}")
    if flipped:
        parts.append("mirrored")
    return ", ".join(parts) if parts else "no rotation, scaling or mirroring"
