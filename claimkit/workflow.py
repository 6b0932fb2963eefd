"""File-level operations on top of the numeric core: mark a photo, examine a copy.

This is the Python API the command line, the case layer and the batch layer
call. It reads and writes files (through :mod:`claimkit.imageio`), asks the
profile for keys and registration, and leaves all numerics to
:mod:`claimkit.mark`.
"""

from __future__ import annotations

import hashlib
import hmac
import os
from concurrent.futures import Executor, Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import lru_cache
from itertools import repeat
from pathlib import Path

import numpy as np

from claimkit import __version__, words
from claimkit.errors import InputError
from claimkit.evidence.disclose import disclosed_keys
from claimkit.evidence.keys import derive_payload_tag, work_id_for
from claimkit.evidence.rights import load_rights
from claimkit.evidence.storage import fsync_dir, sha256_file
from claimkit.filemeta import INSTALL_HINT, Carried, Rights, carry_metadata, exiftool_available
from claimkit.imageio import (
    CURRENT_EXAMINATION_METHOD,
    LUMA_FROM_RGB,
    Picture,
    add_luma_delta_sse,
    canvas_like,
    check_output_path,
    output_format,
    padded_rows,
    read_picture,
    to_luma,
    write_picture_keeping_bytes,
)
from claimkit.mark import detect, embed, formats, pattern, payload, quality, scales
from claimkit.mark.detect import Finding
from claimkit.mark.fingerprint import perceptual_fingerprint
from claimkit.mark.format3 import EmbedKeys, MarkKeys

MIN_MARK_SIDE = pattern.TILE      # one full period of the mark on each side
MIN_EXAMINE_SIDE = 64


# ---------------------------------------------------------------- input checks
# The one place where the numbers a user gives are checked, for every command and the API.

def check_strength(strength: float) -> float:
    """The marking strength, refused (InputError) outside 0..4."""
    if not 0 < strength <= 4:
        raise InputError(f"strength {strength} is outside 0..4")
    return float(strength)


def check_jpeg_quality(quality: int) -> int:
    """The JPEG quality of a marked copy, refused outside 1..100."""
    if not 1 <= int(quality) <= 100:
        raise InputError(f"JPEG quality {quality} is outside 1..100")
    return int(quality)


def check_threshold(threshold: float) -> float:
    """The false-alarm bound that counts as a detection, refused outside (0, 1)."""
    if not 0 < threshold < 1:
        raise InputError(f"--threshold {threshold} must lie between 0 and 1")
    return float(threshold)


def check_decoys(decoys: int) -> int:
    """The number of decoy keys of a control, refused outside 0..10000."""
    if not 0 <= decoys <= 10000:
        raise InputError(f"decoys {decoys} is outside 0..10000")
    return int(decoys)


def check_format(mark_format: int | None) -> int:
    """The mark format to write (``formats.DEFAULT_WRITTEN`` for None), refused when not writable."""
    if mark_format is None:
        return formats.DEFAULT_WRITTEN
    if int(mark_format) not in formats.WRITABLE:
        raise InputError(f"mark format {mark_format} cannot be written (choose "
                         f"{' or '.join(str(n) for n in formats.WRITABLE)})")
    return int(mark_format)


def mark_parameters(strength: float, mark_format: int | None = None) -> dict:
    """The parameters recorded with every work (enough to re-derive the mark from the keys).

    The format's public parameter record (:mod:`claimkit.mark.formats`) plus
    the embedding settings of this work.
    """
    return {
        **formats.WRITABLE[check_format(mark_format)].as_record(),
        "software": f"claimkit {__version__}",
        "mask": "SSIM-derived local amplitude",
        "local_ssim_target": embed.DEFAULT_LOCAL_SSIM,
        "psnr_cap_db": embed.DEFAULT_PSNR_DB,
        "coarse_level": {
            "what": "the same kind of mark computed on the picture reduced to a short side of "
                    f"{scales.COARSE_SIDE} px, interpolated back (cubic convolution), under seeds "
                    "derived from the marking keys (HMAC-SHA256 of each with the seed label); only on "
                    "pictures whose short side is at least "
                    f"{round(scales.MIN_COARSE_FACTOR * scales.COARSE_SIDE)} px",
            "short_side_px": scales.COARSE_SIDE,
            "energy_share": scales.COARSE_SHARE,
            # Busy pictures whose coarse component is held by the PSNR budget give it more
            # (scales.busy_share), up to this; the fine synchronisation keeps its energy.
            "energy_share_busy_max": scales.COARSE_SHARE_BUSY,
            "seed_label": scales.COARSE_LABEL.decode(),
        },
        "strength": strength,
        "channel": "luma (same change on R, G and B)",
    }


