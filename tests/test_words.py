"""Probabilities and geometry in words: the exponent survives copying, the numbers stay true."""

from __future__ import annotations

import math

import pytest

from claimkit import words


@pytest.mark.parametrize("log10p,text", [
    (0.0, "1"), (-0.5, "0.32"), (-2.9, "0.0013"), (-3.2, "6.3 x 10^-4"),
    (-6.5, "3.2 x 10^-7"), (-4.99999, "1.0 x 10^-5"), (-12.0, "1.0 x 10^-12"),
    (-12.01, "below 10^-12"), (-300.0, "below 10^-12"), (-math.inf, "below 10^-12"),
])
def test_probability_words(log10p, text):
    assert words.probability(log10p) == text


def test_probability_words_never_use_e_notation_and_read_back_true():
    for i in range(0, 1300):
        lp = -i / 100
        t = words.probability(lp)
        assert "e" not in t.replace("below", "")
        if " x 10^" in t:
            m, e = t.split(" x 10^")
            # The words round the mantissa to one decimal: within half a unit of it.
            assert abs(float(m) * 10 ** int(e) - 10 ** lp) <= 0.05 * 10 ** int(e) + 1e-300


def test_geometry_words_long_and_short():
    g = {"rotation_deg": -4.04, "scale": 0.8, "aspect": 1.0, "flipped": True}
    assert words.geometry(g) == "rotated -4.0°, scaled to 80 %, mirrored"
    assert words.geometry(g, short=True) == "-4.0° x0.800 mirrored"
    assert words.geometry({"rotation_deg": -0.01, "scale": 1.0, "aspect": 1.0,
                           "flipped": False}, short=True) == "+0.0° x1.000"
    assert words.geometry(None) == "no geometry (mark not found)"
    assert words.geometry({}, short=True) == "not found"
    assert words.geometry({"rotation_deg": 0.0, "scale": 1.0, "aspect": 1.0, "flipped": False}) \
        == "no rotation, scaling or mirroring"


def test_a_found_mark_whose_derivation_is_not_claimed_says_so_in_the_verdict():
    """"MARK FOUND" is never printed alone where the evaluation withheld the derivation claim."""
    from claimkit.words import MARK_FOUND, NO_MARK, verdict

    rep = {"detected": True, "work_id": "W-X-000001", "registered": True}
    claimed = {"propositions": {"Hp": "..."}, "derivation_claimed": True}
    withheld = {"propositions": {"Hp": "..."}, "derivation_claimed": False}
    assert verdict(rep) == f"{MARK_FOUND}, work W-X-000001"
    assert verdict(rep, claimed) == f"{MARK_FOUND}, work W-X-000001"
    assert verdict({**rep, "evaluation": withheld, "content_mismatch": True}).endswith(
        ", but the picture does not correspond to it: no derivation claimed")
    assert verdict(rep, withheld, mismatch=False).endswith(
        "; the content line could not check the picture: no derivation claimed")
    assert verdict({"detected": False}, withheld) == NO_MARK


def test_ssim_says_when_it_was_sampled_and_its_standard_error():
    assert words.ssim({"ssim": 0.99123, "ssim_sampled": False, "ssim_standard_error": None}) \
        == "SSIM 0.9912"
    assert words.ssim({"ssim": 0.996, "ssim_sampled": True, "ssim_standard_error": 8.2e-05}) \
        == "SSIM 0.9960 (sampled, standard error 0.000082)"
    assert words.ssim({"ssim": 0.99, "ssim_sampled": True, "ssim_standard_error": 0.00015}) \
        == "SSIM 0.9900 (sampled, standard error 0.00015)"
    # an older work record without the error
    assert words.ssim({"ssim": 0.99, "ssim_sampled": True}) == "SSIM 0.9900 (sampled)"
