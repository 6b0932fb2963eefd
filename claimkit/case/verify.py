"""``claimkit verify``: check a hand-over bundle as the other side would, trusting nothing in it.

Policy (what must hold) is kept apart from mechanics (how each thing is read):
every check runs, each failure is named, and the verdict is "all passed" or
not. Checks, in order:

1. the bundle itself: a zip (or folder) with no absolute paths, no ``..``,
   no links, no duplicate names, within size limits;
2. the manifest: its Ed25519 signature by the key in the bundle, every file
   listed present with its SHA-256, and no file unlisted;
3. the key: the manifest, the case, the work records and the disclosures all
   name the same public key;
4. each key disclosure: record and disclosure signatures, the key
   commitment, each timestamp token (RFC 3161) and its Merkle inclusion;
5. the custody log copy: every signature and the hash chain, and that every
   exhibit's intake and examination are logged with the right hashes;
6. each exhibit against its intake record; each finding against its exhibit;
7. each examination re-run from the disclosed detection key, and every stored
   number compared (the decoy control and the alignment included); the
   robustness battery re-run on the registered marked file, row by row;
8. the dossier data rebuilt from the bundle and compared byte for byte with
   ``report/dossier.json``; the figures redrawn and compared pixel for pixel;
   the HTML re-rendered and compared; the PDF's PAdES signature checked, and
   its signed content compared with the PDF re-rendered from the data.
"""

from __future__ import annotations

import io
import json
import math
import os
import shutil
import stat
import tempfile
import zipfile
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

import numpy as np

from claimkit import __version__
from claimkit.errors import CheckFailed, InputError

__all__ = ["MAX_BUNDLE_BYTES", "VerifyReport", "safe_extract", "verify_bundle"]

MAX_BUNDLE_BYTES = 4 << 30      # unpacked size limit (a guard against zip bombs)
MAX_FILES = 100_000


#: Outcomes of a check. ``unpinned``: it held, but rests on an anchor the bundle brought
#: (the user pinned none); ``skipped``: left out on request; ``not done``: could not be
#: done (no key disclosure), which fails the verification.
PASSED, FAILED, UNPINNED, SKIPPED, NOT_DONE = "ok", "failed", "unpinned", "skipped", "not done"


@dataclass
class VerifyReport:
    """Every check and its outcome; ``out_of_band`` lists what the user must compare
    through another channel before trusting an ``unpinned`` check."""

    bundle: str
    checks: list[dict] = field(default_factory=list)
    out_of_band: list[str] = field(default_factory=list)

    def add(self, name: str, ok: bool, detail: str = "", *, status: str | None = None) -> bool:
        status = status or (PASSED if ok else FAILED)
        # "ok" is true or false only for a check that was decided on the user's terms;
        # an unpinned, skipped or undone check is never reported as ok.
        self.checks.append({"check": name, "ok": bool(ok) if status in (PASSED, FAILED)
                            else None, "status": status, "detail": detail})
        return ok

    @property
    def ok(self) -> bool:
        return bool(self.checks) and not self.failures

    @property
    def failures(self) -> list[dict]:
        return [c for c in self.checks if c["status"] in (FAILED, NOT_DONE)]

    @property
    def unpinned(self) -> list[dict]:
        return [c for c in self.checks if c["status"] == UNPINNED]


# ---------------------------------------------------------------- unpacking

def _unsafe_name(name: str) -> str | None:
    if not name or "\\" in name or "\x00" in name:
        return "has a backslash or an empty or NUL name"
    p = PurePosixPath(name)
    if p.is_absolute() or name.startswith("/") or (len(name) > 1 and name[1] == ":"):
        return "is an absolute path"
    if any(part == ".." for part in p.parts):
        return "climbs out of the bundle (..)"
    return None


