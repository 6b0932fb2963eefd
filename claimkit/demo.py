"""``claimkit demo``: the whole job on a fictional case, end to end, in well under a minute.

The scenario (``sample_case/scenario.json``; a copy is built in below for an
installed package) is invented: the photographer Ilse Marrow of Harwick Bay
Studio publishes a photo; the web shop Tidewater Home Goods uses it twice
without a licence, once resized, cropped and recompressed, once also turned.
The photo is scikit-image's ``coffee`` sample, upscaled to a realistic size.

Steps: profile, mark, register, stamp with a local test timestamp authority
(made with ``openssl req``/``openssl ts -reply``; it is for demonstration and
earns no trust), make the two copies, open a case, take them in, examine,
report, export the bundle, verify it.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import time
from collections.abc import Callable
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
from PIL import Image
from skimage import data
from skimage.transform import rescale

from claimkit import words
from claimkit.case.bundle import export_bundle
from claimkit.case.examine import examine_case
from claimkit.case.store import add_exhibit, new_case
from claimkit.dossier.build import build_report
from claimkit.errors import InputError
from claimkit.evidence.profile import Profile
from claimkit.evidence.timestamp import load_certificates
from claimkit.verify import verify_bundle
from claimkit.workflow import mark_file

__all__ = ["SCENARIO", "load_scenario", "make_test_tsa", "run_demo"]

SCENARIO_FILE = Path(__file__).resolve().parent.parent / "sample_case" / "scenario.json"

#: The scenario as shipped in sample_case/scenario.json (used when that folder is not at hand).
SCENARIO = {
    "about": "A fictional scenario for claimkit demo. Every person, business and address is "
             "invented.",
    "photographer": "Ilse Marrow",
    "studio": "Harwick Bay Studio",
    "passphrase": "harwick-bay-demo-only",
    "work": {"title": "Morning cup at the harbour cafe", "picture": "coffee", "upscale": 3,
             "original_name": "harwick-morning-cup.png",
             "published_name": "harwick-morning-cup-web.jpg"},
    "tsa": "Harwick Bay Demo TSA (test only)",
    "case_title": "Tidewater Home Goods: product-page photos",
    "copies": [
        {"name": "tidewater-mug-listing.jpg",
         "source": "https://tidewater-home-goods.example/products/harbour-mug",
         "found": "{day}, while searching the shop's new arrivals", "by": "Ilse Marrow",
         "note": "Used as the main product photo; no licence was issued to Tidewater Home Goods.",
         "edits": {"scale": 0.7, "crop": [0.06, 0.08, 0.94, 0.9], "rotate_deg": 0,
                   "jpeg_quality": 72}},
        {"name": "tidewater-banner.jpg",
         "source": "https://tidewater-home-goods.example/collections/autumn",
         "found": "{day}, collection banner", "by": "Ilse Marrow",
         "note": "Turned slightly and cropped for the banner.",
         "edits": {"scale": 0.8, "crop": [0.1, 0.12, 0.9, 0.85], "rotate_deg": 4,
                   "jpeg_quality": 80}},
    ],
}

# Pictures the demo may use: scikit-image samples without people in them.
ALLOWED_PICTURES = ("coffee", "chelsea", "rocket", "hubble_deep_field", "immunohistochemistry",
                    "retina", "brick", "grass", "gravel", "moon", "coins")

_TSA_CONF = """\
[ tsa ]
default_tsa = demo_tsa

