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

import numpy as np
import pytest

from claimkit.evidence import keys as prof
from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import detect, embed, format3, formats, geometry
from claimkit.mark.format3 import EmbedKeys, MarkKeys
from tests.engine_helpers import SEED, add, fold_estimate, payload, photos, psnr, residual, tiled
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
    fast, plain = format3.score_families(spec, fams), format3.score_families_direct(spec, fams)
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
    """``mark --format 2`` (the default) writes the owner-level tiled pattern, records it, and the
    owner reads it."""
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
    from claimkit.mark import scales
    from tests.engine_helpers import landscape

    serial = 77
    rgb = landscape(1000, 1500, seed=41)
    return serial, add_luma_delta(rgb, scales.multiscale_delta(to_luma(rgb), embed_keys(serial),
                                                               payload(serial)))


def test_format3_web_copy_is_claimed_at_the_coarse_scale_with_its_family(master):
    """A 25 % copy (Pillow's Lanczos, then scikit-image's rescale) has lost the fine mark; the
    coarse component, format 3 at the level, names the work and its family."""
    from skimage.transform import rescale

    from claimkit.mark import scales
    from tests.engine_helpers import lanczos

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
    128 px) gives the coarse sync only: added to an unrelated photo at 38 dB, no claim."""
    from claimkit.mark import scales
    from tests.engine_helpers import lanczos

    serial, mk = master
    small = lanczos(mk, (576, 384))          # the attacker's own reduction, to the level
    est = fold_estimate(small, 128)
    unrelated = lanczos(photos()["rocket"], (576, 384))
    d = tiled(est, unrelated.shape[:2])
    g = np.sqrt(255.0 ** 2 / 10 ** (38.0 / 10) / np.mean(d ** 2))
    bits = payload(serial)
    f = scales.examine(to_luma(add(unrelated, g * d)), ALL,
                       payload_check=lambda b: np.array_equal(b, bits))
    assert not f.detected and f.payload_bits is None


def test_null_calibration_at_every_scale_with_format3_keys():
    """Unmarked pictures large enough for the coarse views, under random owner keys: no claim at
    any scale, and the bound (counting both tests and the three scales) stays conservative."""
    from skimage import data

    from claimkit.mark import scales
    from tests.engine_helpers import landscape

    rng = np.random.default_rng(57)
    pvals = []
    for pic in (landscape(700, 1050, seed=43), np.stack([np.tile(data.brick(), (2, 2))] * 3, -1)):
        luma = to_luma(pic)
        prep = scales.prepare(luma)
        for _ in range(4):
            keys = MarkKeys(legacy=rng.bytes(32), sync=rng.bytes(32),
                            families={f: rng.bytes(32) for f in range(format3.FAMILIES)})
            f = scales.examine(luma, keys, payload_check=lambda b: False, prepared=prep)
            assert not f.detected and not f.removal_suspected
            pvals.append(f.false_alarm_probability)
    format3.family_pattern.cache_clear()
    format3._pilot_kernels.cache_clear()
    pvals = np.asarray(pvals)
    for p in (0.25, 0.5):
        assert np.mean(pvals <= p) <= p + 1e-9, p