def safe_extract(zip_path: Path, dest: Path) -> list[str]:
    """Unpack a bundle zip into ``dest``, refusing anything that could escape it.

    Raises
    ------
    CheckFailed
        For an entry with an absolute path, ``..``, a link, a device, a
        duplicate name, or sizes beyond the limits.
    """
    try:
        zf = zipfile.ZipFile(zip_path)
    except (zipfile.BadZipFile, OSError) as exc:
        raise InputError(f"not a readable zip file ({exc})", path=zip_path) from None
    names = []
    total = 0
    with zf:
        infos = zf.infolist()
        if len(infos) > MAX_FILES:
            raise CheckFailed(f"bundle holds {len(infos)} entries (limit {MAX_FILES})",
                              path=zip_path)
        seen = set()
        for info in infos:
            why = _unsafe_name(info.filename)
            if why:
                raise CheckFailed(f"refused entry {info.filename!r}: it {why}", path=zip_path)
            mode = (info.external_attr >> 16) & 0xFFFF
            # Many zip writers store permission bits only; a file type, when present, must
            # be a regular file or a folder.
            if stat.S_IFMT(mode) and not (stat.S_ISREG(mode) or stat.S_ISDIR(mode)):
                kind = "a symbolic link" if stat.S_ISLNK(mode) else "not a regular file"
                raise CheckFailed(f"refused entry {info.filename!r}: it is {kind}", path=zip_path)
            norm = str(PurePosixPath(info.filename))
            if norm in seen:
                raise CheckFailed(f"refused entry {info.filename!r}: the name appears twice",
                                  path=zip_path)
            seen.add(norm)
            total += info.file_size
            if total > MAX_BUNDLE_BYTES:
                raise CheckFailed("bundle unpacks to more than the size limit", path=zip_path)
        for info in infos:
            if info.is_dir():
                continue
            target = dest / PurePosixPath(info.filename)
            if not str(target.resolve()).startswith(str(dest.resolve()) + os.sep):
                raise CheckFailed(f"refused entry {info.filename!r}: it leaves the bundle",
                                  path=zip_path)
            target.parent.mkdir(parents=True, exist_ok=True)
            with zf.open(info) as src, open(target, "wb") as out:
                shutil.copyfileobj(src, out, 1 << 20)
            names.append(str(PurePosixPath(info.filename)))
    return sorted(names)


def _folder_files(root: Path) -> list[str]:
    out = []
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        for d in list(dirnames):
            if Path(dirpath, d).is_symlink():
                raise CheckFailed(f"refused {Path(dirpath, d).relative_to(root)}: a symbolic link",
                                  path=root)
        for f in filenames:
            p = Path(dirpath, f)
            rel = p.relative_to(root)
            if p.is_symlink():
                raise CheckFailed(f"refused {rel}: a symbolic link", path=root)
            if any(x.startswith(".") for x in rel.parts):
                continue
            out.append(rel.as_posix())
    return sorted(out)


def _inside(root: Path, rel, folder: str) -> str | None:
    """Why a path named inside a bundle file is unsafe, or None when it is fine."""
    if not isinstance(rel, str):
        return f"{rel!r} is not a path"
    why = _unsafe_name(rel)
    if why:
        return f"{rel!r} {why}"
    if not rel.startswith(folder + "/"):
        return f"{rel!r} is outside {folder}/"
    p = root / rel
    if p.is_symlink():
        return f"{rel!r} is a symbolic link"
    try:
        p.resolve().relative_to(root.resolve())
    except ValueError:
        return f"{rel!r} leads out of the bundle"
    return None


def _path_audit(root: Path, exhibits: list[dict], findings: dict) -> list[str]:
    """Every path that a JSON file of the bundle names, checked before anything is read."""
    import re

    bad = []
    for ex in exhibits:
        i = ex.get("exhibit_id")
        if not isinstance(i, str) or not re.fullmatch(r"E\d{2,6}", i):
            bad.append(f"intake record names the exhibit {i!r}")
            continue
        why = _inside(root, ex.get("file"), "exhibits")
        if why:
            bad.append(f"{i}: intake record path {why}")
        f = findings.get(i)
        if f is None:
            continue
        why = _inside(root, (f.get("arrays") or {}).get("file"), "findings")
        if why:
            bad.append(f"{i}: finding arrays path {why}")
        if f.get("reference"):
            why = _inside(root, f["reference"].get("file"), "references")
            if why:
                bad.append(f"{i}: finding reference path {why}")
    from claimkit.dossier.data import DISCLOSURES

    folder = root / DISCLOSURES
    if folder.is_dir():
        for d in sorted(folder.iterdir()):
            try:
                doc = json.loads((d / "disclosure.json").read_bytes())
                stamps = doc.get("timestamps", [])
            except (OSError, ValueError, AttributeError):
                continue
            for st in stamps if isinstance(stamps, list) else []:
                for key in ("token_file", "tsa_cert_file"):
                    rel = st.get(key) if isinstance(st, dict) else None
                    why = _inside(d, rel, "timestamps") if rel is not None else None
                    if why:
                        bad.append(f"{d.name}: disclosure {key} {why}")
    return bad


