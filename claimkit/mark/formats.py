"""The public parameter record of each mark format: what an expert needs to rebuild and re-check it.

Every number here is public (the method is published); only the seeds are
secret. The dossier and each work record carry :meth:`FormatRecord.as_record`
instead of reading module constants, so that a record states exactly what
was embedded and what the detector searches.
"""

from __future__ import annotations

from dataclasses import dataclass

from claimkit.mark import format3, pattern


@dataclass(frozen=True)
class FormatRecord:
    """Public parameters of one mark format.

    Attributes
    ----------
    name : str
        The format's name (``claimkit-mark/N``).
    method : str
        One line on what is embedded.
    tile_px : int
        Period of the periodic component, pixels.
    payload_bits : int
        Bits carried (owner tag 16, serial 24, payload tag 24).
    pilot_spots, code_spots : int
        Spots of the message that the claim rests on.
    spot_sigma_px : float
        Gaussian width of a spot.
    code : str
        The convolutional code of the payload.
    keys : str
        Which seeds the format uses (all derived from the owner's marking secret).
    families : int
        Keyed families of works (1: every work shares one pattern).
    macro_cell_tiles : int
        Tiles per side of the macro-cell over which the claim's carriers change (1: none).
    sync_spots : int
        Spots of the synchronisation component (0: none).
    sync_energy_share : float
        Share of the mark's energy in the synchronisation component.
    scales : int
        Scales at which the mark is embedded and searched (1: native only).
    """

    name: str
    method: str
    tile_px: int
    payload_bits: int
    pilot_spots: int
    code_spots: int
    spot_sigma_px: float
    code: str
    keys: str
    families: int = 1
    macro_cell_tiles: int = 1
    sync_spots: int = 0
    sync_energy_share: float = 0.0
    scales: int = 1

    def as_record(self) -> dict:
        """The record as JSON-ready data (``format`` is the name)."""
        out = {"format": self.name}
        out.update({k: v for k, v in self.__dict__.items() if k != "name"})
        return out

    def describe(self) -> str:
        """The format in words (the dossier's method section)."""
        extra = ""
        if self.families > 1:
            extra = (f"; {self.families} keyed families, a carrier per tile of a "
                     f"{self.macro_cell_tiles} x {self.macro_cell_tiles} macro-cell, "
                     f"synchronisation {self.sync_spots} spots at {self.sync_energy_share:.0%} of the energy")
        return (f"{self.name}: {self.pilot_spots} pilot and {self.code_spots} code spots, "
                f"{self.code}, {self.tile_px}-px tile{extra}")


_PHASE = "phase-dispersion: random-phase carrier convolved with a spot template"

FORMAT_1 = FormatRecord(
    name=pattern.FORMAT_1.name, method=_PHASE + ", tiled", tile_px=pattern.TILE,
    payload_bits=pattern.PAYLOAD_BITS, pilot_spots=pattern.FORMAT_1.pilots,
    code_spots=pattern.FORMAT_1.code_spots, spot_sigma_px=pattern.SPOT_SIGMA,
    code=pattern.FORMAT_1.code.describe(), keys="owner-level detection seed")
FORMAT_2 = FormatRecord(
    name=pattern.FORMAT_2.name, method=_PHASE + ", tiled", tile_px=pattern.TILE,
    payload_bits=pattern.PAYLOAD_BITS, pilot_spots=pattern.FORMAT_2.pilots,
    code_spots=pattern.FORMAT_2.code_spots, spot_sigma_px=pattern.SPOT_SIGMA,
    code=pattern.FORMAT_2.code.describe(), keys="owner-level detection seed")
FORMAT_3 = FormatRecord(
    name=format3.NAME,
    method=_PHASE + "; a tiled synchronisation component plus a claim component whose "
    "carrier changes from tile to tile over a keyed macro-cell, in one of several keyed families",
    tile_px=pattern.TILE, payload_bits=pattern.PAYLOAD_BITS,
    pilot_spots=format3.CLAIM_PILOTS, code_spots=format3.CODE.coded_length(pattern.PAYLOAD_BITS),
    spot_sigma_px=pattern.SPOT_SIGMA, code=format3.CODE.describe(),
    keys="owner-level sync seed; one seed per family; keyed family assignment of serials",
    families=format3.FAMILIES, macro_cell_tiles=format3.MACRO, sync_spots=format3.SYNC_SPOTS,
    sync_energy_share=format3.SYNC_SHARE)

#: The formats ``mark`` writes, by number (``mark --format N``).
WRITABLE = {2: FORMAT_2, 3: FORMAT_3}
#: The format written when none is asked for. Format 3: format 2's tile is the same in every work,
#: so a keyless fold of one photo (or a pooled portfolio) estimates it, removes it at 36-52 dB and
#: transplants it onto unrelated pictures; format 3 resists both, at the price of a few
#: heavy-attack copies that format 2 still claims (README, "What the mark resists").
#: Format 2 stays writable on request (``mark --format 2``) and every format stays readable.
DEFAULT_WRITTEN = 3
CURRENT = WRITABLE[DEFAULT_WRITTEN]
#: Every format the detector reads, the newest first.
READABLE = (FORMAT_3, FORMAT_2, FORMAT_1)


def by_name(name: str) -> FormatRecord | None:
    """The record of a format by its name (None for an unknown one)."""
    return next((f for f in READABLE if f.name == name), None)


def number_of(name: str | None) -> int | None:
    """The number ``N`` of a format named ``claimkit-mark/N`` that ``mark`` writes (else None)."""
    return next((n for n, f in WRITABLE.items() if f.name == name), None)
