"""The README's promises about the project itself."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_ci_runs_exactly_the_readme_test_command():
    readme = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```\n(.*?)\n```", readme, flags=re.DOTALL)
    test_cmd = next(b for b in blocks if "pytest" in b).strip()
    ci = (ROOT / ".ci" / "run").read_text()
    assert test_cmd in ci


def test_every_command_has_help():
    out = subprocess.run([sys.executable, "-m", "claimkit", "--help"], capture_output=True,
                         text=True, check=False)
    assert out.returncode == 0
    names = re.findall(r"^    ([a-z]+) ", out.stdout, flags=re.MULTILINE)
    for required in ("init", "mark", "examine", "works", "stamp", "log", "disclose"):
        assert required in names, required
    for name in names:
        r = subprocess.run([sys.executable, "-m", "claimkit", name, "--help"],
                           capture_output=True, text=True, check=False)
        assert r.returncode == 0 and "usage:" in r.stdout, name