# ---------------------------------------------------------------- comparisons

def _close(a, b, path: str = "") -> list[str]:
    """Differences between two JSON values; floats equal up to the stored precision."""
    if isinstance(a, dict) and isinstance(b, dict):
        out = []
        for k in sorted(set(a) | set(b)):
            if k in ("time", "examined_at"):
                continue
            if k not in a or k not in b:
                out.append(f"{path}.{k}: present on one side only")
            else:
                out += _close(a[k], b[k], f"{path}.{k}")
        return out
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [f"{path}: {len(a)} items stored, {len(b)} reproduced"]
        out = []
        for i, (x, y) in enumerate(zip(a, b)):
            out += _close(x, y, f"{path}[{i}]")
        return out
    if isinstance(a, bool) or isinstance(b, bool) or not isinstance(a, (int, float)) \
            or not isinstance(b, (int, float)):
        return [] if a == b else [f"{path}: stored {a!r}, reproduced {b!r}"]
    if a == b:
        return []
    # Rounded values may differ by one unit in their last stored digit.
    digits = max(_decimals(a), _decimals(b))
    tol = 1.01 * 10.0 ** (-digits) if digits else 0.0
    if isinstance(a, float) and isinstance(b, float) and a != 0 and b != 0 and \
            abs(math.log10(abs(a)) - math.log10(abs(b))) < 1e-9:
        return []
    return [] if abs(a - b) <= tol else [f"{path}: stored {a!r}, reproduced {b!r}"]


def _decimals(x) -> int:
    t = repr(x)
    if "e" in t or "." not in t:
        return 0
    return len(t.split(".")[1])


# ---------------------------------------------------------------- the checks

def _check_manifest(root: Path, files: list[str], rep: VerifyReport):
    from claimkit.dossier.build import MANIFEST, MANIFEST_SIG
    from claimkit.dossier.data import PUBLIC_KEY
    from claimkit.evidence import signing
    from claimkit.evidence.storage import sha256_file

    try:
        body = (root / MANIFEST).read_bytes()
        sig = (root / MANIFEST_SIG).read_bytes()
        pub = signing.load_public_pem((root / PUBLIC_KEY).read_bytes())
    except FileNotFoundError as exc:
        rep.add("manifest", False, f"{Path(exc.filename).name} missing from the bundle")
        return None, None
    except ValueError:
        rep.add("manifest", False, f"{PUBLIC_KEY} is not an Ed25519 public key")
        return None, None
    rep.add("manifest signature", signing.verify(pub, body, sig),
            "manifest.json is signed by the key in the bundle" if signing.verify(pub, body, sig)
            else "manifest.json: the Ed25519 signature does not verify (manifest altered or "
                 "signed by another key)")
    try:
        manifest = json.loads(body)
        listed = {f["path"]: f for f in manifest["files"]}
    except (ValueError, KeyError, TypeError):
        rep.add("manifest", False, "manifest.json is not a claimkit manifest")
        return None, pub
    fp = signing.fingerprint(signing.raw_public(pub))
    rep.add("manifest signer", manifest.get("signer", {}).get("public_key_sha256") == fp,
            f"signer key SHA-256 {fp}")
    bad = []
    for rel, f in sorted(listed.items()):
        if _unsafe_name(rel):
            bad.append(f"{rel}: unsafe path in the manifest")
            continue
        p = root / rel
        if not p.is_file():
            bad.append(f"{rel}: listed but missing")
        elif sha256_file(p) != f["sha256"]:
            bad.append(f"{rel}: SHA-256 differs from the manifest (file altered)")
    # A case folder still holds the masters its bundle withholds: named in the manifest by
    # hash, they are left alone when the bytes are the ones named.
    withheld = {w.get("path"): w.get("sha256") for w in manifest.get("withheld", [])
                if isinstance(w, dict)}
    extra = sorted(rel for rel in set(files) - set(listed) - {MANIFEST, MANIFEST_SIG}
                   if not (rel in withheld and sha256_file(root / rel) == withheld[rel]))
    bad += [f"{rel}: in the bundle but not in the manifest" for rel in extra]
    rep.add("file hashes", not bad,
            "; ".join(bad) if bad else f"{len(listed)} files, every SHA-256 matches")
    return manifest, pub