[ demo_tsa ]
dir = {dir}
serial = $dir/serial
crypto_device = builtin
signer_cert = $dir/tsa.pem
certs = $dir/ca.pem
signer_key = $dir/tsa.key
signer_digest = sha256
default_policy = 1.3.6.1.4.1.99999.7.1
digests = sha256, sha384, sha512
accuracy = secs:1
ordering = yes
tsa_name = yes
ess_cert_id_chain = no
ess_cert_id_alg = sha256
"""


def load_scenario() -> dict:
    """``sample_case/scenario.json`` where present, else the built-in copy."""
    if SCENARIO_FILE.is_file():
        return json.loads(SCENARIO_FILE.read_text(encoding="utf-8"))
    return SCENARIO


def _openssl(args: list[str], cwd: Path) -> None:
    if shutil.which("openssl") is None:
        raise InputError("the demo needs the openssl command (Debian: apt-get install openssl)")
    proc = subprocess.run(["openssl", *args], cwd=cwd, capture_output=True, check=False)
    if proc.returncode != 0:
        raise InputError(f"openssl {args[0]} failed: "
                         f"{proc.stderr.decode(errors='replace').strip()[:200]}")


def make_test_tsa(folder: Path, name: str) -> Callable[[bytes], bytes]:
    """A throwaway CA and RFC 3161 authority; returns a function answering a request."""
    folder.mkdir(parents=True, exist_ok=True)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes"]
    _openssl(["req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.pem", "-days", "3650",
              "-subj", f"/O=Harwick Bay Demo/CN={name} Root"], folder)
    _openssl(["req", "-new", *ec, "-keyout", "tsa.key", "-out", "tsa.csr",
              "-subj", f"/O=Harwick Bay Demo/CN={name}"], folder)
    (folder / "tsa.ext").write_text("basicConstraints=CA:FALSE\nkeyUsage=critical,digitalSignature\n"
                                    "extendedKeyUsage=critical,timeStamping\n")
    _openssl(["x509", "-req", "-in", "tsa.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
              "-CAcreateserial", "-out", "tsa.pem", "-days", "3650", "-extfile", "tsa.ext"], folder)
    (folder / "serial").write_text("01\n")
    (folder / "tsa.cnf").write_text(_TSA_CONF.format(dir=folder))

    def reply(tsq: bytes) -> bytes:
        (folder / "request.tsq").write_bytes(tsq)
        _openssl(["ts", "-reply", "-config", "tsa.cnf", "-queryfile", "request.tsq",
                  "-out", "response.tsr"], folder)
        return (folder / "response.tsr").read_bytes()

    return reply


def _picture(name: str, upscale: float) -> np.ndarray:
    if name not in ALLOWED_PICTURES:
        raise InputError(f"picture {name!r} is not one the demo may use ({', '.join(ALLOWED_PICTURES)})")
    img = getattr(data, name)()
    if img.ndim == 2:
        img = np.stack([img] * 3, axis=-1)
    big = rescale(img.astype(np.float64) / 255.0, upscale, channel_axis=2, order=3,
                  anti_aliasing=False)
    return (np.clip(big, 0, 1) * 255 + 0.5).astype(np.uint8)


def make_copy(published: Path, out: Path, edits: dict) -> None:
    """What the shop did: resize, turn, crop, recompress (Pillow's own resampling and JPEG)."""

    with Image.open(published) as im:
        im = im.convert("RGB")
        w, h = im.size
        s = float(edits.get("scale", 1.0))
        im = im.resize((max(1, round(w * s)), max(1, round(h * s))), Image.Resampling.LANCZOS)
        if edits.get("rotate_deg"):
            im = im.rotate(float(edits["rotate_deg"]), resample=Image.Resampling.BICUBIC,
                           fillcolor=(255, 255, 255))
        w, h = im.size
        x0, y0, x1, y1 = edits.get("crop", [0, 0, 1, 1])
        im = im.crop((round(x0 * w), round(y0 * h), round(x1 * w), round(y1 * h)))
        im.save(out, format="JPEG", quality=int(edits.get("jpeg_quality", 75)))


def run_demo(folder: Path | None = None, *, echo: Callable[[str], None] | None = print,
             scenario: dict | None = None, decoys: int | None = None,
             robustness: bool = True) -> dict:
    """Run the fictional case end to end in ``folder``; returns what was made and the verdict.

    Parameters
    ----------
    folder : Path, optional
        A new or empty folder (default: ``claimkit-demo-DATE`` in the current folder).
    echo : callable, optional
        Where progress lines go (None: nowhere).
    scenario : dict, optional
        Default :func:`load_scenario`; tests pass a smaller picture.
    decoys : int, optional
        Decoy keys per examination (default: the case default).
    robustness : bool
        Run the robustness battery on the published file (the dossier's table).
    """


    say = echo or (lambda s: None)
    sc = scenario or load_scenario()
    t0 = time.perf_counter()
    if folder is None:
        folder = Path(f"claimkit-demo-{datetime.now(timezone.utc):%Y%m%d-%H%M%S}")
    # Absolute, because the local timestamp authority runs openssl in its own folder.
    folder = Path(folder).absolute()
    if folder.exists() and (not folder.is_dir() or any(folder.iterdir())):
        raise InputError("already exists and is not empty; give a new folder", path=folder)
    folder.mkdir(parents=True, exist_ok=True)
    studio, web, home = folder / "studio", folder / "found-online", folder / "profile"
    studio.mkdir()
    web.mkdir()
    say(f"Scenario (fictional): {sc['photographer']} of {sc['studio']} finds her photo "
        f"\"{sc['work']['title']}\" on the web shop Tidewater Home Goods.")

    profile = Profile.create(home, sc["photographer"], sc["passphrase"].encode())
    say(f"1. profile for {profile.owner} in {home} (demo passphrase: {sc['passphrase']})")
    try:
        pixels = _picture(sc["work"]["picture"], float(sc["work"]["upscale"]))
        original = studio / sc["work"]["original_name"]
        Image.fromarray(pixels).save(original, format="PNG")
        published = studio / sc["work"]["published_name"]
        rep = mark_file(profile, original, published)
        say(f"2. marked {original.name} ({pixels.shape[1]}x{pixels.shape[0]}) as {rep['work_id']}: "
            f"PSNR {rep['psnr_db']:.1f} dB, {words.ssim(rep)}; published {published.name}")
        reply = make_test_tsa(folder / "test-tsa", sc["tsa"])
        req = profile.stamp_request([rep["work_id"]])
        stamp = profile.stamp_attach(reply(req.tsq), (folder / "test-tsa" / "ca.pem").read_bytes())
        say(f"3. timestamp token {stamp.token_id} from the local test authority at {stamp.gen_time}")
        copies = []
        for c in sc["copies"]:
            out = web / c["name"]
            make_copy(published, out, c["edits"])
            copies.append(out)
        say(f"4. the shop's copies: {', '.join(p.name for p in copies)}")
        case_dir = folder / "case-tidewater"
        case = new_case(case_dir, sc["case_title"], profile)
        # The demo marks, stamps and finds in one sitting, so the copies are "found" on the day
        # it runs, after the registration; a found date before it would (rightly) give the
        # warning registered-after-found.
        day = datetime.now(timezone.utc).date().isoformat()
        for c, p in zip(sc["copies"], copies, strict=True):
            found = c.get("found")
            found = found.replace("{day}", day) if found else found
            add_exhibit(case, p, source=c["source"], found=found, by=c.get("by"),
                        note=c.get("note"), profile=profile)
        say(f"5. case {case.case_id}: {len(copies)} exhibits taken in (copied, hashed, logged)")
        kw = {} if decoys is None else {"decoys": decoys}
        findings = examine_case(case, profile, search=[studio], robustness=robustness, **kw)
        for f in findings:
            r = f["result"]
            al = f.get("alignment") or {}
            say(f"   {f['exhibit_id']}: {words.verdict(r)}, false-alarm bound "
                f"{r['false_alarm_text']}"
                + (f", SSIM after alignment {al['ssim']:.3f}" if al.get("aligned") else ""))
        built = build_report(case, profile)
        say(f"6. dossier: {built['pdf']} (PAdES-signed) and {built['html']}")
        bundle = folder / "tidewater-bundle.zip"
        exported = export_bundle(case, bundle, profile)
        say(f"7. hand-over bundle: {bundle} ({exported['files']} files, no key material)")
        # The key disclosure travels apart from the bundle, to the other side's expert only.
        delivered = folder / "disclosure-for-the-expert"
        delivered.mkdir()
        for wid in sorted({f["match"]["work_id"] for f in findings if f.get("match")}):
            profile.disclose(wid, delivered / wid)
        key_sha256 = profile.public_key_fingerprint
        say(f"   key disclosure, delivered separately: {delivered}; owner key SHA-256 "
            f"{key_sha256} (told by phone, in the demo)")
    finally:
        profile.close()
    result = verify_bundle(bundle, expect_keys=(key_sha256,), disclosure=delivered,
                           tsa_roots=load_certificates((folder / "test-tsa" / "ca.pem")
                                                       .read_bytes()))
    for c in result.failures:
        say(f"   FAIL {c['check']}: {c['detail']}")
    say(f"8. claimkit verify {bundle}: "
        + (f"all {len(result.checks)} checks passed" if result.ok else "FAILED"))
    secs = time.perf_counter() - t0
    say(f"Done in {secs:.1f} s. Open {built['pdf']} to read the dossier. Technical evidence, "
        "not legal advice.")
    return {"folder": str(folder), "case": str(case_dir), "pdf": built["pdf"],
            "html": built["html"], "bundle": str(bundle), "verified": result.ok,
            "checks": len(result.checks), "failed": [c["check"] for c in result.failures],
            "detected": [f["exhibit_id"] for f in findings if f["result"]["detected"]],
            "seconds": round(secs, 1)}
