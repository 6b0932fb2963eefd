"""The explicit format and examination records agree with the engine that embeds and detects."""

from __future__ import annotations

from claimkit.mark import detect, ecc, formats, pattern


def test_every_readable_format_has_a_record_that_matches_the_engine():
    for fmt in pattern.READABLE:
        rec = formats.format_record(fmt.name)
        assert rec.tile_px == pattern.TILE
        assert rec.payload_bits == pattern.PAYLOAD_BITS
        assert rec.pilot_spots == fmt.pilots
        assert rec.code_spots == fmt.code_spots
        assert rec.code == fmt.code.describe()
        assert rec.spot_sigma_px == pattern.SPOT_SIGMA
        assert rec.min_spacing_px == pattern.MIN_SPACING


def test_the_code_spots_follow_from_the_code():
    # 64 payload bits plus (constraint - 1) tail bits, times the inverse rate.
    assert formats.FORMATS["claimkit-mark/2"].code_spots == (64 + 8) * 2 == \
        ecc.RATE_HALF.coded_length(64)
    assert formats.FORMATS["claimkit-mark/1"].code_spots == (64 + 8) * 3


def test_the_examination_record_matches_the_detector():
    e = formats.EXAMINATION
    assert e.prefilter_px == detect.PREFILTER
    assert e.norm_window_px == detect.NORM_WINDOW
    assert e.geometries_tried == detect.GEOMETRIES
    assert e.quarter_turns_and_mirrors == detect.DIHEDRAL
    assert e.subpixel_phases == len(detect.PHASES)
    assert e.decode_tries == detect.DECODE_TRIES
    assert e.payload_space == detect.DEFAULT_PAYLOAD_SPACE
    assert e.default_threshold == detect.DEFAULT_THRESHOLD
    assert e.max_examine_pixels == detect.MAX_EXAMINE_PIXELS
    # The hypothesis count of the bound follows from the record alone.
    assert detect.hypotheses() == (e.geometries_tried * e.quarter_turns_and_mirrors
                                   * e.subpixel_phases * pattern.TILE ** 2)


def test_records_are_plain_json_values():
    import json

    for rec in formats.FORMATS.values():
        assert json.loads(json.dumps(rec.as_dict())) == rec.as_dict()
    assert json.loads(json.dumps(formats.EXAMINATION.as_dict())) == formats.EXAMINATION.as_dict()