def mark_keys(profile) -> MarkKeys:
    """Every detection key of an open profile: formats 1-2 (owner-level seed) and format 3 (all families)."""
    k = profile.format3_keys()
    return MarkKeys(legacy=profile.detection_seed, sync=k["sync"], families=k["families"])


def disclosure_mark_keys(keys: dict, legacy: bytes | None = None) -> MarkKeys:
    """Detection keys from what a disclosure holds (evidence layer's ``format3_keys(serial=...)``)."""
    return MarkKeys(legacy=legacy, sync=keys.get("sync"), families=dict(keys.get("families", {})))


def work_mark_keys(profile, work) -> MarkKeys:
    """The detection keys a disclosure of ``work`` carries, built as ``verify`` builds them.

    What the other side is to re-run from a disclosure (the robustness battery)
    is run with these: a copy where the mark is missed reports the best of the
    tests the keys allow, and with the owner's other families that number
    would not re-run from the disclosure.
    """
    seeds = disclosed_keys(profile, work).seeds
    f3 = profile.format3_disclosure_keys(work.serial) if "family" in seeds else {}
    return disclosure_mark_keys(f3, legacy=seeds.get("detection"))


def embed_keys(profile, serial: int, mark_format: int | None = None) -> bytes | EmbedKeys:
    """What marking one work needs.

    Format 3: the sync seed and the work's own family seed. Format 2: the
    owner-level detection seed.
    """
    if check_format(mark_format) == 2:
        return profile.detection_seed
    k = profile.format3_disclosure_keys(serial)
    return EmbedKeys(sync=k["sync"], family=k["family"], family_seed=k["families"][k["family"]])


def _check_size(pic: Picture, minimum: int, what: str) -> None:
    h, w = pic.height, pic.width
    if min(h, w) < minimum:
        raise InputError(f"image is {w}x{h} pixels; {what} needs at least {minimum} pixels on each side",
                         path=pic.path)


def load_original(src: str | os.PathLike, *, max_pixels: int | None = None) -> tuple[Picture, str]:
    """Read a photo to be marked, check it can hold the mark, and hash the file.

    The file is read once: the SHA-256 returned is of exactly the bytes that
    were decoded, even if the file changes on disk meanwhile.
    """
    pic = read_picture(src, max_pixels=max_pixels)
    _check_size(pic, MIN_MARK_SIDE, "marking")
    return pic, pic.sha256


# Rows marked at a time: a multiple of the mask step and a divisor of the
# period, small enough that the band's floats stay in the processor cache.
_MARK_BAND_ROWS = 64
# Threads for the band work (NumPy releases the interpreter lock on whole arrays):
# two where this process may use two cores. Pool workers are each one core's worth
# of work, so the pool starts them with CLAIMKIT_THREADS=1 (claimkit.runner).
THREADS_ENV = "CLAIMKIT_THREADS"


def band_threads() -> int:
    """Threads one picture's marking may use: ``$CLAIMKIT_THREADS``, else up to 2 cores."""
    raw = os.environ.get(THREADS_ENV, "")
    if raw.isdigit() and int(raw) > 0:
        return int(raw)
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    return max(1, min(2, cores))


class _InPlace(Executor):
    """An executor that runs each task at once in the calling thread (one core's worth of work)."""

    def submit(self, fn, /, *args, **kwargs) -> Future:
        fut: Future = Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except BaseException as exc:  # noqa: BLE001 - handed to whoever asks for the result
            fut.set_exception(exc)
        return fut


