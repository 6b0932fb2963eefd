"""Mark format 3 against the attacks that broke formats 1 and 2, with the attacker written in numpy only.

The attacks follow the published estimation attacks: the copy attack of
M. Kutter, S. Voloshynovskiy, A. Herrigel, "The watermark copy attack",
Proc. SPIE 3971, 2000 (estimate the mark from a marked photo, add it to
another), and the estimation-based removal of S. Voloshynovskiy et al.,
"Attacks on digital watermarks: classification, estimation-based attacks and
benchmarks", IEEE Communications Magazine 39(8), 2001 (denoise, average the
residual over the mark's period, subtract). No claimkit code is used to
make them: the attacker knows the method, not the key.
"""

from __future__ import annotations

import hashlib
import hmac
import io

import numpy as np
import pytest
from PIL import Image
from skimage import data

from claimkit.evidence import keys as prof
from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import detect, embed, format3, formats, geometry, scales
from claimkit.mark.format3 import EmbedKeys, MarkKeys
from claimkit.mark.payload import PayloadList
from tests.engine_helpers import (
    SEED,
    add,
    fold_estimate,
    lanczos,
    landscape,
    payload,
    photos,
    psnr,
    residual,
    tiled,
)
from tests.test_evidence_vectors import _hkdf_sha256

SECRET = bytes(range(7, 39))
KEYS = prof.format3_keys(SECRET)
ALL = MarkKeys(legacy=prof.derive_detection_seed(SECRET), sync=KEYS["sync"], families=KEYS["families"])


def embed_keys(serial: int) -> EmbedKeys:
    k = prof.format3_keys(SECRET, serial=serial)
    return EmbedKeys(sync=k["sync"], family=k["family"], family_seed=k["families"][k["family"]])


def mark3(rgb: np.ndarray, serial: int) -> np.ndarray:
    return add_luma_delta(rgb, embed.mark_delta(to_luma(rgb), embed_keys(serial), payload(serial)))


def claimed(rgb: np.ndarray, serial: int, keys: MarkKeys = ALL):
    bits = payload(serial)
    return detect.examine_luma(to_luma(rgb), keys, payload_check=lambda b: np.array_equal(b, bits))


# ---------------------------------------------------------------- the attacker (numpy only)