def _keys_of(chk) -> tuple:
    from claimkit.mark import payload

    bits = payload.pack(chk.owner_tag, chk.serial, chk.payload_tag)
    return (chk.detection_seed, bits, chk)


def _check_disclosures(root: Path, fp: str, rep: VerifyReport, *, tsa_roots=None,
                       disclosure: Path | None = None) -> dict:
    """Check each work's evidence in the bundle, and the key disclosures wherever they came
    from; returns work_id -> (seed, payload bits, check) for the works whose keys verified."""
    from claimkit.dossier.data import DISCLOSURES
    from claimkit.evidence.disclose import check_disclosure

    out: dict = {}
    records: dict[str, bytes] = {}
    tsas: set[str] = set()
    folder = root / DISCLOSURES
    for d in sorted(folder.iterdir()) if folder.is_dir() else []:
        try:
            chk = check_disclosure(d, tsa_roots=tsa_roots)
        except InputError as exc:
            rep.add(f"work {d.name}", False, exc.message)
            continue
        probs = list(chk.problems)
        if chk.public_key_sha256 != fp:
            probs.append("its public key is not the bundle's (key replaced)")
        rep.add(f"work {d.name}", not probs, "; ".join(probs) if probs else
                f"record signature{', key commitment' if chk.keys_included else ''} and "
                f"{len(chk.timestamps)} timestamp token(s) verified"
                + ("" if tsa_roots is not None else " (against the TSA certificate in the "
                   "bundle)"))
        tsas.update(t.get("tsa") or "?" for t in chk.timestamps)
        records[chk.work_id or d.name] = (d / "work-record.json").read_bytes()
        if not probs and chk.keys_included:
            out[chk.work_id] = _keys_of(chk)
    if tsas and tsa_roots is None:
        rep.add("timestamp authority", True, "the tokens verify against the TSA certificate "
                f"the bundle brings ({', '.join(sorted(tsas))}); no --tsa-roots pinned",
                status=UNPINNED)
        rep.out_of_band.append("the timestamp authority: give its root certificate, obtained "
                               "from the authority itself, with --tsa-roots FILE")
    elif tsas:
        rep.add("timestamp authority", True, "every token chains to a pinned root "
                f"({', '.join(sorted(tsas))})")
    if disclosure is not None:
        _check_delivered(Path(disclosure), fp, records, tsa_roots, out, rep)
    return out


def _check_delivered(path: Path, fp: str, records: dict, tsa_roots, out: dict,
                     rep: VerifyReport) -> None:
    """A disclosure delivered apart from the bundle: one folder, or a folder of them."""
    from claimkit.evidence.disclose import check_disclosure

    if not path.is_dir():
        raise InputError("not a disclosure folder", path=path)
    folders = [path] if (path / "disclosure.json").is_file() else \
        sorted(d for d in path.iterdir() if d.is_dir() and (d / "disclosure.json").is_file())
    if not folders:
        raise InputError("holds no disclosure.json", path=path)
    for d in folders:
        try:
            chk = check_disclosure(d, tsa_roots=tsa_roots)
        except InputError as exc:
            rep.add(f"disclosure {d.name}", False, exc.message)
            continue
        probs = list(chk.problems)
        if chk.public_key_sha256 != fp:
            probs.append("signed by another key than the bundle's")
        if not chk.keys_included:
            probs.append("holds no key material")
        if chk.work_id not in records:
            probs.append(f"its work {chk.work_id} is not in the bundle")
        elif (d / "work-record.json").read_bytes() != records[chk.work_id]:
            probs.append("its work record differs from the bundle's")
        rep.add(f"disclosure {d.name}", not probs, "; ".join(probs) if probs else
                f"delivered separately; key material for {chk.work_id} ({chk.mark_format}) "
                "matches the record's key commitment")
        if not probs:
            out[chk.work_id] = _keys_of(chk)


