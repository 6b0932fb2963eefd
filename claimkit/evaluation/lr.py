"""Likelihood-ratio arithmetic and the ENFSI verbal scale (pure functions on numbers).

A likelihood ratio compares the probability of the findings under two
propositions, ``LR = P(E | Hp) / P(E | Hd)`` [1]_. Each line of evidence here
reports the ratio for an *event* it observed (the mark was found; the content
statistic reached its threshold), with both probabilities taken
from measured frequencies. Frequencies from a finite calibration set are
replaced by the one-sided 95 % Clopper-Pearson bound [2]_ that moves the ratio
towards 1, so that a ratio never rests on an estimate of zero: the numerator
by its lower bound, the denominator by its upper bound (and the reverse when
the findings favour the alternative). Every ratio is capped at
:data:`CAP_LOG10` in either direction.

The verbal equivalents are those of the ENFSI Guideline for Evaluative
Reporting in Forensic Science (2015) [1]_, its table of verbal equivalents
for likelihood ratios, applied symmetrically to values below 1.

References
----------
.. [1] European Network of Forensic Science Institutes, "ENFSI Guideline for
   Evaluative Reporting in Forensic Science", approved 8 March 2015.
.. [2] C. J. Clopper, E. S. Pearson, "The use of confidence or fiducial
   limits illustrated in the case of the binomial", Biometrika 26(4),
   404-413, 1934. doi:10.1093/biomet/26.4.404
"""

from __future__ import annotations

import math
from collections.abc import Sequence

__all__ = [
    "CAP_LOG10",
    "CONFIDENCE",
    "ENFSI_SCALE",
    "binomial_lower",
    "binomial_upper",
    "cap",
    "combine",
    "log10_lr_counts",
    "log10_lr_decision",
    "log10_lr_detection",
    "verbal",
]

#: No ratio above 10^6 (or below 10^-6) is reported: beyond it a figure would
#: rest on the tails of models and on calibration sets of hundreds of
#: pictures, not on measurements. 10^6 is where the ENFSI scale's top band begins.
CAP_LOG10 = 6.0
#: One-sided confidence of the bounds that replace measured frequencies.
CONFIDENCE = 0.95

#: ENFSI Guideline for Evaluative Reporting (2015), table of verbal equivalents:
#: (lowest LR of the band, support wording). A band reaches up to the next one's start.
ENFSI_SCALE: tuple[tuple[float, str], ...] = (
    (1.0, "do not support one proposition over the other"),
    (2.0, "provide weak support"),
    (10.0, "provide moderate support"),
    (100.0, "provide moderately strong support"),
    (1000.0, "provide strong support"),
    (10000.0, "provide very strong support"),
    (1000000.0, "provide extremely strong support"),
)


def _binom_cdf(k: int, n: int, p: float) -> float:
    """P(X <= k) for X ~ Binomial(n, p), by summing the terms in log space."""
    if p <= 0.0:
        return 1.0
    if p >= 1.0:
        return 1.0 if k >= n else 0.0
    lp, lq = math.log(p), math.log1p(-p)
    terms = [math.lgamma(n + 1) - math.lgamma(i + 1) - math.lgamma(n - i + 1) + i * lp + (n - i) * lq
             for i in range(k + 1)]
    top = max(terms)
    return min(1.0, math.exp(top) * sum(math.exp(t - top) for t in terms))


def binomial_upper(k: int, n: int, confidence: float = CONFIDENCE) -> float:
    """One-sided Clopper-Pearson upper bound on a rate seen ``k`` times in ``n`` trials.

    The ``p`` with ``P(X <= k | p) = 1 - confidence`` (1 when ``k == n``),
    found by bisection on the binomial distribution function.
    """
    if not 0 <= k <= n or n <= 0:
        raise ValueError(f"need 0 <= k <= n and n > 0, got k={k}, n={n}")
    if k == n:
        return 1.0
    alpha = 1.0 - confidence
    lo, hi = k / n, 1.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if _binom_cdf(k, n, mid) > alpha:
            if mid == lo:     # nothing moves any more: every later step repeats this one
                break
            lo = mid
        else:
            if mid == hi:
                break
            hi = mid
    return 0.5 * (lo + hi)


def binomial_lower(k: int, n: int, confidence: float = CONFIDENCE) -> float:
    """One-sided Clopper-Pearson lower bound (0 when ``k == 0``)."""
    if not 0 <= k <= n or n <= 0:
        raise ValueError(f"need 0 <= k <= n and n > 0, got k={k}, n={n}")
    return 0.0 if k == 0 else 1.0 - binomial_upper(n - k, n, confidence)


def cap(log10_lr: float, limit: float = CAP_LOG10) -> float:
    """``log10_lr`` limited to ``[-limit, limit]``."""
    return max(-limit, min(limit, float(log10_lr)))