def pca_removal(a: np.ndarray, period: int, components: int, gain: float) -> np.ndarray:
    """Tile-pair / principal-component attack: what tiles share beyond their mean, removed tile by tile.

    A mark that only flips the sign of one pattern per tile is rank one across
    the tiles and lands in the first principal component.
    """
    r = residual(a)
    h, w = (r.shape[0] // period) * period, (r.shape[1] // period) * period
    tiles = r[:h, :w].reshape(h // period, period, w // period, period).transpose(0, 2, 1, 3)
    x = tiles.reshape(-1, period * period)
    _, _, vt = np.linalg.svd(x, full_matrices=False)
    basis = vt[:components]
    est = (x @ basis.T) @ basis
    d = np.zeros(r.shape)
    d[:h, :w] = est.reshape(h // period, w // period, period, period).transpose(0, 2, 1, 3).reshape(h, w)
    return add(a, -gain * d)


# ---------------------------------------------------------------- fixtures

@pytest.fixture(scope="module")
def portfolio():
    """Twelve works of one owner (pieces of the tests' photos), marked in format 3."""
    pics = photos()
    pieces = [pics["chelsea"], pics["coffee"], pics["rocket"]]
    for name in ("hubble", "retina"):
        p = pics[name]
        h, w = p.shape[0] // 2, p.shape[1] // 2
        pieces += [np.ascontiguousarray(p[r:r + h, c:c + w]) for r in (0, h) for c in (0, w)]
    pieces.append(pics["sky"])
    return [(serial, mark3(p, serial)) for serial, p in enumerate(pieces, start=1)]


# ---------------------------------------------------------------- keys

def test_key_hierarchy_is_the_documented_hkdf():
    # RFC 5869 HKDF (hand-written in test_evidence_vectors, checked there against Appendix A.3).
    assert KEYS["sync"] == _hkdf_sha256(SECRET, b"claimkit/mark3/sync/v1")
    for f in (0, 5, 15):
        info = b"claimkit/mark3/family/v1/" + f.to_bytes(2, "big")
        assert KEYS["families"][f] == _hkdf_sha256(SECRET, info)
    assign = _hkdf_sha256(SECRET, b"claimkit/mark3/family-assignment/v1")
    for serial in (1, 2, 77, 2 ** 24 - 1):
        want = int.from_bytes(hmac.new(assign, serial.to_bytes(3, "big"), hashlib.sha256).digest()[:4],
                              "big") % format3.FAMILIES
        assert prof.format3_family_of(SECRET, serial) == want
    assert prof.FORMAT3_FAMILIES == format3.FAMILIES
    # All seeds distinct, and different from the owner-level seed of formats 1 and 2.
    seeds = [KEYS["sync"], prof.derive_detection_seed(SECRET), *KEYS["families"].values()]
    assert len(set(seeds)) == len(seeds)


def test_disclosure_keys_hold_one_family_only():
    k = prof.format3_keys(SECRET, serial=12)
    assert set(k["families"]) == {k["family"]} and k["sync"] == KEYS["sync"]
    assert k["families"][k["family"]] == KEYS["families"][k["family"]]
    # Families are spread: 64 serials fall in at least 12 of the 16.
    assert len({prof.format3_family_of(SECRET, s) for s in range(1, 65)}) >= 12


def test_format_records_state_what_an_expert_needs():
    rec = formats.WRITABLE[3].as_record()
    assert rec["format"] == format3.NAME == formats.READABLE[0].name
    assert rec["families"] == format3.FAMILIES and rec["macro_cell_tiles"] == format3.MACRO
    assert {f.name for f in formats.READABLE} == {"claimkit-mark/1", "claimkit-mark/2", "claimkit-mark/3"}


def test_family_scores_by_transforms_equal_the_plain_formula():
    rng = np.random.default_rng(4)
    spec = np.fft.fft2(rng.normal(size=(format3.MACRO ** 2, 128, 128)), axes=(1, 2)).astype(np.complex64)
    fams = {3: KEYS["families"][3], 9: KEYS["families"][9]}
    fast = format3.score_families(format3.at_claim_frequencies(spec), fams)
    plain = format3.score_families_direct(spec, fams)
    for f in fams:
        np.testing.assert_allclose(fast[f], plain[f], atol=1e-4)


# ---------------------------------------------------------------- reading

def test_format3_copy_is_claimed_with_its_family_and_a_disclosure_reads_only_its_family():
    rgb = photos()["coffee"]
    serial = 5
    marked = mark3(rgb, serial)
    assert psnr(rgb, marked) >= 42.0
    f = claimed(marked, serial)
    assert f.detected and f.payload_valid and f.mark_format == format3.NAME
    assert f.mark_family == prof.format3_family_of(SECRET, serial)
    assert not f.removal_suspected
    # The bound counts both tests and every format-3 hypothesis.
    assert f.counting["tests"] == detect.TESTS == 2
    assert f.counting["format_3"]["hypotheses"] == detect.format3_hypotheses()
    # The synchronisation's own bound (removal_suspected) counts every geometry the keyed
    # search chose among, as if each had been searched in full.
    assert f.counting["format_3"]["sync_geometries"] == detect.SYNC_GEOMETRIES == (
        detect.GEOMETRIES + geometry.SIMILARITY_CANDIDATES + geometry.ASPECT_CANDIDATES)
    assert f.counting["format_3"]["sync_hypotheses"] == (
        detect.SYNC_GEOMETRIES * detect.DIHEDRAL * len(detect.PHASES) * 128 * 128)
    own = prof.format3_keys(SECRET, serial=serial)
    g = claimed(marked, serial, MarkKeys(sync=own["sync"], families=own["families"]))
    assert g.detected and g.payload_valid and g.z_full == pytest.approx(f.z_full, rel=1e-4)
    # The same bound whichever keys are held (both tests always counted).
    assert g.log10_false_alarm == pytest.approx(f.log10_false_alarm, abs=1e-6)
    other = next(s for s in range(1, 99) if prof.format3_family_of(SECRET, s) != own["family"])
    wrong = prof.format3_keys(SECRET, serial=other)
    h = claimed(marked, serial, MarkKeys(sync=wrong["sync"], families=wrong["families"]))
    assert not h.detected
    assert h.removal_suspected        # the sync is there, this family's claim is not


def test_formats_1_and_2_still_read_with_the_owner_keys():
    from tests.engine_helpers import mark

    rgb = photos()["chelsea"]
    keys = MarkKeys(legacy=SEED, sync=KEYS["sync"], families=KEYS["families"])
    f = detect.examine_luma(to_luma(mark(rgb)), keys, payload_check=lambda b: np.array_equal(b, payload()))
    assert f.detected and f.payload_valid and f.mark_format == "claimkit-mark/2"


# ---------------------------------------------------------------- estimation attacks

GAINS = (1.0, 2.0, 3.0)


def test_a_small_busy_copy_turned_is_found_by_the_keyed_synchronisation_search(monkeypatch):
    """A 450 x 300 photo of fur turned 45 degrees (Pillow's bicubic rotate, inner rectangle cut:
    254 x 169 px): the lattice of the synchronisation is too faint for the keyless search, the
    keyed search (correlation with the known pattern) finds it and the claim names the work."""
    from PIL import Image

    serial = 3
    marked = mark3(photos()["chelsea"], serial)
    h, w = marked.shape[:2]
    a = np.radians(45.0)
    f = min(w / (w * np.cos(a) + h * np.sin(a)), h / (w * np.sin(a) + h * np.cos(a)))
    ch, cw = int(h * f), int(w * f)
    turned = np.asarray(Image.fromarray(marked).rotate(45.0, resample=Image.BICUBIC))
    copy = turned[(h - ch) // 2:(h - ch) // 2 + ch, (w - cw) // 2:(w - cw) // 2 + cw]
    found = claimed(copy, serial)
    assert found.detected and found.payload_valid
    assert found.mark_family == prof.format3_family_of(SECRET, serial)
    assert found.geometry["resampled"] and abs(abs(found.geometry["rotation_deg"]) - 45.0) < 0.5
    monkeypatch.setattr(detect, "KEYED_PICKS", 0)      # the keyless lattices only
    assert not claimed(copy, serial).detected


def test_above_a_megapixel_the_keyed_search_reads_the_lattice_searchs_own_hypotheses():
    """Above ``KEYED_MAX_PIXELS`` the keyed search scores only the coarse hypotheses the lattice
    search refines (448 below it); the synchronisation's bound counts all 448 either way."""
    luma = to_luma(landscape(840, 1260, seed=5))          # 1.06 MP
    assert luma.size > detect.KEYED_MAX_PIXELS
    large = detect.prepare(luma)
    assert large.similarities is not None and 0 < len(large.similarities) <= sum(detect.KEYED_LARGE) == 10
    small = detect.prepare(luma[:700, :1000])
    assert small.similarities is not None and len(small.similarities) == sum(detect.KEYED_CANDIDATES) == 448
    assert detect.SYNC_GEOMETRIES == detect.GEOMETRIES + sum(detect.KEYED_CANDIDATES)


def test_fold_removal_from_the_photo_itself_or_a_portfolio_keeps_the_claim(portfolio):
    """Voloshynovskiy et al. 2001: tile-period fold of the residual, subtracted with gains swept.

    Formats 1 and 2 lost the claim at 40 to 50 dB; format 3 must keep it
    wherever the attacked file stays at or above 38 dB against the marked one.
    """
    works = {s: m for s, m in portfolio}
    for target in (2, 6):
        marked = works[target]
        others = [m for s, m in portfolio if s != target]
        estimates = {"self": fold_estimate(marked, 128),
                     "pool10": np.mean([fold_estimate(m, 128) for m in others[:10]], axis=0)}
        for source, est in estimates.items():
            for g in GAINS:
                attacked = add(marked, -g * tiled(est, marked.shape[:2]))
                if psnr(marked, attacked) < 38.0:
                    continue
                f = claimed(attacked, target)
                assert f.detected and f.payload_valid, (target, source, g, psnr(marked, attacked))


def test_principal_component_removal_keeps_the_claim():
    """A keyed sign flip per tile would be rank one across tiles; independent carriers are not.

    On a 1000 x 872 photo (42 tiles), the principal components the tiles
    share are removed tile by tile, gains swept; every attack that stays at
    or above 38 dB leaves the claim.
    """
    serial = 40
    marked = mark3(photos()["hubble"], serial)
    tried = 0
    for comps in (1, 4):
        for g in (1.0, 2.0):
            attacked = pca_removal(marked, 128, comps, g)
            if psnr(marked, attacked) < 38.0:
                continue
            tried += 1
            f = claimed(attacked, serial)
            assert f.detected and f.payload_valid, (comps, g, psnr(marked, attacked))
    assert tried >= 2


def test_fold_estimate_copy_attack_makes_no_claim(portfolio):
    """Kutter, Voloshynovskiy and Herrigel 2000: the estimate added to an unrelated photo at >= 38 dB.

    With formats 1 and 2 this claimed every photo, some as a registered work.
    The synchronisation component travels with the estimate (and is reported
    as ``removal_suspected``, a trace), the claim does not.
    """
    unrelated = photos()["rocket"]
    serials = {s for s, _ in portfolio}

    def check(b):
        return any(np.array_equal(b, payload(s)) for s in serials)

    pool = np.mean([fold_estimate(m, 128) for _, m in portfolio[:10]], axis=0)
    for est in (fold_estimate(portfolio[1][1], 128), pool):
        d = tiled(est, unrelated.shape[:2])
        for want_db in (38.0, 42.0):
            g = np.sqrt(255.0 ** 2 / 10 ** (want_db / 10) / np.mean(d ** 2))
            attacked = add(unrelated, g * d)
            f = detect.examine_luma(to_luma(attacked), ALL, payload_check=check)
            assert not f.detected, want_db
            assert f.payload_bits is None


def test_null_calibration_over_many_keys():
    """Unmarked pictures (textures included) x random owner keys: the bound holds, nothing is claimed."""
    from skimage import data

    rng = np.random.default_rng(31)
    pics = [photos()["coffee"], np.stack([data.brick()] * 3, -1), photos()["sky"]]
    pvals = []
    for pic in pics:
        luma = to_luma(pic)
        prep = detect.prepare(luma)
        for _ in range(4):
            keys = MarkKeys(sync=rng.bytes(32), families={f: rng.bytes(32) for f in range(format3.FAMILIES)})
            f = detect.examine_luma(luma, keys, payload_check=lambda b: False, prepared=prep)
            assert not f.detected and not f.removal_suspected
            pvals.append(f.false_alarm_probability)
    format3.family_pattern.cache_clear()
    format3._pilot_kernels.cache_clear()
    pvals = np.asarray(pvals)
    for p in (0.1, 0.25, 0.5):
        assert np.mean(pvals <= p) <= p + 1e-9, p


def test_a_format3_disclosure_holds_one_family_committed_to_and_reads_its_work(profile, tmp_path):
    """mark writes format 3; the disclosure's seeds match the record's commitment (SHA-256 per
    seed, FIPS 180-4 via hashlib) and read the work, and hold no other family."""
    from PIL import Image

    from claimkit import workflow
    from claimkit.evidence.disclose import check_disclosure, write_disclosure
    from claimkit.imageio import read_picture

    src = tmp_path / "cup.png"
    Image.fromarray(photos()["coffee"]).save(src)
    rep = workflow.mark_file(profile, src, tmp_path / "cup-m.png", mark_format=3)
    work = profile.work(rep["work_id"])
    assert work.record["mark_params"]["format"] == format3.NAME
    assert work.record["mark_params"]["families"] == format3.FAMILIES
    write_disclosure(profile, rep["work_id"], tmp_path / "disc")
    chk = check_disclosure(tmp_path / "disc")
    assert chk.ok, chk.problems
    fam = profile.format3_disclosure_keys(rep["serial"])["family"]
    assert set(chk.seeds) == {"sync", "family"} and chk.format3["family"] == fam
    opening = profile.commitment_opening(rep["work_id"])
    digest = hashlib.sha256(chk.seeds["sync"] + fam.to_bytes(2, "big") + chk.seeds["family"])
    assert opening["format3_keys_sha256"] == digest.hexdigest()
    from claimkit.verify.checks import _keys_of

    keys, bits, _ = _keys_of(chk)
    f = workflow.examine_picture(read_picture(tmp_path / "cup-m.png"), keys,
                                 payload_check=workflow.expected_payload_check(bits))
    assert f.detected and f.payload_valid and f.mark_format == format3.NAME and f.mark_family == fam


def test_mark_format_2_on_request_is_recorded_and_read_as_format_2(profile, tmp_path):
    """``mark --format 2`` writes the owner-level tiled pattern, records it, and the owner reads it;
    ``mark`` without ``--format`` writes format 3 (the default since format 2's tile proved removable
    and transplantable by a keyless fold)."""
    from PIL import Image

    from claimkit import workflow
    from claimkit.cli import main
    from claimkit.errors import InputError

    src = tmp_path / "cat.png"
    Image.fromarray(photos()["chelsea"]).save(src)
    rep = workflow.mark_file(profile, src, tmp_path / "cat-2.png", mark_format=2)
    work = profile.work(rep["work_id"])
    assert work.record["mark_params"]["format"] == "claimkit-mark/2"
    assert "format3_keys_sha256" not in profile.commitment_opening(rep["work_id"])
    found, _ = workflow.examine_file(profile, tmp_path / "cat-2.png")
    assert found["detected"] and found["mark_format"] == "claimkit-mark/2"
    assert found["work_id"] == rep["work_id"]
    # The default, through the command line as an owner types it.
    assert main(["--home", str(profile.home), "mark", str(src), "--out", str(tmp_path / "cat-d.png"),
                 "--json"]) == 0
    default = [w for w in profile.works() if w.record["mark_params"]["format"] == format3.NAME]
    assert len(default) == 1 and formats.DEFAULT_WRITTEN == 3
    with pytest.raises(InputError, match="cannot be written"):
        workflow.mark_file(profile, src, tmp_path / "cat-5.png", mark_format=5)
    assert not (tmp_path / "cat-5.png").exists()
    # The command line offers 2 and 3 only (argparse refuses anything else: exit 2).
    with pytest.raises(SystemExit) as stop:
        main(["mark", str(src), "--out", str(tmp_path / "x.png"), "--format", "4"])
    assert stop.value.code == 2


# ---------------------------------------------------------------- the coarse component (issue 17)

@pytest.fixture(scope="module")
def master():
    """A 1000 x 1500 generated landscape marked in format 3 with both components, and its serial."""
    serial = 77
    rgb = landscape(1000, 1500, seed=41)
    return serial, add_luma_delta(rgb, scales.multiscale_delta(to_luma(rgb), embed_keys(serial),
                                                               payload(serial)))


def test_format3_web_copy_is_claimed_at_the_coarse_scale_with_its_family(master):
    """A 25 % copy (Pillow's Lanczos, then scikit-image's rescale) has lost the fine mark; the
    coarse component, format 3 at the level, names the work and its family."""
    from skimage.transform import rescale

    serial, mk = master
    bits = payload(serial)
    copies = [lanczos(mk, (375, 250)),
              np.clip(np.rint(rescale(mk.astype(float) / 255, 0.25, anti_aliasing=True,
                                      channel_axis=2, order=3) * 255), 0, 255).astype(np.uint8)]
    for copy in copies:
        f = scales.examine(to_luma(copy), ALL, payload_check=lambda b: np.array_equal(b, bits))
        assert f.detected and f.payload_valid and f.mark_format == format3.NAME
        assert f.mark_family == prof.format3_family_of(SECRET, serial)
        assert f.geometry["level"]["view"] in ("short side", "long side")
        assert f.counting["scales"] == 3 and f.hypotheses == 3 * detect.format3_hypotheses()


def test_a_fold_of_the_web_copy_at_the_level_keeps_the_claim_off_other_photos(master):
    """The keyless fold at the coarse level (the copy reduced to 384 px, residual averaged over
    128 px) gives the coarse sync only: added to an unrelated photo at 38 dB, no claim, not even
    for an examiner holding the owner's list of allocated payloads."""
    serial, mk = master
    small = lanczos(mk, (576, 384))          # the attacker's own reduction, to the level
    est = fold_estimate(small, 128)
    unrelated = lanczos(photos()["rocket"], (576, 384))
    d = tiled(est, unrelated.shape[:2])
    g = np.sqrt(255.0 ** 2 / 10 ** (38.0 / 10) / np.mean(d ** 2))
    listed, check = _listed(serial)
    f = scales.examine(to_luma(add(unrelated, g * d)), ALL, payload_check=check,
                       payload_candidates=listed)
    assert not f.detected and f.payload_bits is None


def test_null_calibration_at_every_scale_with_format3_keys():
    """Unmarked pictures large enough for the coarse views, under random owner keys: no claim at
    any scale, and the bound (counting both tests and the three scales) stays conservative."""
    pics = (landscape(700, 1050, seed=43), np.stack([np.tile(data.brick(), (2, 2))] * 3, -1))
    found = _null_findings(pics, np.random.default_rng(57), payload_check=lambda b: False)
    assert not any(f.detected or f.removal_suspected for f in found)
    _assert_conservative(found)


def _null_findings(pics, rng: np.random.Generator, **kwargs) -> list:
    """Each unmarked picture examined at every scale under 4 random owner keys (every format)."""
    found = []
    for pic in pics:
        luma = to_luma(pic)
        prep = scales.prepare(luma)
        for _ in range(4):
            keys = MarkKeys(legacy=rng.bytes(32), sync=rng.bytes(32),
                            families={f: rng.bytes(32) for f in range(format3.FAMILIES)})
            found.append(scales.examine(luma, keys, prepared=prep, **kwargs))
    format3.family_pattern.cache_clear()
    format3._pilot_kernels.cache_clear()
    return found


def _assert_conservative(found: list) -> None:
    """The bound is conservative: at most a fraction p of the null findings fall at or below p."""
    pvals = np.asarray([f.false_alarm_probability for f in found])
    for p in (0.25, 0.5):
        assert np.mean(pvals <= p) <= p + 1e-9, p


def _jpeg(a: np.ndarray, q: int) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, "JPEG", quality=q, subsampling=2)
    return np.asarray(Image.open(buf))


def _listed(serial: int, n: int = 200):
    """The owner's allocated payloads, as the owner's check lists them: the marked work's and
    the ``n - 1`` serials around it with their keyed tags (the nearest codewords a wrong pick
    could land on), and a check accepting every one of them."""
    from claimkit.mark import payload as pl

    mine = payload(serial)
    owner, s0 = pl.unpack(mine)["owner_tag"], pl.unpack(mine)["serial"]
    allocated = np.stack([mine if s == s0 else pl.pack(owner, s, prof.derive_payload_tag(SECRET, owner, s))
                          for s in range(s0 - n // 2, s0 + n - n // 2)])
    return PayloadList(allocated), lambda b: bool(np.any(np.all(allocated == np.asarray(b), axis=1)))


def test_web_copies_the_decoder_cannot_read_are_claimed_from_the_owners_list(master):
    """A 25 % copy saved at JPEG 50, and one cropped to 4:5 and saved at JPEG 60 (Pillow's
    Lanczos and codec): the Viterbi decoder alone finds no valid payload in either (the mark
    is found, the work is not; at JPEG 75 and 85 it decodes these copies alone); the best match
    among the owner's allocated payloads is the marked work, claimed at P_fa <= 1e-9 with the
    bound counting every valid payload."""
    serial, mk = master
    listed, check = _listed(serial)
    small = lanczos(mk, (375, 250))
    for copy in (_jpeg(small, 50), _jpeg(np.ascontiguousarray(small[:, 87:287]), 60)):
        alone = scales.examine(to_luma(copy), ALL, payload_check=check)
        assert not alone.payload_valid
        f = scales.examine(to_luma(copy), ALL, payload_check=check, payload_candidates=listed)
        assert f.detected and f.payload_valid and f.log10_false_alarm <= -9
        assert np.array_equal(f.payload_bits, payload(serial)) and f.mark_format == format3.NAME
        assert f.payload_space == 2 ** 24 and f.hypotheses == 3 * detect.format3_hypotheses()


def test_a_disclosure_holder_re_runs_a_claim_the_owners_list_made(master, tmp_path):
    """A 25 % JPEG 50 web copy that only the list names: the owner's examination (the list of
    allocated payloads) and a disclosure holder's re-run (that work's family and sync seeds, its
    payload listed by workflow.expected_payload_check, as verify's re-run builds its check) reach
    the same finding; with a check that lists nothing the holder would find the mark but no work."""
    from claimkit import workflow
    from claimkit.imageio import read_picture

    serial, mk = master
    listed, _ = _listed(serial)
    Image.fromarray(lanczos(mk, (375, 250))).save(tmp_path / "web.jpg", quality=50)
    pic = read_picture(tmp_path / "web.jpg")
    bits = payload(serial)
    owner = workflow.examine_picture(pic, ALL, payload_check=workflow.expected_payload_check(*listed.bits))
    k = prof.format3_keys(SECRET, serial=serial)
    held = MarkKeys(legacy=ALL.legacy, sync=k["sync"], families={k["family"]: k["families"][k["family"]]})
    again = workflow.examine_picture(pic, held, payload_check=workflow.expected_payload_check(bits))
    bare = workflow.examine_picture(pic, held, payload_check=lambda b: bool(np.array_equal(b, bits)))
    assert owner.detected and np.array_equal(owner.payload_bits, bits)
    for key in ("detected", "payload_bits", "log10_false_alarm", "z_pilot", "z_full", "mark_family"):
        assert getattr(again, key) == getattr(owner, key), key
    assert not bare.payload_valid


def test_the_owners_list_never_names_the_wrong_work(master):
    """Copies at the edge of what the coarse component carries (20 % and 15 % of the width, JPEG
    85; 20 % cropped to 4:5, JPEG 75): each is either claimed with the marked work or with none,
    never with one of the neighbouring serials the list holds (the confusion guard of
    mark.payload.PayloadList)."""
    serial, mk = master
    listed, check = _listed(serial, 400)
    named = 0
    for width, crop, q in ((300, False, 85), (225, False, 85), (300, True, 75), (375, True, 75)):
        small = lanczos(mk, (width, round(width * 2 / 3)))
        if crop:
            h = small.shape[0]
            c0 = (small.shape[1] - round(h * 4 / 5)) // 2
            small = np.ascontiguousarray(small[:, c0:c0 + round(h * 4 / 5)])
        f = scales.examine(to_luma(_jpeg(small, q)), ALL, payload_check=check, payload_candidates=listed)
        if f.payload_valid:
            named += 1
            assert np.array_equal(f.payload_bits, payload(serial)), (width, crop, q)
    assert named >= 2


def test_fold_removal_at_the_level_keeps_the_coarse_claim(master):
    """Voloshynovskiy et al. 2001 at the coarse level: the attacker reduces the marked photo to
    the level (a 38 % web copy, 576 x 384, Pillow), folds its residual over the tile (128) and
    the macro-cell (512), and subtracts the estimate with gains swept; wherever the attacked
    copy stays at or above 38 dB against the copy, the claim stays."""
    serial, mk = master
    listed, check = _listed(serial)
    copy = lanczos(mk, (576, 384))
    tried = 0
    for period in (128, 512):
        est = fold_estimate(copy, period)
        for g in (0.25, 0.5, 1.0):   # at 2 the 128-px fold is already below 38 dB here
            attacked = add(copy, -g * tiled(est, copy.shape[:2]))
            if psnr(copy, attacked) < 38.0:
                continue
            tried += 1
            f = scales.examine(to_luma(attacked), ALL, payload_check=check, payload_candidates=listed)
            assert f.detected and np.array_equal(f.payload_bits, payload(serial)), (period, g)
    assert tried >= 4


def test_null_calibration_with_the_owners_payload_list():
    """Unmarked pictures and web copies of them, under random owner keys, examined with a list
    of 500 allocated payloads: every examination scores the listed payload that matches best,
    none is claimed, and the bound (2**24 payloads counted) stays conservative."""
    rng = np.random.default_rng(58)
    allocated = rng.integers(0, 2, (500, 64)).astype(np.uint8)
    listed = PayloadList(allocated)
    check = lambda b: bool(np.any(np.all(allocated == np.asarray(b), axis=1)))  # noqa: E731
    pics = [landscape(700, 1050, seed=44), data.hubble_deep_field()]
    pics += [_jpeg(lanczos(p, (p.shape[1] // 4, p.shape[0] // 4)), 85) for p in pics]
    found = _null_findings(pics, rng, payload_check=check, payload_candidates=listed)
    assert not any(f.detected for f in found)
    _assert_conservative(found)


def test_an_examination_reruns_to_the_same_numbers_whatever_payloads_the_examiner_lists(master):
    """The owner lists every allocated serial, an expert holding a disclosure lists the disclosed
    work only: a claim made through the list, and every number of an examination that claims
    nothing (an unmarked picture; a copy too small to claim), must come out the same for both
    (`verify` re-runs findings with a disclosure). Before the fix, an owner's list pick that did
    not claim was reported on an unmarked exhibit and the expert's re-run differed."""
    from claimkit import workflow

    serial, mk = master
    listed, check = _listed(serial)
    mine = workflow.expected_payload_check(payload(serial))
    small = lanczos(mk, (375, 250))
    copies = {"25 % JPEG 75": _jpeg(small, 75), "10 % JPEG 85": _jpeg(lanczos(mk, (150, 100)), 85),
              "unmarked": _jpeg(landscape(250, 375, seed=91), 85)}
    for name, copy in copies.items():
        luma = to_luma(copy)
        owner = scales.examine(luma, ALL, payload_check=check, payload_candidates=listed)
        expert = scales.examine(luma, ALL, payload_check=mine, payload_candidates=mine.candidates)
        assert owner.detected == (name == "25 % JPEG 75"), name
        assert owner.to_json() == expert.to_json(), name
        if not owner.detected:
            plain = scales.examine(luma, ALL, payload_check=check)
            assert owner.to_json() == plain.to_json(), name


def test_a_copy_whose_rounded_size_misses_the_level_is_read_at_a_neighbouring_size():
    """A 25 % copy (Pillow's Lanczos) of a 1280 x 854 photo is 320 x 214: its level view is 574 px
    long, the original's level 576 (scales.coarse_level). The view is also read at 573 and 575 px
    (scales.stretched_shapes); the claim is made at 575, one pixel from the level, so the
    geometry reports that stretch (574 / 575) rather than the view as it is."""
    serial = 78
    rgb = landscape(854, 1280, seed=5)
    mk = add_luma_delta(rgb, scales.multiscale_delta(to_luma(rgb), embed_keys(serial), payload(serial)))
    _, check = _listed(serial)
    copy = lanczos(mk, (320, 214))
    assert scales.view_shape(copy.shape[:2], "short side") == (384, 574)
    assert scales.coarse_level(rgb.shape[:2]).shape == (384, 576)
    f = scales.examine(to_luma(copy), ALL, payload_check=check)
    assert f.detected and f.payload_valid and np.array_equal(f.payload_bits, payload(serial))
    assert f.geometry["level"]["view"] == "short side"
    assert f.geometry["aspect"] == pytest.approx(574 / 575, abs=2e-4)
    assert f.counting["format_3"]["placements"] == detect.DECODE_TRIES + detect.OWN_PLACEMENTS