def _check_custody(root: Path, pub, exhibits: list[dict], findings: dict, rep: VerifyReport):
    from claimkit.dossier.data import CUSTODY_COPY
    from claimkit.evidence.excerpt import verify_excerpt
    from claimkit.evidence.storage import sha256_file

    log = verify_excerpt(root / CUSTODY_COPY, pub)
    rep.add("custody log", log.ok, "; ".join(str(p) for p in log.problems) if log.problems
            else f"excerpt of {log.lines} entries: {len(log.entries)} of this case and its "
                 "works in full and signed, the others by hash; the chain recomputes")
    intake = {}
    examined = {}
    case_id = None
    try:
        case_id = json.loads((root / "case.json").read_bytes()).get("case_id")
    except (OSError, ValueError):
        pass
    for e in log.entries:
        d = e.get("details", {})
        if d.get("case_id") != case_id:
            continue
        if e["action"] == "disputed file taken in":
            intake[d.get("exhibit_id")] = e["items"]
        elif e["action"] == "exhibit examined":
            examined[d.get("exhibit_id")] = e["items"]
    probs = []
    for ex in exhibits:
        i = ex["exhibit_id"]
        rec = root / "exhibits" / f"{i}.json"
        if intake.get(i, {}).get("exhibit") != ex["sha256"]:
            probs.append(f"{i}: no custody entry takes in these bytes")
        elif rec.is_file() and intake[i].get("intake_record") != sha256_file(rec):
            probs.append(f"{i}: the intake record differs from the one logged")
        if i in findings:
            fpath = root / "findings" / f"{i}.json"
            if examined.get(i, {}).get("finding") != sha256_file(fpath):
                probs.append(f"{i}: the stored finding is not the one logged at examination")
    present = {ex["exhibit_id"] for ex in exhibits}
    for i in sorted(set(intake) - present):
        probs.append(f"{i}: taken in according to the custody log, but not in the bundle "
                     "(exhibit removed)")
    rep.add("custody of exhibits", not probs,
            "; ".join(probs) if probs else "every intake and examination is logged with its hashes")


def _rerun(root: Path, ex: dict, finding: dict, keys: dict, rep: VerifyReport) -> None:
    from claimkit.case.align import align
    from claimkit.case.examine import decoy_summary
    from claimkit.imageio import read_picture, to_luma
    from claimkit.mark import detect, payload
    from claimkit.workflow import examine_picture

    i = ex["exhibit_id"]
    if not keys:
        rep.add(f"{i} re-run", False, "no verified disclosure, so no key to re-run with")
        return
    seed = next(iter(keys.values()))[0]
    wanted = [bits for _, bits, _ in keys.values()]

    def check(got) -> bool:
        g = np.asarray(got, dtype=np.uint8)
        return any(np.array_equal(g, w) for w in wanted)

    pic = read_picture(root / ex["file"])
    params = finding["examined"]
    owner_tag = payload.unpack(wanted[0])["owner_tag"]   # the same for all of one owner's works
    f = examine_picture(pic, seed, owner_tag=owner_tag, payload_check=check,
                        threshold=params["threshold"], decoys=params["decoys"])
    stored = finding["result"]
    got = f.to_json()
    got["geometry_text"] = detect.describe_in_words(f.geometry)
    diffs = []
    for k, v in got.items():
        diffs += _close(stored.get(k), v, k)
    want_work = stored.get("work_id") if stored.get("detected") else None
    if stored.get("detected"):
        match = [w for w, (_, bits, _) in keys.items()
                 if f.payload_bits is not None and np.array_equal(np.asarray(f.payload_bits,
                                                                             np.uint8), bits)]
        if want_work and match != [want_work]:
            diffs.append(f"work_id: stored {want_work}, the re-run payload names {match or 'none'}")
    diffs += _close(finding["decoy_scores"], [round(float(v), 4) for v in f.decoy_scores],
                    "decoy_scores")
    diffs += _close(finding["decoy_summary"], decoy_summary(f.decoy_scores, f.z_pilot),
                    "decoy_summary")
    with np.load(root / finding["arrays"]["file"]) as arr:
        for name in ("surface", "recovered", "reference"):
            a = arr[name]
            b = getattr(f, name)
            if a.shape != b.shape or not np.allclose(a, b, rtol=1e-4, atol=1e-4):
                diffs.append(f"arrays.{name}: differs from the re-run")
        stored_arrays = {k: arr[k] for k in arr.files}
    al = finding.get("alignment")
    ref = root / (finding.get("reference") or {}).get("file", "")
    if al and al.get("aligned") and not ref.is_file() and \
            finding["reference"].get("kind") != "marked":
        rep.add(f"{i} alignment", True, "not re-run: the file it aligns to is the unmarked "
                "master, withheld from the bundle (report --include-original adds it)",
                status=SKIPPED)
    elif al and al.get("aligned"):
        rpic = read_picture(ref)
        again = align(to_luma(rpic.pixels), to_luma(pic.pixels), f.geometry or None)
        diffs += _close(al, again.numbers, "alignment")
        if "difference" in stored_arrays and not np.array_equal(stored_arrays["difference"],
                                                               again.difference):
            diffs.append("arrays.difference: the difference map differs from the re-run")
    made_with, this = params.get("software"), f"claimkit {__version__}"
    if diffs and made_with and made_with != this:
        diffs.insert(0, f"examined with {made_with} and re-run with {this} (install {made_with} "
                        "to reproduce its numbers to the digit)")
    rep.add(f"{i} re-run", not diffs, "; ".join(diffs[:8]) if diffs else
            f"{'detected' if f.detected else 'not detected'}, log10 P_fa "
            f"{round(f.log10_false_alarm, 4)}, {len(f.decoy_scores)} decoys and every stored "
            "number reproduced")


