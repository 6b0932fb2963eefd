"""Likelihood-ratio arithmetic against scipy.stats, the ENFSI verbal scale, the timeline."""

from __future__ import annotations

import math

import pytest
from scipy import stats

from claimkit.evaluation import lr, opinion, timeline


@pytest.mark.parametrize(("k", "n"), [(0, 1), (0, 30), (3, 20), (17, 20), (198, 200), (0, 1326)])
def test_clopper_pearson_bounds_match_scipy_beta_quantiles(k, n):
    # Clopper & Pearson (1934): the one-sided bounds are Beta quantiles,
    # upper = Beta(0.95; k+1, n-k), lower = Beta(0.05; k, n-k+1) (scipy.stats.beta.ppf).
    up = 1.0 if k == n else stats.beta.ppf(0.95, k + 1, n - k)
    lo = 0.0 if k == 0 else stats.beta.ppf(0.05, k, n - k + 1)
    assert lr.binomial_upper(k, n) == pytest.approx(up, rel=1e-9, abs=1e-12)
    assert lr.binomial_lower(k, n) == pytest.approx(lo, rel=1e-9, abs=1e-12)
    # and the upper bound is the p at which seeing k or fewer has probability 5 % (scipy.stats.binom)
    if k < n:
        assert stats.binom.cdf(k, n, up) == pytest.approx(0.05, rel=1e-6)


def test_tail_ratio_against_scipy():
    hp = [5, 9, 12, 30, 40, 55, 80, 120, 300, 1000]
    hd = [0, 1, 1, 2, 2, 3, 3, 4, 5, 6] * 10
    # observed 40 >= threshold 10: P(S >= 10 | Hp) = 8/10, lower-bounded; P(S >= 10 | Hd) = 0/100,
    # upper-bounded (scipy.stats.beta.ppf gives both Clopper-Pearson limits).
    want = math.log10(stats.beta.ppf(0.05, 8, 3)) - math.log10(stats.beta.ppf(0.95, 1, 100))
    assert lr.log10_lr_decision(40, hp, hd, threshold=10) == pytest.approx(want, rel=1e-9)
    assert lr.log10_lr_decision(1000, hp, hd, threshold=10) == pytest.approx(want, rel=1e-9)
    # below the threshold: the event "S < 10": Hp 2/10 (upper bound), Hd 100/100 (lower bound)
    want = math.log10(stats.beta.ppf(0.95, 3, 8)) - math.log10(stats.beta.ppf(0.05, 100, 1))
    assert lr.log10_lr_decision(3, hp, hd, threshold=10) == pytest.approx(want, rel=1e-9)
    assert want < 0


def test_detection_ratio_and_cap():
    # 198 of 200 battery copies found, threshold 1e-9: lower bound / 1e-9, capped at 10^6.
    raw = math.log10(stats.beta.ppf(0.05, 198, 3)) + 9
    assert raw > lr.CAP_LOG10
    assert lr.log10_lr_detection(True, 198, 200, 1e-9) == lr.CAP_LOG10
    # threshold 0.01: below the cap
    want = math.log10(stats.beta.ppf(0.05, 198, 3)) + 2
    assert lr.log10_lr_detection(True, 198, 200, 0.01) == pytest.approx(want, rel=1e-9)
    # not found: at most 1
    miss = stats.beta.ppf(0.95, 3, 198)
    assert lr.log10_lr_detection(False, 198, 200, 1e-9) == pytest.approx(math.log10(miss), rel=1e-6)
    assert lr.combine([5.0, 2.6]) == lr.CAP_LOG10
    assert lr.combine([-5.0, -2.6]) == -lr.CAP_LOG10
    assert lr.combine([1.0, -0.5]) == pytest.approx(0.5)