def _helpers(threads: int, name: str) -> Executor:
    """Threads beside the caller's when there are cores for them, else work done in place."""
    return ThreadPoolExecutor(max_workers=threads, thread_name_prefix=name) if threads else _InPlace()


@dataclass(frozen=True)
class FileMetadata:
    """What the marked file says besides its pixels (picklable, for batch workers).

    The original's metadata is copied by exiftool; ``rights`` are written
    (IPTC Photo Metadata Standard properties), and ``work_id`` as the Image
    Registry Entry with ``registry`` as its organisation id.
    """

    rights: Rights | None
    work_id: str | None
    registry: str | None


def registry_name(profile) -> str:
    """The Image Registry organisation id of an owner: their public key's SHA-256."""
    return f"claimkit owner key SHA-256 {profile.public_key_fingerprint}"


def mark_picture(pic: Picture, out: Path, seed: bytes | EmbedKeys, bits: np.ndarray, *,
                 strength: float = 1.0,
                 jpeg_quality: int = 95, force: bool = False,
                 max_pixels: int | None = None, metadata: FileMetadata | None = None) -> dict:
    """Embed ``bits`` under ``seed``, write ``out`` atomically and measure what marking did.

    The pixel work shared by :func:`mark_file` and batch workers: no profile,
    no registry. Returns the marked file's SHA-256, the perceptual
    fingerprint, the quality measures and the picture's facts.

    Notes
    -----
    Luma and the change are made band by band of rows (mask times tiled
    period, added to every channel, squared error summed for the PSNR), so
    no full-size float copy of the photo is made, and two threads share the
    bands (NumPy releases the interpreter lock on whole-array operations);
    the fingerprint and the mask's two local filters also run side by side.
    While SSIM is measured, another thread encodes and writes ``out``, reads
    it back, hashes it and decodes it for the PSNR of the file as written
    (Pillow's codecs and file I/O release the lock too). Every piece is
    computed by the same operations as in one pass, so the pixels and
    numbers are those of doing the steps one after another. With one core
    (:func:`band_threads` is 1, as in each worker of a batch pool) the same
    steps run one after another in the calling thread, SSIM first. Either
    way the canvas of marked pixels is let go before the written file is
    decoded, whose pixels then take its memory.
    """
    pixels = pic.pixels
    starts = range(0, pixels.shape[0], _MARK_BAND_ROWS)
    ends = [min(pixels.shape[0], r0 + _MARK_BAND_ROWS) for r0 in starts]
    marked = canvas_like(pixels)      # the encoder reads it in place (no copy into Pillow)
    # An RGBX canvas holds four bytes a pixel, as a float32 plane does: the luma lives there
    # until the plan is made, and the marked pixels then overwrite it (one full-size buffer
    # fewer to allocate and fault in: 96 MB at 24 MP).
    luma = (marked.base.view(np.float32)[..., 0] if padded_rows(marked) is not None
            else np.empty(pixels.shape[:2], dtype=np.float32))
    threads = band_threads()
    with _helpers(threads if threads > 1 else 0, "claimkit-band") as pool:
        list(pool.map(_luma_band, repeat(pixels), repeat(luma), starts, ends))
        fingerprint_job = pool.submit(perceptual_fingerprint, luma)
        plan = scales.scales_plan(luma, seed, np.asarray(bits, dtype=np.uint8), strength=strength,
                                  executor=pool)
        fingerprint = fingerprint_job.result()
        del luma
        sse = sum(pool.map(_mark_band, repeat(plan), repeat(pixels), repeat(marked), starts, ends))
    del plan
    peak = 65535.0 if pixels.dtype == np.uint16 else 255.0
    measures = {"psnr_db": round(quality.psnr_from_sse(sse, pixels.size, peak=peak), 3)}
    # The writer lets go of the canvas once it is encoded, and this thread once SSIM is
    # measured (first, with one core), so that the decode of the written file for the PSNR as
    # saved reuses the canvas's memory instead of faulting in as much again.
    canvas = [marked]
    with _helpers(1 if threads > 1 else 0, "claimkit-write") as pool:
        if threads <= 1:
            ssim_est = quality.ssim_estimate(pixels, marked, grey=to_luma)
            del marked
        job = pool.submit(_write_marked, out, canvas, pic, jpeg_quality=jpeg_quality,
                          force=force, max_pixels=max_pixels, peak=peak, metadata=metadata)
        if threads > 1:
            try:
                ssim_est = quality.ssim_estimate(pixels, marked, grey=to_luma)
            except BaseException:
                _discard_written(job, out)
                raise
            del marked
        sha_marked, psnr_file, carried = job.result()
    measures["ssim"] = round(ssim_est.value, 5)
    measures["ssim_sampled"] = ssim_est.sampled
    se = ssim_est.standard_error        # None: the whole picture was measured
    measures["ssim_standard_error"] = None if se is None else float(f"{se:.2g}")
    if psnr_file is not None:
        measures["psnr_db_file"] = round(psnr_file, 3)
    return {
        "sha256_marked": sha_marked, "fingerprint": fingerprint, "quality": measures,
        "capture": pic.capture, "width": int(pixels.shape[1]),
        "height": int(pixels.shape[0]), "bit_depth": pic.bit_depth,
        "metadata_dropped": [] if carried is None else carried.dropped,
        "rights_written": [] if carried is None else carried.rights_written,
        "rights_kept": [] if carried is None else carried.rights_kept,
        "notes": list(pic.notes),
    }


