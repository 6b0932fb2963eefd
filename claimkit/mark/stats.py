"""Detection statistics: an exact null variance and a sub-Gaussian tail bound.

Why the bound holds for any picture, textured ones included: every score the
detector computes is a fixed linear functional of the folded, whitened copy
(which does not depend on the key) against the carrier. The carrier's phase
at each frequency pair is uniform on the circle and independent of every
other pair and of the spot positions. A score is therefore a sum of
independent terms ``a_k cos(theta_k + phi_k)``. Since ``E exp(l cos theta) =
I_0(l) <= exp(l^2 / 4)``, each term is sub-Gaussian with variance proxy equal
to its variance, so for the standardised score ``z``::

    P(z >= t) <= exp(-t^2 / 2)      for every t >= 0,

over the choice of key, whatever the unmarked picture is. With ``H``
hypotheses searched (geometries, mirror and quarter turns, sub-pixel phases,
shifts, payloads), the union bound gives ``P_fa <= H exp(-t^2 / 2)``. This is
more conservative than the Gaussian tail by a factor of about
``t * sqrt(2 pi)``.

References
----------
.. [1] W. Hoeffding, "Probability inequalities for sums of bounded random
   variables", J. Amer. Statist. Assoc. 58(301), 13-30, 1963.
   doi:10.1080/01621459.1963.10500830
.. [2] R. Vershynin, *High-Dimensional Probability*, Cambridge University
   Press, 2018, sec. 2.5 (sub-Gaussian variables and their tails).
"""

from __future__ import annotations

import math

LN10 = math.log(10.0)
# Largest false-alarm bound called "detected" by default. It lives here, in a module that
# needs no NumPy or SciPy, so that the command line can show it without loading either.
DEFAULT_THRESHOLD = 1e-9
FLOOR_LOG10 = -300.0   # JSON cannot carry smaller floats; the log10 is reported too


def log10_tail_bound(z: float) -> float:
    """log10 of the sub-Gaussian tail bound ``exp(-z^2/2)`` (0 for z <= 0)."""
    if z <= 0:
        return 0.0
    return -(z * z) / (2.0 * LN10)


def log10_false_alarm(z_pilot: float, z_full: float | None, hypotheses: int,
                      payload_space: int) -> float:
    """log10 of the false-alarm bound for one examination.

    Two tests are combined, so the smaller of their bounds is doubled:

    * the pilot score (fixed signs), over ``hypotheses`` placements;
    * the full-template score for the decoded payload, over ``hypotheses``
      placements times ``payload_space`` payloads the decoder could have
      chosen (``None`` when no valid payload was decoded).
    """
    lh = math.log10(hypotheses)
    pilot = lh + log10_tail_bound(z_pilot)
    best = pilot
    if z_full is not None:
        best = min(best, lh + math.log10(payload_space) + log10_tail_bound(z_full))
    return min(0.0, math.log10(2.0) + best)


def as_probability(log10p: float) -> float:
    """The bound as a float, never rounded to zero (floored at 1e-300)."""
    return 10.0 ** max(log10p, FLOOR_LOG10)


def describe(log10p: float) -> str:
    """Readable form: 'below 1e-12' where the bound is that small."""
    if log10p < -12:
        return "below 1e-12"
    return f"{10.0 ** log10p:.2g}"
