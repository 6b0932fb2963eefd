"""False-alarm arithmetic, all in one place: null variance, tail bound, hypothesis and payload counts.

Why the bound holds for any picture, textured ones included: every score the
detector computes is a fixed linear functional of the folded, whitened copy
(which does not depend on the key) against the carrier. The carrier's phase
at each frequency pair is uniform on the circle and independent of every
other pair, of every other carrier (format 3 draws one per tile class and
family) and of the spot positions. A score is therefore a sum of independent
terms ``a_k cos(theta_k + phi_k)`` whose variance is ``a_k^2 / 2``; the exact
null variance is the sum of these (what :mod:`claimkit.mark.detect` and
:mod:`claimkit.mark.format3` compute for each score).

The tail: ``E exp(l a cos theta) = I_0(l a)``, and the power series of the
modified Bessel function [1]_ gives ``I_0(x) = sum_k (x^2/4)^k / (k!)^2 <=
sum_k (x^2/4)^k / k! = exp(x^2 / 4)``. So each term is sub-Gaussian with
variance proxy equal to its variance ``a^2 / 2`` [2]_, and for the
standardised score ``z``::

    P(z >= t) <= exp(-t^2 / 2)      for every t >= 0,

over the choice of key, whatever the unmarked picture is. (Hoeffding's lemma
[3]_ for a term bounded by ``|a|`` gives only the variance proxy ``a^2``,
twice as large, and the weaker ``exp(-t^2 / 4)``; the Bessel argument is the
one used here.) With ``H`` hypotheses searched, the union bound gives
``P_fa <= H exp(-t^2 / 2)``, more conservative than the Gaussian tail by a
factor of about ``t sqrt(2 pi)``.

Hypotheses, format by format (every one counted whether or not it is tried):

* formats 1 and 2 (one pilot search, shared): ``geometries x 8
  quarter-turn/mirror variants x 4 half-pixel phases x T^2 shifts``;
* format 3's claim, tested at the ``placements`` best placements of the
  synchronisation search (the placement is chosen with the sync seed, which
  is independent of the family seeds, so the claim's null distribution given
  the placement is the one above): ``placements x families x MACRO^2 macro
  offsets``.

Each test also counts the payloads its decoder could have accepted (every
valid payload of every format it reads), and a finding that reports the
better of several tests pays a factor equal to their number.

References
----------
.. [1] M. Abramowitz, I. A. Stegun, *Handbook of Mathematical Functions*,
   National Bureau of Standards, 1964, eq. 9.6.10 (series of I_0).
.. [2] R. Vershynin, *High-Dimensional Probability*, Cambridge University
   Press, 2018, sec. 2.5 (sub-Gaussian variables and their tails).
.. [3] W. Hoeffding, "Probability inequalities for sums of bounded random
   variables", J. Amer. Statist. Assoc. 58(301), 13-30, 1963.
   doi:10.1080/01621459.1963.10500830
"""

from __future__ import annotations

import math

LN10 = math.log(10.0)
# Largest false-alarm bound called "detected" by default. It lives here, in a module that
# needs no NumPy or SciPy, so that the command line can show it without loading either.
DEFAULT_THRESHOLD = 1e-9
FLOOR_LOG10 = -300.0   # JSON cannot carry smaller floats; the log10 is reported too


def log10_tail_bound(z: float) -> float:
    """log10 of the sub-Gaussian tail bound ``exp(-z^2/2)`` (0 for z <= 0).

    Parameters
    ----------
    z : float
        A score in units of its exact null standard deviation.

    Returns
    -------
    float
        ``-z^2 / (2 ln 10)``, or 0 when ``z <= 0``.
    """
    if z <= 0:
        return 0.0
    return -(z * z) / (2.0 * LN10)


def legacy_hypotheses(*, geometries: int, dihedral: int, phases: int, tile: int) -> int:
    """Placements of the pilot search shared by formats 1 and 2 (and format 3's synchronisation).

    Parameters
    ----------
    geometries : int
        Geometric hypotheses: the unwarped fold and every lattice candidate
        the search may return (counted whether found or not).
    dihedral : int
        Quarter-turn/mirror variants tried (8).
    phases : int
        Half-pixel phases tried (4).
    tile : int
        Tile side; every cyclic shift is tried, ``tile**2`` of them.

    Returns
    -------
    int
    """
    return geometries * dihedral * phases * tile * tile


def format3_hypotheses(*, placements: int, families: int, macro: int) -> int:
    """Hypotheses of format 3's claim test.

    Parameters
    ----------
    placements : int
        Synchronisation placements at which the claim is tested.
    families : int
        Families of the format (all counted, even by a disclosure holder
        who holds one family seed).
    macro : int
        Tiles per side of the macro-cell; ``macro**2`` offsets are tried.

    Returns
    -------
    int
    """
    return placements * families * macro * macro


def log10_false_alarm(*, z_pilot: float, z_full: float | None, hypotheses: int,
                      payload_space: int) -> float:
    """log10 of the false-alarm bound of one test (pilot score, then full template).

    Parameters
    ----------
    z_pilot : float
        The pilot score (fixed signs), the best of ``hypotheses`` placements.
    z_full : float or None
        The full-template score for the decoded payload; ``None`` when no
        valid payload was decoded.
    hypotheses : int
        Placements searched.
    payload_space : int
        Payloads the decoder could have accepted.

    Returns
    -------
    float
        ``log10(2 min(H e^{-z_p^2/2}, H P e^{-z_f^2/2}))``, at most 0.

    Notes
    -----
    Two scores are combined, so the smaller of their bounds is doubled.
    """
    lh = math.log10(hypotheses)
    best = lh + log10_tail_bound(z_pilot)
    if z_full is not None:
        best = min(best, lh + math.log10(payload_space) + log10_tail_bound(z_full))
    return min(0.0, math.log10(2.0) + best)


def log10_best_of(*, bounds: list[float]) -> float:
    """The bound of reporting the best of several tests: their number times the smallest bound.

    Parameters
    ----------
    bounds : list of float
        log10 bounds of the tests run (format 1-2 reading, format 3 reading).

    Returns
    -------
    float
        ``log10(len(bounds)) + min(bounds)``, at most 0.
    """
    if not bounds:
        return 0.0
    return min(0.0, math.log10(len(bounds)) + min(bounds))


def as_probability(log10p: float) -> float:
    """The bound as a float, never rounded to zero (floored at 1e-300)."""
    return 10.0 ** max(log10p, FLOOR_LOG10)


def describe(log10p: float) -> str:
    """Readable form: 'below 1e-12' where the bound is that small."""
    if log10p < -12:
        return "below 1e-12"
    return f"{10.0 ** log10p:.2g}"