def _luma_band(pixels: np.ndarray, luma: np.ndarray, r0: int, r1: int) -> None:
    to_luma(pixels[r0:r1], out=luma[r0:r1])


def _mark_band(plan: scales.ScalesPlan, pixels: np.ndarray, marked: np.ndarray, r0: int,
               r1: int) -> int:
    """Mark rows ``r0:r1`` into ``marked``; their exact sum of squared changes."""
    return add_luma_delta_sse(pixels[r0:r1], plan.rows(r0, r1), out=marked[r0:r1])


def _squared_error(a: np.ndarray, b: np.ndarray) -> int:
    """``quality.squared_error_sum`` of two pictures, over whole RGBX rows where both have them.

    Only for pixels whose fourth bytes agree: a colour JPEG as ``read_picture``
    decodes it (255, Pillow's RGB unpacking) and its marked canvas (the byte
    copied over by ``add_luma_delta``), or two decoded JPEGs; the padding then
    adds nothing to the sum, and contiguous rows are summed about twice as fast.
    """
    wide_a, wide_b = padded_rows(a), padded_rows(b)
    if wide_a is not None and wide_b is not None:
        return quality.squared_error_sum(wide_a, wide_b)
    return quality.squared_error_sum(a, b)


def _write_marked(out: Path, canvas: list[np.ndarray], pic: Picture, *, jpeg_quality: int,
                  force: bool, max_pixels: int | None, peak: float,
                  metadata: FileMetadata | None = None,
                  ) -> tuple[str, float | None, Carried | None]:
    """Write ``out`` and read it back once: its SHA-256, the PSNR as written if lossy, and
    what the metadata step did.

    ``canvas`` holds the marked pixels; they are taken out of it to be
    encoded, so that nothing here keeps them while the written file is
    decoded. The metadata step (exiftool) runs on the staged file before it
    is put in place, so the hash is that of the final bytes. If anything
    fails after the file was written, the file is removed again.
    """
    finish = None
    if metadata is not None:
        def finish(staged_file, staged):
            return carry_metadata(staged_file, pic.path, rights=metadata.rights,
                                  work_id=metadata.work_id, registry=metadata.registry,
                                  copy_icc=staged.icc_fits and not staged.icc_embedded,
                                  reasons=staged.reasons)
    carried, data = write_picture_keeping_bytes(out, canvas.pop(), like=pic, quality=jpeg_quality,
                                                force=force, finish=finish)
    try:
        if out.suffix.lower() not in (".jpg", ".jpeg", ".webp"):
            return hashlib.sha256(data).hexdigest(), None, carried
        # The bytes just written, decoded and hashed once from memory (not read back from disk).
        back = read_picture(out, max_pixels=max_pixels, data=data)
        written = back.pixels
        if written.dtype != pic.pixels.dtype:
            # A 16-bit photo written as an 8-bit JPEG: compare on the original's scale.
            written = written.astype(np.float64) * (peak / 255.0)
        if written.dtype == pic.pixels.dtype:
            sse = _squared_error(pic.pixels, written)
            return back.sha256, quality.psnr_from_sse(sse, written.size, peak=peak), carried
        return back.sha256, quality.psnr(pic.pixels, written, peak=peak), carried
    except BaseException:
        out.unlink(missing_ok=True)
        raise


