"""A format-3 disclosure, made through the profile and read from its folder as the other
side's expert reads it: it reads the claim of its own work's family and of no other family,
and another owner's disclosure finds nothing in this owner's works."""

from __future__ import annotations

import numpy as np
import pytest
from engine_helpers import photos
from PIL import Image

from claimkit import workflow
from claimkit.evidence.disclose import check_disclosure
from claimkit.evidence.keys import format3_family_of
from claimkit.evidence.profile import Profile
from claimkit.imageio import read_picture
from claimkit.mark import payload

pytestmark = pytest.mark.slow


def _mark_until_two_families(profile, tmp_path) -> list[tuple]:
    """Mark scikit-image photos until two works sit in different families: [(family, path, work)]."""
    by_family: dict[int, tuple] = {}
    secret = profile._need_secrets().marking_secret
    for name in ("coffee", "chelsea", "rocket", "sky"):
        src = tmp_path / f"{name}.png"
        Image.fromarray(photos()[name]).save(src)
        rep = workflow.mark_file(profile, src, tmp_path / f"{name}-marked.png", mark_format=3)
        work = profile.work(rep["work_id"])
        assert work.record["mark_params"]["format"] == "claimkit-mark/3"
        by_family.setdefault(format3_family_of(secret, work.serial),
                             (tmp_path / f"{name}-marked.png", work))
        if len(by_family) == 2:
            return [(f, *v) for f, v in by_family.items()]
    pytest.skip("every photo fell in one family")


def _examine_with(chk, path, bits, owner_tag):
    """Examine with exactly the keys verify would build from this disclosure."""
    from claimkit.verify.checks import _keys_of

    keys = _keys_of(chk)[0]
    return workflow.examine_picture(read_picture(path), keys, owner_tag=owner_tag,
                                    payload_check=lambda b: np.array_equal(b, bits))


def test_format3_disclosure_reads_its_family_and_no_other(profile, tmp_path):
    (fa, path_a, work_a), (fb, path_b, work_b) = _mark_until_two_families(profile, tmp_path)
    out = tmp_path / "disclosure-a"
    profile.disclose(work_a.work_id, out)
    chk = check_disclosure(out)
    assert chk.ok, chk.problems
    assert chk.mark_format == "claimkit-mark/3" and f"family {fa}" in chk.scope
    # No seed of the other work's family travels.
    other_seed = profile.format3_disclosure_keys(work_b.serial)["families"][fb]
    assert other_seed.hex().encode() not in (out / "disclosure.json").read_bytes()
    bits_a = payload.pack(profile.owner_tag, work_a.serial, profile.payload_tag(work_a.serial))
    bits_b = payload.pack(profile.owner_tag, work_b.serial, profile.payload_tag(work_b.serial))
    own = _examine_with(chk, path_a, bits_a, profile.owner_tag)
    assert own.detected and own.payload_valid          # the control: its own work is read
    other = _examine_with(chk, path_b, bits_b, profile.owner_tag)
    assert not other.detected and not other.payload_valid


def test_second_owners_format3_disclosure_finds_nothing(profile, tmp_path):
    works = _mark_until_two_families(profile, tmp_path)
    second = Profile.create(tmp_path / "second", "Second Owner", b"second-passphrase")
    try:
        src = tmp_path / "second.png"
        Image.fromarray(photos()["chelsea"]).save(src)
        rep = workflow.mark_file(second, src, tmp_path / "second-marked.png", mark_format=3)
        out = tmp_path / "second-disclosure"
        second.disclose(rep["work_id"], out)
        chk = check_disclosure(out)
        assert chk.ok, chk.problems
        for _fam, path, work in works:
            bits = payload.pack(profile.owner_tag, work.serial, profile.payload_tag(work.serial))
            f = _examine_with(chk, path, bits, second.owner_tag)
            assert not f.detected and not f.payload_valid
    finally:
        second.close()


@pytest.mark.parametrize("fmt", [3, 2])
def test_the_case_battery_runs_with_the_keys_verify_re_runs_it_with(profile, tmp_path,
                                                                     monkeypatch, fmt):
    """The robustness battery of a case is re-run by verify from the work's disclosure. A copy
    where the mark is missed reports the best bound the keys allow, so run with the owner's 16
    families that number did not re-run from one family (seen: a missed row stored 10^-0.485,
    re-run 1.0). The battery must get exactly the keys verify builds from the disclosure."""
    from claimkit.case import examine as case_examine
    from claimkit.verify.checks import _keys_of

    src = tmp_path / "cup.png"
    Image.fromarray(photos()["coffee"]).save(src)
    rep = workflow.mark_file(profile, src, tmp_path / "cup-marked.png", mark_format=fmt)
    out = tmp_path / "disclosure"
    profile.disclose(rep["work_id"], out)
    expected = _keys_of(check_disclosure(out))[0]
    seen = []
    monkeypatch.setattr(case_examine, "run_battery", lambda px, keys, *a, **k: seen.append(keys) or [])
    case_examine._robustness(profile, rep["work_id"], tmp_path / "cup-marked.png")
    assert seen == [expected]
    if fmt == 3:
        assert len(seen[0].families) == 1 and seen[0].legacy is None   # not the owner's 16