# ENFSI Guideline for Evaluative Reporting in Forensic Science (2015), table of verbal
# equivalents: 1 "do not support one proposition over the other"; 2-10 weak; 10-100 moderate;
# 100-1000 moderately strong; 1000-10,000 strong; 10,000-1,000,000 very strong;
# 1,000,000 and above extremely strong.
@pytest.mark.parametrize(("value", "words"), [
    (1, "do not support one proposition over the other"), (1.5, "do not support"),
    (2, "weak support"), (9.9, "weak support"), (10, "moderate support"),
    (99, "moderate support"), (100, "moderately strong support"), (999, "moderately strong"),
    (1000, "provide strong support"), (9999, "provide strong support"),
    (10000, "very strong support"), (999999, "very strong support"),
    (1e6, "extremely strong support"), (1e9, "extremely strong support"),
])
def test_verbal_scale_is_the_enfsi_table(value, words):
    text = lr.verbal(math.log10(value), "Hp", "Hd")
    assert words in text
    if value >= 2:
        assert text.endswith("for Hp rather than Hd.")
    # below 1 the same band, for the alternative
    if value >= 2:
        assert lr.verbal(-math.log10(value), "Hp", "Hd").endswith("for Hd rather than Hp.")
        assert words in lr.verbal(-math.log10(value), "Hp", "Hd")


def _content(corresponds, log10_lr, limited=False):
    return {"corresponds": corresponds, "log10_lr": log10_lr, "basis": "registered marked file",
            "limited_to_fingerprint": limited}


def test_opinion_combines_only_consistent_lines():
    ok = opinion.evaluate(exhibit="Exhibit 1", work_id="W-1", owner="Ilse Marrow", detected=True,
                          threshold=1e-9, content=_content(True, 2.6), agreement={"agree": True})
    assert ok["log10_lr"]["combined"] == lr.CAP_LOG10 and ok["derivation_claimed"]
    assert "extremely strong support for the proposition that Exhibit 1 derives" in ok["verbal"]
    bad = opinion.evaluate(exhibit="Exhibit 2", work_id="W-1", owner="Ilse Marrow", detected=True,
                           threshold=1e-9, content=_content(False, -1.2), agreement=None)
    assert bad["log10_lr"]["combined"] is None and not bad["derivation_claimed"]
    assert bad["reported_log10_lr"] == -1.2 and "rather than the proposition that Exhibit 2 derives" \
        in bad["verbal"]
    assert "transplanted" in bad["combination"]
    assert "transplanted" in opinion.finding_words(detected=True, work_id="W-1",
                                                   content_mismatch=True, limited=False)
    odd = opinion.evaluate(exhibit="Exhibit 3", work_id="W-1", owner=None, detected=True,
                           threshold=1e-9, content=_content(True, 2.6), agreement={"agree": False})
    assert odd["log10_lr"]["combined"] is None and odd["reported_log10_lr"] == 2.6


def test_a_disagreement_between_the_lines_is_always_warned_of():
    # The lines reading different geometries: the weaker line is reported and derivation is
    # still claimed, so the report must show `lines-disagree` beside it (bench_content_heldout.py
    # counts a disagreement as silent only where no warning is shown).
    from claimkit.evaluation.lines import content_warnings

    odd = {**_content(True, 2.6),
           "agreement_with_mark": {"compared": True, "agree": False}}
    ev = opinion.evaluate(exhibit="Exhibit 3", work_id="W-1", owner=None, detected=True,
                          threshold=1e-9, content=odd, agreement=odd["agreement_with_mark"])
    assert ev["derivation_claimed"]
    assert content_warnings(detected=True, content=odd, content_mismatch=False) == ["lines-disagree"]
    same = {**odd, "agreement_with_mark": {"compared": True, "agree": True}}
    assert content_warnings(detected=True, content=same, content_mismatch=False) == []
    assert content_warnings(detected=True, content=_content(False, -1.2),
                            content_mismatch=True) == ["content-mismatch"]
    assert content_warnings(detected=True, content=_content(None, 0.0),
                            content_mismatch=False) == ["content-inconclusive"]


def test_decision_counts_ratio_against_scipy():
    # A rule on two readings: its counts, not one statistic's samples. Reached: Hp 265 of 272
    # (Clopper-Pearson lower, scipy.stats.beta.ppf), Hd at most 1 of 1278 (upper).
    want = math.log10(stats.beta.ppf(0.05, 265, 8)) - math.log10(stats.beta.ppf(0.95, 2, 1277))
    assert lr.log10_lr_counts(True, 265, 272, 1, 1278) == pytest.approx(want, rel=1e-9)
    # not reached: Hp 7 of 272 (upper), Hd 1277 of 1278 (lower)
    want = math.log10(stats.beta.ppf(0.95, 8, 265)) - math.log10(stats.beta.ppf(0.05, 1277, 2))
    assert lr.log10_lr_counts(False, 265, 272, 1, 1278) == pytest.approx(want, rel=1e-9)