def _discard_written(job, out: Path) -> None:
    """After a failure elsewhere: wait for the writer and remove what it wrote."""
    try:
        job.result()
    except BaseException:  # noqa: BLE001 - nothing was written, or the writer removed it
        return
    out.unlink(missing_ok=True)


STAGED_TAG = ".claimkit-staged"


def staged_path(out: Path) -> Path:
    """Hidden name beside ``out`` where a marked copy waits until it is registered."""
    return out.with_name(f".{out.stem}{STAGED_TAG}{out.suffix}")


def place_staged(staged: Path, out: Path, *, force: bool) -> None:
    """Move a registered staged copy to its final name; without ``force`` never replace a file."""
    if force:
        os.replace(staged, out)
    else:
        try:
            os.link(staged, out)       # fails if the name appeared meanwhile
        except FileExistsError:
            raise InputError("already exists (appeared during the run); the marked copy "
                             f"was kept as {staged.name}", path=out) from None
        except OSError:
            if out.exists():
                raise
            os.replace(staged, out)    # a file system without hard links
        else:
            staged.unlink()
    fsync_dir(out.parent)


def prepare_output(out: Path, src: Path, *, force: bool) -> None:
    """Check an output path before any work, creating its folder as folder mode does.

    Everything the user can fix is found here (exit 2), before a serial is
    handed out or a pixel is changed.
    """
    if out.resolve() == src.resolve():
        raise InputError("the output would overwrite the original; choose another name", path=out)
    output_format(out)
    if not exiftool_available():
        raise InputError("exiftool is needed to keep the photo's metadata and write the rights "
                         "fields, and was not found", hint=INSTALL_HINT)
    if not out.parent.is_dir():
        try:
            out.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(f"cannot create the folder {out.parent}: "
                             f"{exc.strerror or exc}", path=out) from None
    check_output_path(out, force=force)


