"""A small fictional case built once per test session, through the command line.

Scenario (invented): Ilse Marrow of Harwick Bay Studio marks scikit-image's
``coffee`` photo (upscaled 2x), stamps it with a local OpenSSL test TSA, and
finds two copies on the fictional shop Tidewater Home Goods: one resized to
70 %, cropped and saved at JPEG quality 72 (Pillow's encoder), one resized to
80 %, turned 4 degrees counter-clockwise, cropped, JPEG quality 80. A third
exhibit is an unmarked photo (``chelsea``) that must not be claimed. The fourth
is a forgery: the owner's mark estimated from the published file with numpy
alone (the copy attack with the whole residual, ``engine_helpers.transplant_mark``) and added to the
unrelated ``rocket`` photo; it is dated before the work was registered, so it
must carry both the ``content-mismatch`` and the ``registered-after-found``
warnings and must never be reported as derived from the work.

Other test modules import the ``built_case`` fixture from here.
"""

from __future__ import annotations

import contextlib
import copy
import io
import json
import shutil
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from claimkit.cli import main
from claimkit.demo import SCENARIO, make_copy, make_test_tsa

PASS = "harwick-bay-casework-tests"
DECOYS = 12


@dataclass
class BuiltCase:
    root: Path
    home: Path
    case: Path
    studio: Path
    copies: list[Path]
    unmarked: Path
    bundle: Path
    work_id: str
    scenario: dict
    disclosure: Path        # the key disclosure, delivered apart from the bundle
    tsa_roots: Path         # the test TSA's root certificate
    key_sha256: str         # the owner's key fingerprint, as the owner would tell it
    forged: Path            # the transplanted-mark forgery (exhibit 4)
    examine_rows: list[dict]  # what `case examine --json` printed, a JSON object per line


def _run(argv: list[str]) -> int:
    return main(argv)


_CACHE: dict[str, BuiltCase] = {}


@pytest.fixture(scope="session")
def built_case(tmp_path_factory) -> BuiltCase:
    """Built once per session, whichever module asks first (each module imports this fixture)."""
    if "case" not in _CACHE:
        _CACHE["case"] = _build(tmp_path_factory)
    return _CACHE["case"]


def _build(tmp_path_factory) -> BuiltCase:
    from skimage import data

    if shutil.which("openssl") is None:
        pytest.skip("openssl command not installed")
    root = tmp_path_factory.mktemp("casework")
    home, studio, web = root / "home", root / "studio", root / "web"
    studio.mkdir()
    web.mkdir()
    sc = copy.deepcopy(SCENARIO)
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("CLAIMKIT_PASSPHRASE", PASS)
        mp.setenv("CLAIMKIT_TEST_FAST_KDF", "1")
        assert _run(["--home", str(home), "init", "--owner", sc["photographer"]]) == 0
        pic = data.coffee()
        big = np.asarray(Image.fromarray(pic).resize((pic.shape[1] * 2, pic.shape[0] * 2),
                                                     Image.Resampling.BICUBIC))
        original = studio / "morning-cup.png"
        Image.fromarray(big).save(original)
        published = studio / "morning-cup-web.jpg"
        from claimkit.evidence.profile import Profile
        from claimkit.workflow import mark_file

        with Profile.open(home, PASS.encode()) as p:
            # Format 3 (written on request): the case exercises its disclosure and re-run.
            rep = mark_file(p, original, published, mark_format=3)
            reply = make_test_tsa(root / "tsa", "Casework Test TSA")
            req = p.stamp_request([rep["work_id"]])
            p.stamp_attach(reply(req.tsq), (root / "tsa" / "ca.pem").read_bytes())
        copies = []
        for c in sc["copies"]:
            out = web / c["name"]
            make_copy(published, out, c["edits"])
            copies.append(out)
        unmarked = web / "tidewater-cat-cushion.jpg"
        Image.fromarray(data.chelsea()).save(unmarked, quality=85)
        from engine_helpers import transplant_mark

        forged = web / "tidewater-rocket-poster.jpg"
        with Image.open(published) as im:
            marked = np.asarray(im.convert("RGB"))
        # The whole residual: format 3's keyed claim does not survive a fold at the tile
        # period, but no mark independent of the picture survives having its whole
        # residual lifted (the content line is what catches this forgery).
        Image.fromarray(transplant_mark(marked, data.rocket(), tile=None)).save(forged, quality=92)
        case = root / "case"
        h = ["--home", str(home)]
        assert _run(["case", "new", str(case), "--title", sc["case_title"], *h]) == 0
        today = datetime.now(timezone.utc).date().isoformat()
        for c, f in zip(sc["copies"], copies, strict=True):
            assert _run(["case", "add", str(case), str(f), "--source", c["source"],
                         "--found", c["found"].replace("{day}", today), "--by", c["by"],
                         "--note", c["note"], *h]) == 0
        assert _run(["case", "add", str(case), str(unmarked), "--source",
                     "https://tidewater-home-goods.example/products/cat-cushion", *h]) == 0
        assert _run(["case", "add", str(case), str(forged), "--source",
                     "https://tidewater-home-goods.example/products/rocket-poster",
                     "--found", "2025-06-01, poster listing", "--by", "Ilse Marrow", *h]) == 0
        printed = io.StringIO()
        with contextlib.redirect_stdout(printed):
            assert _run(["case", "examine", str(case), "--originals", str(studio),
                         "--decoys", str(DECOYS), "--json", *h]) == 0
        rows = [json.loads(x) for x in printed.getvalue().splitlines()]
        assert _run(["report", str(case), *h]) == 0
        bundle = root / "bundle.zip"
        assert _run(["case", "export", str(case), "--out", str(bundle), *h]) == 0
        disclosure = root / "delivered" / rep["work_id"]
        disclosure.parent.mkdir()
        assert _run(["disclose", rep["work_id"], "--out", str(disclosure), *h]) == 0
        with Profile.open(home, PASS.encode()) as p:
            fp = p.public_key_fingerprint
    return BuiltCase(root, home, case, studio, copies, unmarked, bundle, rep["work_id"], sc,
                     disclosure.parent, root / "tsa" / "ca.pem", fp, forged, rows)