@pytest.mark.parametrize(("fmt", "found"), [("claimkit-mark/3", 233), ("claimkit-mark/2", 235),
                                            ("claimkit-mark/1", 233), (None, 233)])
def test_mark_line_uses_the_measured_rate_of_the_findings_format(fmt, found):
    # The robustness battery's rate under Hp for the format the finding rests on (format 1 and
    # an unknown format: the lowest rate measured); threshold 0.01 keeps it below the cap.
    ev = opinion.evaluate(exhibit="Exhibit 1", work_id="W-1", owner=None, detected=True,
                          threshold=0.01, content=_content(True, 2.6), agreement={"agree": True},
                          mark_format=fmt)
    assert ev["lines"]["mark"]["under_hp"]["detected"] == found
    assert ev["lines"]["mark"]["under_hp"]["trials"] == 264
    want = math.log10(stats.beta.ppf(0.05, found, 264 - found + 1)) + 2
    assert ev["log10_lr"]["mark"] == pytest.approx(want, abs=1e-3)
    # a case's own battery of the registered file comes first, whatever the format
    rows = [{"attack": "none", "detected": True}] + [{"attack": f"a{i}", "detected": i < 9,
                                                      "same_payload": True} for i in range(10)]
    ev = opinion.evaluate(exhibit="Exhibit 1", work_id="W-1", owner=None, detected=True,
                          threshold=0.01, content=_content(True, 2.6), agreement={"agree": True},
                          robustness={"rows": rows}, mark_format=fmt)
    assert (ev["lines"]["mark"]["under_hp"]["detected"], ev["lines"]["mark"]["under_hp"]["trials"]) \
        == (9, 10)


def test_no_opinion_where_the_content_line_cannot_check_the_mark():
    # The mark found, the content line undecided (or absent): the mark alone cannot exclude a
    # transplanted mark, so no ratio is reported as the opinion and no derivation is claimed;
    # the mark line's own ratio stays listed.
    for content in ({**_content(None, 0.0), "cannot_decide": "the work has too little texture"},
                    {"basis": "none", "corresponds": None, "log10_lr": 0.0,
                     "limited_to_fingerprint": False}):
        ev = opinion.evaluate(exhibit="Exhibit 1", work_id="W-1", owner=None, detected=True,
                              threshold=1e-9, content=content, agreement=None)
        assert ev["reported_log10_lr"] is None and not ev["derivation_claimed"]
        assert ev["verbal"].startswith("No opinion on the propositions is given")
        assert "support" not in ev["verbal"] and ev["log10_lr"]["mark"] == lr.CAP_LOG10
    # not found, undecided: the mark line's "not found" is reported (it favours Hd or nothing)
    ev = opinion.evaluate(exhibit="Exhibit 1", work_id="W-1", owner=None, detected=False,
                          threshold=1e-9, content=_content(None, 0.0), agreement=None)
    assert ev["reported_log10_lr"] is not None and ev["reported_log10_lr"] <= 0


def _works(stamped=True, day="2026-11-20"):
    return [{"work_id": "W-1", "registered": {"time": f"{day}T09:00:00Z", "time_source": "system clock"},
             "timestamps": [{"gen_time": f"{day}T09:01:00Z", "tsa": "Test TSA", "token_id": "T-1"}]
             if stamped else [], "capture": {"DateTimeOriginal": "2026:10:02 08:15:00"}}]


def _exhibit(found):
    return [{"exhibit_id": "E01", "label": "Exhibit 1",
             "found": {"when": f"{found}, shop page", "time_source": "stated by Ilse Marrow"},
             "taken_in": {"time": "2026-12-01T10:00:00Z", "time_source": "system clock"}}]


def test_timeline_in_order_has_no_warning():
    t = timeline.build_timeline(_works(), _exhibit("2026-11-28"), {"E01": "W-1"})
    assert t["warnings"] == []
    days = [e["day"] for e in t["events"]]
    assert days == sorted(days)
    assert [e["source"] for e in t["events"]][:3] == ["file metadata", "system clock",
                                                       "timestamp authority (Test TSA)"]


