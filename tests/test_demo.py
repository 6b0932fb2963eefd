"""``claimkit demo``: the fictional case end to end (on a smaller picture, to stay quick)."""

from __future__ import annotations

import json
import shutil
import subprocess

import pytest

from claimkit.demo import ALLOWED_PICTURES, SCENARIO, load_scenario, run_demo

pytestmark = pytest.mark.slow


def test_sample_case_scenario_is_the_built_in_one():
    assert load_scenario() == SCENARIO
    assert SCENARIO["work"]["picture"] in ALLOWED_PICTURES
    assert "astronaut" not in ALLOWED_PICTURES and "camera" not in ALLOWED_PICTURES


def test_demo_runs_end_to_end(demo_run):
    out = demo_run.out
    assert out["verified"], out["failed"]
    assert out["detected"] == ["exhibit-1", "exhibit-2"]
    text = "\n".join(demo_run.lines)
    assert "Ilse Marrow" in text and "Harwick Bay Studio" in text and "Tidewater" in text
    assert "timestamp token" in text and "all" in text and "checks passed" in text
    if shutil.which("pdftotext"):
        pdf = subprocess.run(["pdftotext", out["pdf"], "-"], capture_output=True, text=True,
                             check=True).stdout
        assert "Harwick Bay Demo TSA" in pdf and "Limitations" in pdf
    # The exhibit copies are exactly the shop's files.
    data = json.loads((demo_run.folder / "case-tidewater" / "report" / "dossier.json")
                      .read_bytes())
    assert [e["original_name"] for e in data["exhibits"]] == \
        [c["name"] for c in SCENARIO["copies"]]
    # The copies were found after the work was registered and stamped: dates in order, and
    # both lines agree on both copies, so the dossier carries no warning at all.
    assert data["warnings"] == []
    days = [e["day"] for e in data["timeline"]["events"] if e["day"]]
    assert days == sorted(days)
    assert data["summary"]["derived"] == ["exhibit-1", "exhibit-2"]
    # A second run into the same folder is refused rather than mixed in.
    from claimkit.errors import InputError
    with pytest.raises(InputError, match="not empty"):
        run_demo(demo_run.folder, echo=None, scenario=demo_run.scenario, decoys=8)