def mark_file(profile, src: str | os.PathLike, out: str | os.PathLike, *, force: bool = False,
              strength: float = 1.0, jpeg_quality: int = 95, max_pixels: int | None = None,
              rights: Rights | None = None, mark_format: int | None = None) -> dict:
    """Mark one photo, write the marked copy to ``out`` and register the work.

    The original is only read. ``out``'s folder is created if missing. The one
    marking protocol, the same as a batch's (:mod:`claimkit.batch`): the marked
    copy is written under a hidden staged name beside ``out``
    (:func:`staged_path`), its metadata carried over and the rights fields
    written (exiftool); the work is registered with the hash of those final
    bytes, and only then is the copy renamed to ``out`` (:func:`place_staged`).
    So a file under its final name is always registered, whenever the process
    is killed. If marking or registering fails, the staged file is removed and
    the serial given back, so a failed mark uses up no serial.

    Returns
    -------
    dict
        ``work_id``, ``psnr_db``, ``ssim``, ``sha256_original``,
        ``sha256_marked``, ``metadata_dropped`` and more (see the README).
    """
    src, out = Path(src), Path(out)
    check_strength(strength)
    check_jpeg_quality(jpeg_quality)
    mark_format = check_format(mark_format)
    pic, sha_orig = load_original(src, max_pixels=max_pixels)
    prepare_output(out, src, force=force)
    if rights is None:
        rights = load_rights(profile.home, profile.owner)
    serial = profile.allocate_serials(1)[0]
    bits = payload.pack(profile.owner_tag, serial, profile.payload_tag(serial))
    meta = FileMetadata(rights=rights, work_id=work_id_for(profile.owner_tag, serial),
                        registry=registry_name(profile))
    staged = staged_path(out)
    try:
        facts = mark_picture(pic, staged, embed_keys(profile, serial, mark_format), bits,
                             strength=strength,
                             jpeg_quality=jpeg_quality, force=True, max_pixels=max_pixels,
                             metadata=meta)
        record = profile.register_work(
            serial, sha256_original=sha_orig, sha256_marked=facts["sha256_marked"],
            original_name=src.name, marked_name=out.name, fingerprint=facts["fingerprint"],
            mark_params=mark_parameters(strength, mark_format), capture=facts["capture"],
            quality=facts["quality"])
    except BaseException:
        staged.unlink(missing_ok=True)
        profile.release_serials([serial])
        raise
    place_staged(staged, out, force=force)
    return {
        "work_id": record.work_id, "serial": serial,
        "file": str(src), "output": str(out),
        "sha256_original": sha_orig, "sha256_marked": facts["sha256_marked"],
        "width": facts["width"], "height": facts["height"],
        "bit_depth": facts["bit_depth"], **facts["quality"],
        "metadata_dropped": facts["metadata_dropped"],
        "rights_written": facts["rights_written"], "rights_kept": facts["rights_kept"],
        "notes": facts["notes"],
    }


@dataclass(frozen=True)
class PayloadChecker:
    """Says whether decoded bits are a valid payload of one owner (picklable, for workers).

    Valid: the owner's tag, a serial above 0, and the keyed payload tag of
    that serial (:func:`claimkit.evidence.keys.derive_payload_tag`).
    """

    owner_tag: int
    tag_key: bytes = field(repr=False)
    serials: int = 0    # serials 1..serials allocated so far: the payloads listed for decoding

    def __call__(self, bits) -> bool:
        p = payload.unpack(bits)
        if p["owner_tag"] != self.owner_tag or p["serial"] <= 0:
            return False
        want = derive_payload_tag(self.tag_key, self.owner_tag, p["serial"])
        return hmac.compare_digest(want.to_bytes(3, "big"), p["tag"].to_bytes(3, "big"))

    @property
    def candidates(self) -> payload.PayloadList:
        """The payloads of every allocated serial (:class:`claimkit.mark.payload.PayloadList`)."""
        return _allocated_payloads(self.owner_tag, self.tag_key, self.serials)


# Serials listed for decoding at most (the most recent ones beyond): 100 000 payloads and their
# codewords take about 20 MB and a second to derive; older serials are left to the decoder.
MAX_LISTED = 100_000


@lru_cache(maxsize=2)
def _allocated_payloads(owner_tag: int, tag_key: bytes, serials: int) -> payload.PayloadList:
    """Payload bits of serials 1..``serials`` (the last ``MAX_LISTED`` of them), field by field."""
    first = max(1, serials - MAX_LISTED + 1)
    serial = np.arange(first, serials + 1, dtype=np.int64)
    tag = np.asarray([derive_payload_tag(tag_key, owner_tag, int(s)) for s in serial], dtype=np.int64)
    cols = []
    for (_, width), value in zip(payload.FIELDS, (np.full_like(serial, owner_tag), serial, tag),
                                 strict=True):
        cols.append((value[:, None] >> np.arange(width - 1, -1, -1)[None, :]) & 1)
    return payload.PayloadList(np.concatenate(cols, axis=1).astype(np.uint8))


def owner_payload_check(profile) -> PayloadChecker:
    """The payload check of an open profile (needs its secrets), listing its allocated serials."""
    return PayloadChecker(profile.owner_tag, profile.payload_tag_key(),
                          int(profile.registry.meta("next_serial")) - 1)