def test_timeline_found_before_registration_warns():
    t = timeline.build_timeline(_works(day="2026-12-01"), _exhibit("2026-11-28"), {"E01": "W-1"})
    assert [w["code"] for w in t["warnings"]] == ["registered-after-found"]
    assert t["warnings"][0]["exhibit"] == "E01" and "2026-11-28" in t["warnings"][0]["text"]


def test_timeline_not_timestamped_and_mismatch():
    t = timeline.build_timeline(_works(stamped=False), _exhibit("2026-11-28"), {"E01": "W-1"},
                                {"E01": True})
    assert sorted(w["code"] for w in t["warnings"]) == ["content-mismatch", "not-timestamped"]
    assert "priority" in t["priority"]


def test_timeline_same_day_says_the_order_is_not_known():
    # Found on the day of registration, stated to the day only: no warning (not an earlier
    # day), but the dossier must not imply an order it cannot know.
    t = timeline.build_timeline(_works(day="2026-11-28"), _exhibit("2026-11-28"), {"E01": "W-1"})
    assert t["warnings"] == []
    assert len(t["notes"]) == 1 and "Exhibit 1 found is dated to the day only (2026-11-28)" \
        in t["notes"][0] and "work W-1 registered" in t["notes"][0]
    assert timeline.build_timeline(_works(), _exhibit("2026-11-28"), {"E01": "W-1"})["notes"] == []


def test_a_label_that_opens_a_sentence_reads_in_lower_case_inside_the_opinion():
    """`examine` labels a file "The file x.jpg": Hp opens with it, the opinion quotes it mid-sentence."""
    ev = opinion.evaluate(exhibit="The file x.jpg", work_id="W-1", owner=None, detected=True,
                          threshold=1e-9, content=_content(True, 2.6), agreement={"agree": True})
    assert ev["propositions"]["Hp"].startswith("The file x.jpg derives")
    assert "the proposition that the file x.jpg derives from work W-1" in ev["verbal"]
    assert "The file" not in ev["verbal"][1:]


def test_the_bisection_stops_where_it_stands_still_with_the_same_bits():
    # binomial_upper leaves its bisection once a step moves neither end (every later step
    # would repeat it): the bits of the full 200 steps, checked here against that loop
    # written out (and the bounds against scipy above).
    def full_loop(k, n, confidence=lr.CONFIDENCE):
        lo, hi = k / n, 1.0
        for _ in range(200):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if lr._binom_cdf(k, n, mid) > 1.0 - confidence else (lo, mid)
        return 0.5 * (lo + hi)

    for n in (1, 7, 30, 189, 264, 1326):
        for k in sorted({0, 1, n // 3, n // 2, n - 1}):
            for confidence in (lr.CONFIDENCE, 0.99):
                assert lr.binomial_upper(k, n, confidence) == full_loop(k, n, confidence), (k, n)


def test_the_dense_reading_ratio_sums_the_two_null_bounds():
    # Where the dense reading decides, the content line's ratio is its genuine rate's lower bound
    # over the sum of the upper bounds of the keypoint readings' null and of its own (both
    # Clopper-Pearson, from scipy.stats.beta.ppf here), capped; the counts are the stored ones.
    from claimkit.content.assess import _either, _with_dense, calibration

    cal = calibration()
    either = _either(cal)
    got = _with_dense(either, cal["dense"])
    kd = sum(1 for v in cal["dense"]["null"]["samples"] if v >= cal["dense"]["threshold"])
    nd = cal["dense"]["null"]["count"]
    ke, ne = either["null"]["reaching_threshold"], either["null"]["count"]
    bound = stats.beta.ppf(0.95, ke + 1, ne - ke) + stats.beta.ppf(0.95, kd + 1, nd - kd)
    g = cal["dense"]["genuine"]
    num = stats.beta.ppf(0.05, g["reaching"], g["count"] - g["reaching"] + 1)
    assert got["null"]["rate_upper_95"] == pytest.approx(bound, abs=1e-6)
    assert got["log10_lr"] == pytest.approx(min(6.0, math.log10(num / bound)), abs=1e-3)
    assert got["null"]["count"] == ne + nd and got["genuine"]["reaching_threshold"] == g["reaching"]
