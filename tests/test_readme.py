"""The README's "Everyday use" lines, run as written, in order, on what ``claimkit demo`` leaves.

The block is read from README.md itself (the first fenced block under
"## Everyday use") and run by bash with ``set -e``, so a line that stops
working fails this test. The demo is the session's ``demo_run`` (a smaller
picture, checked by ``tests/test_demo.py``; every step is the same): the lines only add to it.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow
README = Path(__file__).resolve().parent.parent / "README.md"


def everyday_block() -> str:
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Everyday use"):]
    m = re.search(r"```\n(.*?)```", section, re.DOTALL)
    assert m, "no command block under Everyday use"
    return m.group(1)


def test_everyday_lines_run_as_written(demo_run, tmp_path):
    if shutil.which("openssl") is None or shutil.which("exiftool") is None:
        pytest.skip("openssl and exiftool are needed")
    assert demo_run.out["verified"]
    block = everyday_block()
    assert block.splitlines()[0].startswith("cd demo-out")
    env = {k: v for k, v in os.environ.items()
           if k not in ("CLAIMKIT_HOME", "CLAIMKIT_PASSPHRASE")}
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    env["HOME"] = str(tmp_path)
    res = subprocess.run(["bash", "-e", "-o", "pipefail", "-c", block], cwd=demo_run.folder.parent,
                         env=env, capture_output=True, text=True, timeout=900, check=False)
    assert res.returncode == 0, res.stderr[-3000:]
    demo = demo_run.folder
    assert (demo / "my-profile").is_dir()
    assert (demo / "web" / "harwick-morning-cup.jpg").is_file()
    assert (demo / "case-17.zip").is_file() and (demo / "robustness.png").is_file()
    # The JSON lines of `mark --json` and `examine --json` are JSON.
    rows = [json.loads(line) for line in res.stdout.splitlines() if line.startswith("{")]
    assert any(r.get("output") == "web/harwick-morning-cup.jpg" for r in rows)
    assert any(r.get("file") == "found-online/tidewater-banner.jpg" and r.get("detected")
               for r in rows)