@dataclass(frozen=True)
class ExpectedPayload:
    """For an expert holding disclosures: valid only if it is a disclosed work's payload."""

    rows: tuple[tuple[int, ...], ...]

    def __call__(self, got) -> bool:
        return tuple(int(b) for b in np.asarray(got, dtype=np.uint8)) in self.rows

    @property
    def candidates(self) -> payload.PayloadList:
        """The disclosed payloads, the only ones listed (as the owner's check lists its own)."""
        return payload.PayloadList(np.asarray(self.rows, dtype=np.uint8))


def expected_payload_check(*payloads: np.ndarray) -> ExpectedPayload:
    """For an expert holding the disclosure of these works: valid only for their payloads.

    It lists them for the decoder too, so that an examination the owner made
    with the list of allocated payloads re-runs to the same finding.
    """
    return ExpectedPayload(tuple(tuple(int(b) for b in np.asarray(p, dtype=np.uint8)) for p in payloads))


def known_owner_bits(owner_tag: int) -> np.ndarray:
    """The payload bits fixed by the owner tag (the rest unknown, -1)."""
    known = np.full(pattern.PAYLOAD_BITS, -1, dtype=np.int64)
    known[:16] = payload.pack(owner_tag, 0, 0)[:16]
    return known


def examine_picture(pic: Picture, seed: bytes | MarkKeys, *, owner_tag: int | None = None, payload_check=None,
                    threshold: float = detect.DEFAULT_THRESHOLD, decoys: int = 0,
                    workers: int = 1) -> Finding:
    """Examine a decoded picture for the mark of ``seed`` (no registry lookup).

    ``owner_tag`` is the tag of the owner whose payloads are looked for (public:
    it is in every work record); the decoder keeps to its bits, which makes
    weak marks decodable more often. Give it wherever it is known.
    """
    _check_size(pic, MIN_EXAMINE_SIDE, "examination")
    # Convert only the window the detector will read at native resolution (large
    # photos are examined on a central window; see detect.MAX_EXAMINE_PIXELS), and
    # the whole picture reduced once for the coarse views (mark.scales). A picture
    # read with read_for_examination holds that window and that overview only.
    shape = (pic.height, pic.width)
    r0, c0, h, w = detect.central_window(shape)
    step = scales.overview_step(shape)
    if pic.region is not None:
        if pic.region != (r0, c0, h, w):
            raise ValueError(f"picture holds {pic.region}, not the examined window {(r0, c0, h, w)}")
        window = to_luma(pic.pixels)
        if pic.overview is not None:
            overview, step = to_luma(pic.overview), pic.overview_step
        else:   # no overview: the coarse views come from the window alone
            shape, overview, step = window.shape, None, 1
    elif (r0, c0, h, w) == (0, 0, *shape):
        window, overview = to_luma(pic.pixels), None
    else:
        window, overview = to_luma(pic.pixels[r0:r0 + h, c0:c0 + w]), _overview(pic.pixels, step)
    finding = scales.examine(
        window, seed, overview=overview, step=step, shape=shape, payload_check=payload_check,
        payload_space=payload.PAYLOAD_SPACE,
        known_bits=None if owner_tag is None else known_owner_bits(owner_tag),
        payload_candidates=getattr(payload_check, "candidates", None),
        threshold=threshold, decoys=decoys, workers=workers, offset=(r0, c0))
    g = finding.geometry
    if g and "level" not in g:   # found at native resolution, in the window
        g["shift_px"] = [round(g["shift_px"][0] + c0, 2), round(g["shift_px"][1] + r0, 2)]
        g["examined_window"] = [c0, r0, w, h]
    return finding


def _overview(pixels: np.ndarray, step: int) -> np.ndarray:
    """The whole picture's luma box-reduced by ``step``, as ``read_for_examination`` makes it.

    Pillow's ``reduce`` on 8-bit pixels (the reader's own overview, so a
    picture read whole gives the finding of one read through its window);
    other pixels are averaged in blocks of their luma.
    """
    if pixels.dtype == np.uint8 and pixels.ndim in (2, 3):
        from PIL import Image

        return to_luma(np.asarray(Image.fromarray(pixels).reduce(step)) if step > 1 else pixels)
    return scales.decimate(to_luma(pixels), step)