def _rerun_robustness(root: Path, findings: dict, keys: dict, rep: VerifyReport) -> None:
    """Re-run the robustness battery once per work and compare its table."""
    from claimkit.imageio import read_picture
    from claimkit.workflow import expected_payload_check

    done = set()
    for i, f in sorted(findings.items()):
        rob = f.get("robustness") or {}
        wid = (f.get("match") or {}).get("work_id")
        if rob.get("status") != "run" or wid in done:
            continue
        done.add(wid)
        if wid not in keys:
            rep.add(f"robustness {wid}", False, "no verified disclosure of this work")
            continue
        try:
            from claimkit.stress import run_battery
        except ImportError:
            rep.add(f"robustness {wid}", False, "this claimkit has no robustness battery")
            continue
        seed, bits, _ = keys[wid]
        pic = read_picture(root / f["reference"]["file"])
        rows = run_battery(pic.pixels, seed, expected_payload_check(bits), quick=True)
        from claimkit.case.examine import _jsonable
        again = _jsonable(rows)
        stored = rob.get("rows") or []
        strip = [{k: v for k, v in r.items() if k != "seconds"} for r in stored]
        fresh = [{k: v for k, v in r.items() if k != "seconds"} for r in again]
        diffs = _close(strip, fresh, "rows")
        rep.add(f"robustness {wid}", not diffs, "; ".join(diffs[:6]) if diffs else
                f"{len(fresh)} edits of the registered file re-run, every row reproduced")


