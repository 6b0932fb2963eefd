"""A bundle made by an earlier claimkit is verified, or refused with the precise reason.

``fixtures/bundle-0.2.0.zip`` was made by claimkit 0.2.0 (``claimkit report`` and ``case
export`` on a small fictional case: scikit-image's ``coffee``, cropped to 256 x 320, marked,
stamped by a throwaway OpenSSL TSA, one copy resized to 80 %, cropped and saved at JPEG
quality 75). It must never be rebuilt: it stands for the bundles already handed over.
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

from claimkit.verify import verify_bundle

OLD = Path(__file__).parent / "fixtures" / "bundle-0.2.0.zip"

# What does not depend on the version that made the bundle: it must hold for any later one.
STABLE = ("bundle layout", "manifest signature", "manifest signer", "file hashes",
          "paths in the bundle", "case key", "custody log", "custody of exhibits")


def test_the_fixture_is_what_0_2_0_made():
    with zipfile.ZipFile(OLD) as zf:
        data = json.loads(zf.read("report/dossier.json"))
        manifest = json.loads(zf.read("manifest.json"))
    assert data["software"] == "claimkit 0.2.0" and manifest["software"] == "claimkit 0.2.0"


def test_an_old_bundle_verifies_or_says_precisely_why_not():
    rep = verify_bundle(OLD)
    by_name = {c["check"]: c for c in rep.checks}
    for name in STABLE:
        assert by_name[name]["ok"], by_name[name]
    # The disclosure 0.2.0 put in every bundle is still read as the key material it was.
    assert any(c["check"].startswith(("disclosure ", "work W-")) and c["ok"] for c in rep.checks)
    # The examination and the robustness rows are re-run from the disclosed key: they
    # reproduce, or the check says which versions made and re-ran the numbers.
    assert "E01 re-run" in by_name and any(c.startswith("robustness") for c in by_name)
    assert by_name["PDF signature"]["ok"]
    for c in rep.failures:
        # Each refusal names the version that made the bundle and what was not re-derived.
        assert "claimkit 0.2.0" in c["detail"], c
        # A robustness row re-run by today's multi-scale examination differs (it also looks at
        # coarse views), and today's figures are drawn larger and numbered; those refusals name
        # both versions, asserted just above.
        assert (c["check"] in ("dossier version", "software settings", "figures")
                or "re-run" in c["check"] or c["check"].startswith("robustness ")), c