def examine_file(profile, path: str | os.PathLike, *, threshold: float = detect.DEFAULT_THRESHOLD,
                 decoys: int = 0, max_pixels: int | None = None,
                 workers: int = 1) -> tuple[dict, Finding]:
    """Examine one file blind with the owner's key and match the payload to the registry.

    Returns the JSON report (the ``examine --json`` contract) and the full finding.
    """
    return examine_read(profile, read_for_examination(path, max_pixels=max_pixels),
                        threshold=threshold, decoys=decoys, workers=workers)


def examine_read(profile, pic: Picture, *, threshold: float = detect.DEFAULT_THRESHOLD,
                 decoys: int = 0, workers: int = 1) -> tuple[dict, Finding]:
    """:func:`examine_file` of a copy already read by :func:`read_for_examination`."""
    finding = examine_picture(pic, mark_keys(profile), owner_tag=profile.owner_tag,
                              payload_check=owner_payload_check(profile),
                              threshold=threshold, decoys=decoys, workers=workers)
    return report_for(pic.path, pic, finding, profile), finding


def read_for_examination(path: str | os.PathLike, *, max_pixels: int | None = None,
                         method: str = CURRENT_EXAMINATION_METHOD,
                         keep_whole: bool = False) -> Picture:
    """Read a copy for :func:`examine_picture`: only the window the detector reads is converted.

    Large photos are examined on a central window (``detect.MAX_EXAMINE_PIXELS``);
    copying the rest of a 24-megapixel picture out of the decoder would cost
    about half as much as decoding it. The window holds the pixels ``read_picture``
    gives there for the examination ``method`` (a colour JPEG's luma plane
    under the current method; see :data:`claimkit.imageio.EXAMINATION_METHODS`);
    the coarse views come from the whole picture box-reduced by the decoder
    (``Picture.overview``, luma too under that method). ``keep_whole`` keeps the
    whole decoded picture as well (``Picture.whole``), for the content line.
    """
    return read_picture(path, max_pixels=max_pixels, region=detect.central_window,
                        overview=scales.overview_step, method=method, keep_whole=keep_whole)


def report_for(path: Path, pic: Picture, finding: Finding, profile=None) -> dict:
    """The per-file JSON object of ``examine --json``.

    The hash is that of the bytes ``pic`` was decoded from (read once), when known.
    """
    rep = {"file": str(path), "sha256": pic.sha256 or sha256_file(path),
           "width": pic.width, "height": pic.height}
    rep.update(finding.to_json())
    # How the pixels became luma: verify re-runs an examination by this method.
    rep["examination_method"] = pic.examination_method or LUMA_FROM_RGB
    rep["work_id"] = None
    rep["registered"] = False
    if finding.payload_valid and finding.payload_bits is not None:
        p = payload.unpack(finding.payload_bits)
        rep["serial"] = p["serial"]
        work = profile.work_by_payload(p["owner_tag"], p["serial"]) if profile is not None else None
        if work is not None:
            rep["work_id"] = work.work_id
            rep["registered"] = True
        else:
            rep["work_id"] = work_id_for(p["owner_tag"], p["serial"])
    rep.update(finding_words(finding))
    return rep


#: What ``removal_suspected`` means, in words (examine, scan and the dossier use it).
REMOVAL_TEXT = ("The owner's synchronisation pattern is clearly present, but no keyed claim was "
                "found: the mark may have been stripped by an estimation attack, or the pattern "
                "copied onto this picture. This is a trace to investigate, not a claim.")


def finding_words(finding: Finding) -> dict:
    """The finding's bound and geometry in words (:mod:`claimkit.words`), beside its numbers.

    A finding with ``removal_suspected`` also gets ``removal_text`` (:data:`REMOVAL_TEXT`).
    """
    out = {"false_alarm_text": words.probability(finding.log10_false_alarm),
           "geometry_text": words.geometry(finding.geometry)}
    if finding.removal_suspected:
        out["removal_text"] = REMOVAL_TEXT
    return out