def _check_dossier(root: Path, pub, rep: VerifyReport, *, full: bool = True) -> None:
    from claimkit.dossier.build import DATA, HTML, PDF, draw_figures
    from claimkit.dossier.data import build_data
    from claimkit.dossier.pdfsign import check_pdf_signature
    from claimkit.dossier.render import render_html, render_pdf
    from claimkit.evidence.canonical import canonical_json

    try:
        stored = (root / DATA).read_bytes()
    except FileNotFoundError:
        rep.add("dossier data", False, f"{DATA} missing")
        return
    try:
        data = build_data(root)
    except (InputError, CheckFailed, KeyError, ValueError, TypeError) as exc:
        rep.add("dossier data", False, f"cannot be rebuilt from the bundle ({exc})")
        return
    rebuilt = canonical_json(data) + b"\n"
    if rebuilt == stored:
        rep.add("dossier data", True, "report/dossier.json equals the data rebuilt from the "
                                      "findings and records")
    else:
        from claimkit.evidence.canonical import canonicalize
        try:
            diffs = _close(json.loads(stored), canonicalize(data), "dossier")
        except ValueError:
            diffs = ["not JSON"]
        # Settings of the verifier's own engine are not evidence; a difference there means
        # this claimkit is not the one that made the dossier, and is reported as such.
        mine = [x for x in diffs if x.startswith("dossier.method.engine")]
        rest = [x for x in diffs if x not in mine]
        if mine:
            rep.add("software settings", False, "this claimkit's engine settings differ from "
                    "the ones the dossier was made with (numbers may not reproduce): "
                    + "; ".join(mine[:4]))
        if rest or not mine:
            rep.add("dossier data", False, "report/dossier.json differs from the data rebuilt "
                    "from the bundle: " + "; ".join(rest[:6] or ["(byte differences)"]))
    if not full:
        return
    from PIL import Image
    bad = []
    try:
        figs = draw_figures(root, data)
    except (InputError, OSError, KeyError, ValueError) as exc:
        figs = {}
        bad.append(f"cannot be redrawn ({exc})")
    for rel, png in figs.items():
        p = root / rel
        if not p.is_file():
            bad.append(f"{rel}: missing")
            continue
        with Image.open(io.BytesIO(png)) as a, Image.open(p) as b:
            if a.size != b.size or not np.array_equal(np.asarray(a), np.asarray(b.convert(a.mode))):
                bad.append(f"{rel}: does not show the stored data")
    rep.add("figures", not bad, "; ".join(bad) if bad else
            f"{len(figs)} figures redrawn from the stored data, pixel for pixel equal")
    try:
        html = render_html(data, root).encode("utf-8")
        same = (root / HTML).read_bytes() == html
        rep.add("HTML dossier", same, "re-rendered from the data, identical" if same else
                "report/dossier.html is not what the data renders to (edited)")
    except FileNotFoundError:
        rep.add("HTML dossier", False, f"{HTML} missing")
    try:
        pdf = (root / PDF).read_bytes()
    except FileNotFoundError:
        rep.add("PDF signature", False, f"{PDF} missing")
        return
    chk = check_pdf_signature(pdf, pub)
    rep.add("PDF signature", chk.ok, "; ".join(chk.problems) if chk.problems else
            f"PAdES signature by {chk.signer}, certificate issued by the owner's key, "
            "whole file covered")
    unsigned = render_pdf(data, root, root / PDF)
    same = pdf.startswith(unsigned)
    rep.add("PDF content", same, "the signed PDF is exactly the dossier the data renders to"
            if same else "the signed PDF's content is not what the data renders to "
                         "(edited, or rendered with another version of reportlab)")


def _check_signer(fp: str, expect_keys: tuple[str, ...], rep: VerifyReport) -> None:
    """Policy: the signer is trusted only as far as the user pinned its key."""
    if not expect_keys:
        rep.add("signer key", True, f"the bundle is signed by the key with SHA-256 {fp}; "
                "no --expect-key pinned, so only the bundle vouches for it", status=UNPINNED)
        rep.out_of_band.append(f"the owner's key fingerprint SHA-256 {fp}: compare it with the "
                               "one the owner gives you through another channel (phone, "
                               "letter, their own web site), then pass it with --expect-key")
        return
    want = {k.strip().lower().removeprefix("sha256:") for k in expect_keys}
    rep.add("signer key", fp in want, f"SHA-256 {fp}, as pinned" if fp in want else
            f"the bundle is signed by the key with SHA-256 {fp}, not by the expected "
            f"{', '.join(sorted(want))}")


