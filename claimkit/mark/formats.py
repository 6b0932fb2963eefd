"""The parameters of each mark format and of the examination, as explicit records.

The dossier states these numbers as evidence, so they are written here once,
by name, rather than gathered from whatever upper-case constants the engine's
modules happen to hold: renaming or adding a speed setting in the engine
must not change what a dossier says. ``tests/test_formats.py`` checks every
value below against the engine that embeds and detects, so a record cannot
drift from the code it describes.

A new mark format adds a record to :data:`FORMATS` (and changes nothing that
is here: old copies must stay readable and their dossiers reproducible).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

__all__ = ["EXAMINATION", "FORMATS", "ExaminationRecord", "FormatRecord", "format_record"]


@dataclass(frozen=True)
class FormatRecord:
    """What one mark format embeds.

    Attributes
    ----------
    name : str
        The format's name, as work records and findings state it.
    tile_px : int
        Period of the tiled mark, pixels of the original.
    payload_bits : int
        Bits carried: owner tag (16), work serial (24), payload tag (24).
    pilot_spots : int
        Spots with key-fixed signs that the search correlates with.
    code_spots : int
        Spots that carry the coded payload.
    code : str
        The error-correcting code, in words.
    spot_sigma_px : float
        Width of each Gaussian message spot.
    min_spacing_px : int
        Least cyclic distance between spot centres.
    """

    name: str
    tile_px: int
    payload_bits: int
    pilot_spots: int
    code_spots: int
    code: str
    spot_sigma_px: float
    min_spacing_px: int

    def as_dict(self) -> dict:
        """The record as JSON values (the dossier's ``method.engine.formats`` entries)."""
        return asdict(self)


@dataclass(frozen=True)
class ExaminationRecord:
    """How every copy is examined, whatever its format.

    Attributes
    ----------
    prefilter_px : int
        Local-mean window removed before correlation.
    norm_window_px : int
        Window of the local standard-deviation normalisation.
    geometries_tried : int
        Geometric hypotheses: the unwarped picture plus the lattice fits.
    quarter_turns_and_mirrors : int
        Dihedral variants tried under each geometry.
    subpixel_phases : int
        Half-pixel phases tried under each variant.
    decode_tries : int
        Best placements whose payload is decoded.
    payload_space : int
        Valid payloads per owner and format (one per work serial).
    default_threshold : float
        False-alarm bound at or below which a copy counts as marked.
    max_examine_pixels : int
        Larger copies are examined on a central window of this many pixels.
    """

    prefilter_px: int
    norm_window_px: int
    geometries_tried: int
    quarter_turns_and_mirrors: int
    subpixel_phases: int
    decode_tries: int
    payload_space: int
    default_threshold: float
    max_examine_pixels: int

    def as_dict(self) -> dict:
        """The record as JSON values (the dossier's ``method.engine.examination``)."""
        return asdict(self)


FORMAT_1 = FormatRecord(
    name="claimkit-mark/1", tile_px=128, payload_bits=64, pilot_spots=64, code_spots=216,
    code="convolutional, rate 1/3, constraint 9, generators 557/663/711 (octal)",
    spot_sigma_px=1.0, min_spacing_px=4)

FORMAT_2 = FormatRecord(
    name="claimkit-mark/2", tile_px=128, payload_bits=64, pilot_spots=48, code_spots=144,
    code="convolutional, rate 1/2, constraint 9, generators 561/753 (octal)",
    spot_sigma_px=1.0, min_spacing_px=4)

#: Every format claimkit has written, by name.
FORMATS = {f.name: f for f in (FORMAT_1, FORMAT_2)}

EXAMINATION = ExaminationRecord(
    prefilter_px=9, norm_window_px=9, geometries_tried=3, quarter_turns_and_mirrors=8,
    subpixel_phases=4, decode_tries=3, payload_space=2 ** 24, default_threshold=1e-9,
    max_examine_pixels=4_000_000)


def format_record(name: str) -> FormatRecord:
    """The record of a format by name.

    Parameters
    ----------
    name : str
        E.g. ``"claimkit-mark/2"``.

    Returns
    -------
    FormatRecord

    Raises
    ------
    KeyError
        For a format this claimkit does not know.
    """
    return FORMATS[name]
