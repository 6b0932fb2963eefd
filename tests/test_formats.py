"""The public format records agree with the engine that embeds and detects them."""

from __future__ import annotations

import json

from claimkit.mark import ecc, formats, pattern


def test_every_readable_format_has_a_record_that_matches_the_engine():
    assert [f.name for f in formats.READABLE] == [f.name for f in pattern.READABLE]
    for fmt in pattern.READABLE:
        rec = formats.by_name(fmt.name)
        assert rec is not None
        assert rec.tile_px == pattern.TILE and rec.payload_bits == pattern.PAYLOAD_BITS
        assert rec.pilot_spots == fmt.pilots and rec.code_spots == fmt.code_spots
        assert rec.code == fmt.code.describe() and rec.spot_sigma_px == pattern.SPOT_SIGMA
    assert formats.by_name("claimkit-mark/0") is None


def test_the_code_spots_follow_from_the_code():
    # 64 payload bits plus (constraint - 1) tail bits, times the inverse rate.
    assert formats.FORMAT_2.code_spots == (64 + 8) * 2 == ecc.RATE_HALF.coded_length(64)
    assert formats.FORMAT_1.code_spots == (64 + 8) * 3 == ecc.RATE_THIRD.coded_length(64)


def test_records_are_plain_json_values_named_by_format():
    for rec in formats.READABLE:
        r = rec.as_record()
        assert r["format"] == rec.name and json.loads(json.dumps(r)) == r


def test_the_dossier_states_the_records_not_module_constants():
    from claimkit.dossier.data import _engine_parameters

    eng = _engine_parameters()
    assert eng["format_records"] == [f.as_record() for f in formats.READABLE]
    assert "settings" not in eng and "WHITEN_ROWS" not in json.dumps(eng)
    assert eng["examination"]["geometries_tried"] * eng["examination"][
        "quarter_turns_and_mirrors"] * eng["examination"]["subpixel_phases"] * \
        eng["tile_px"] ** 2 == eng["hypotheses"]