def _ratio(p_hp: tuple[int, int], p_hd: tuple[int, int]) -> float:
    """log10 of (k1/n1) / (k2/n2), each frequency bounded towards a ratio of 1."""
    k1, n1 = p_hp
    k2, n2 = p_hd
    point_up = (k1 / n1) >= (k2 / n2)
    if point_up:     # findings favour Hp: shrink the numerator, grow the denominator
        num, den = binomial_lower(k1, n1), binomial_upper(k2, n2)
        if num <= den:
            return 0.0
    else:            # findings favour Hd: grow the numerator, shrink the denominator
        num, den = binomial_upper(k1, n1), binomial_lower(k2, n2)
        if den <= num:
            return 0.0
    return math.log10(num) - math.log10(den)


def log10_lr_decision(observed: float, hp_samples: Sequence[float], hd_samples: Sequence[float],
                      *, threshold: float) -> float:
    """log10 LR of a decision: the statistic at or above ``threshold``, or below it.

    Parameters
    ----------
    observed : float
        The statistic measured on the exhibit.
    hp_samples, hd_samples : sequence of float
        The statistic measured where Hp is true (genuine copies) and where Hd
        is true (unrelated pictures).
    threshold : float
        The decision point, fixed before the exhibit was seen.

    Returns
    -------
    float
        Capped log10 likelihood ratio of the event the observation falls in,
        ``S >= threshold`` or ``S < threshold``; frequencies bounded as the
        module says.

    Notes
    -----
    The event, not the exact value, is weighed: the ratio of ``S >= s`` for an
    ``s`` far above every calibration sample would rest on no measurement at
    all under either proposition, while the decision's frequencies are
    measured on both sides. This gives up some strength and keeps every
    number measured.
    """
    hp, hd = list(hp_samples), list(hd_samples)
    if not hp or not hd:
        raise ValueError("both calibration samples are needed")
    if observed >= threshold:
        k1 = sum(1 for v in hp if v >= threshold)
        k2 = sum(1 for v in hd if v >= threshold)
    else:
        k1 = sum(1 for v in hp if v < threshold)
        k2 = sum(1 for v in hd if v < threshold)
    return cap(_ratio((k1, len(hp)), (k2, len(hd))))


def log10_lr_counts(reached: bool, hp_reaching: int, hp_count: int, hd_reaching: int,
                    hd_count: int) -> float:
    """log10 LR of a decision given the counts that reached it under each proposition.

    As :func:`log10_lr_decision`, for a decision whose counts are known but not as one
    statistic's samples (a rule on two statistics): the event is "reached" or "not reached",
    and each frequency is bounded as the module says.
    """
    if reached:
        return cap(_ratio((hp_reaching, hp_count), (hd_reaching, hd_count)))
    return cap(_ratio((hp_count - hp_reaching, hp_count), (hd_count - hd_reaching, hd_count)))


def log10_lr_detection(found: bool, detected: int, trials: int, threshold: float) -> float:
    """log10 LR of the mark line: the event "mark found" (or "not found").

    Parameters
    ----------
    found : bool
        Whether the examination found the mark at ``threshold``.
    detected, trials : int
        How many of ``trials`` marked copies in the robustness battery were found.
    threshold : float
        The false-alarm level at which "found" is declared: under the
        alternative (a picture that never carried the mark) the chance of
        "found" is at most this, whatever the picture (the bound is over the
        choice of key).

    Returns
    -------
    float
        Capped log10 LR. Found: ``lower(detected/trials) / threshold``. Not
        found: ``upper(missed/trials) / (1 - threshold)``, at most 1.
    """
    if not 0.0 < threshold < 1.0:
        raise ValueError(f"threshold must be in (0, 1), got {threshold}")
    if found:
        num = binomial_lower(detected, trials)
        if num <= 0.0:
            return 0.0
        return cap(math.log10(num) - math.log10(threshold))
    miss = binomial_upper(trials - detected, trials)
    return cap(min(0.0, math.log10(miss) - math.log10(1.0 - threshold)))


def combine(log10_lrs: Sequence[float]) -> float:
    """Product of independent lines' ratios (sum of log10), capped."""
    return cap(sum(float(v) for v in log10_lrs))


def verbal(log10_lr: float, hp: str = "the first proposition",
           hd: str = "the alternative") -> str:
    """The ENFSI (2015) verbal equivalent of a likelihood ratio.

    Values below 1 are worded with the propositions exchanged, as the guideline
    does: an LR of 1/50 gives moderate support to the alternative.
    """
    lr = 10.0 ** abs(float(log10_lr))
    if lr < 2.0:
        return f"The findings {ENFSI_SCALE[0][1]}."
    wording = next(w for lo, w in reversed(ENFSI_SCALE) if lr >= lo * (1 - 1e-12))
    first, second = (hp, hd) if log10_lr > 0 else (hd, hp)
    return f"The findings {wording} for {first} rather than {second}."