def verify_bundle(path: str | os.PathLike, *, rerun: bool = True,
                  robustness: bool = True, expect_keys: tuple[str, ...] = (),
                  tsa_roots: list | None = None,
                  disclosure: str | os.PathLike | None = None) -> VerifyReport:
    """Verify a bundle zip or an unpacked bundle/case folder; never raises for a failed check.

    Parameters
    ----------
    path : path-like
        The zip, or a folder laid out like one (a case folder after ``report``).
    rerun : bool
        Re-run each examination and redraw the dossier (the slow part). Without
        it only hashes, signatures, tokens and the custody chain are checked,
        and the report says so with a "skipped" re-run check.
    robustness : bool
        Also re-run the robustness battery (with ``rerun``); skipping it is
        reported as a failed check.
    expect_keys : tuple of str
        The owner key fingerprints (SHA-256 of the raw Ed25519 key, hex) the user
        pins. Without any, the signer is reported ``unpinned``.
    tsa_roots : list of Certificate, optional
        The timestamp authorities the user trusts; without them the timestamp
        authority is reported ``unpinned``.
    disclosure : path, optional
        A key disclosure delivered apart from the bundle (a disclosure folder or
        a folder of them). Without key material from here or from the bundle
        the re-run cannot be done, and that fails the verification unless
        ``rerun`` is off.
    """
    from claimkit.dossier.data import case_files
    from claimkit.evidence import signing

    path = Path(path)
    rep = VerifyReport(str(path))
    if not path.exists():
        raise InputError("no such file or folder", path=path)
    tmp = None
    try:
        if path.is_dir():
            root = path
            try:
                files = _folder_files(root)
            except CheckFailed as exc:
                rep.add("bundle layout", False, exc.message)
                return rep
        else:
            tmp = Path(tempfile.mkdtemp(prefix="claimkit-verify-"))
            try:
                files = safe_extract(path, tmp)
            except CheckFailed as exc:
                rep.add("bundle layout", False, exc.message)
                return rep
            root = tmp
        rep.add("bundle layout", True, f"{len(files)} files, no links, no paths leaving the bundle")
        manifest, pub = _check_manifest(root, files, rep)
        if pub is None:
            return rep
        fp = signing.fingerprint(signing.raw_public(pub))
        _check_signer(fp, expect_keys, rep)
        try:
            case, exhibits, findings = case_files(root)
        except (InputError, KeyError, ValueError) as exc:
            rep.add("case files", False, str(exc))
            return rep
        unsafe = _path_audit(root, exhibits, findings)
        rep.add("paths in the bundle", not unsafe, "; ".join(unsafe) if unsafe else
                "every path named in the bundle's records stays inside it")
        if unsafe:
            return rep
        owner_fp = case.get("owner", {}).get("public_key_sha256")
        rep.add("case key", owner_fp == fp, "case.json names the bundle's key" if owner_fp == fp
                else "case.json names another key than the bundle's (key replaced)")
        listed = {f["path"] for f in (manifest or {}).get("files", [])}
        keys = _check_disclosures(root, fp, rep, tsa_roots=tsa_roots, disclosure=disclosure)
        if rerun and not keys:
            rep.add("re-run", False, "not done: no key disclosure (the bundle holds no key "
                    "material; give the one the owner delivered with --disclosure DIR, or "
                    "ask for --no-rerun to check integrity only)", status=NOT_DONE)
            rerun = robustness = False
            keyless = True
        else:
            keyless = False
        _check_custody(root, pub, exhibits, findings, rep)
        from claimkit.evidence.storage import sha256_file
        for ex in exhibits:
            i = ex["exhibit_id"]
            rel = ex.get("file", "")
            p = root / rel
            if _unsafe_name(rel) or not p.is_file():
                rep.add(f"{i} exhibit", False, f"{rel}: missing (exhibit removed)")
                continue
            if rel not in listed:
                rep.add(f"{i} exhibit", False, f"{rel}: not in the manifest")
            got = sha256_file(p)
            rep.add(f"{i} exhibit", got == ex["sha256"],
                    f"{rel}: SHA-256 as at intake" if got == ex["sha256"] else
                    f"{rel}: SHA-256 {got[:16]}... differs from the intake record")
            f = findings.get(i)
            if f is None:
                rep.add(f"{i} finding", False, "not examined (no finding in the bundle)")
                continue
            if f.get("exhibit_sha256") != ex["sha256"]:
                rep.add(f"{i} finding", False, "the finding is for other bytes than the exhibit")
                continue
            if not rerun:
                continue
            try:
                _rerun(root, ex, f, keys, rep)
            except (InputError, OSError, KeyError, ValueError) as exc:
                rep.add(f"{i} re-run", False, f"cannot be re-run ({exc})")
        if rerun and robustness:
            try:
                _rerun_robustness(root, findings, keys, rep)
            except (InputError, OSError, KeyError, ValueError) as exc:
                rep.add("robustness", False, f"cannot be re-run ({exc})")
        elif rerun:
            rep.add("robustness re-run", False, "skipped on request")
        # Figures, HTML and PDF need no key: they are redrawn whenever a re-run was asked for.
        _check_dossier(root, pub, rep, full=rerun or keyless)
        if not rerun and not keyless:
            rep.add("re-run", True, "skipped on request (--no-rerun): the examinations, "
                    "figures and PDF were not re-derived", status=SKIPPED)
        return rep
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
