"""The progress bar in a real (pseudo-)terminal: 50 columns, one line updated in place.

The command runs in a child process on a pty whose window size is set with
the TIOCSWINSZ ioctl (what a terminal emulator does); what it wrote is
replayed on a minimal 50-column screen (carriage return, line feed, erase to
end of line, cursor up, and wrapping at the right margin, as a VT100 does).
"""

from __future__ import annotations

import fcntl
import json
import os
import pty
import re
import struct
import subprocess
import sys
import termios

import numpy as np
import pytest
from PIL import Image

COLS = 50


def replay(output: str, cols: int = COLS) -> list[str]:
    """The screen lines a VT100-like terminal of ``cols`` columns shows for ``output``."""
    lines = [[]]
    row = col = 0
    i = 0
    while i < len(output):
        ch = output[i]
        if ch == "\x1b":
            m = re.match(r"\x1b\[(\d*)([A-Za-z])", output[i:])
            if m:
                n, op = int(m.group(1) or 1), m.group(2)
                if op == "K":
                    del lines[row][col:]
                elif op == "A":
                    row = max(0, row - n)
                i += m.end()
                continue
        if ch == "\r":
            col = 0
        elif ch == "\n":
            row += 1
            col = 0
        elif ch >= " ":
            if col >= cols:            # past the right margin: the terminal wraps
                row += 1
                col = 0
            while len(lines) <= row:
                lines.append([])
            line = lines[row]
            line.extend(" " * (col - len(line) + 1)) if len(line) <= col else None
            line[col] = ch
            col += 1
        while len(lines) <= row:
            lines.append([])
        i += 1
    return ["".join(line).rstrip() for line in lines]


def run_on_pty(argv: list[str], env: dict, cols: int = COLS) -> str:
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, cols, 0, 0))
    proc = subprocess.Popen(argv, stdin=slave, stdout=slave, stderr=slave, env=env,
                            close_fds=True)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:            # EIO: the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    proc.wait(timeout=300)
    os.close(master)
    return b"".join(chunks).decode("utf-8", "replace")


@pytest.fixture
def inbox(tmp_path):
    folder = tmp_path / "inbox"
    folder.mkdir()
    rng = np.random.default_rng(5)
    for i in range(14):
        a = (rng.random((96, 96, 3)) * 255).astype(np.uint8)
        Image.fromarray(a).save(folder / f"find-{i:02d}.png")
    return folder


def test_a_50_column_terminal_shows_one_progress_line(profile_home, inbox):
    env = {**os.environ, "COLUMNS": str(COLS), "TERM": "xterm"}
    out = run_on_pty([sys.executable, "-m", "claimkit", "scan", str(inbox), "--workers", "1"],
                     env)
    screen = [line for line in replay(out) if line]
    # Every result line and the summary are there, none wider than the terminal ...
    assert sum(1 for line in screen if "find-" in line) == 14, screen
    assert all(len(line) <= COLS for line in screen)
    # ... the bar was drawn (carriage-return updates), and at most one bar line is left.
    assert "\r" in out
    bar_lines = [line for line in screen if "file/s" in line or "it/s" in line
                 or re.search(r"\d+/14", line)]
    assert len(bar_lines) <= 1, bar_lines


def test_quiet_and_json_keep_stdout_clean(profile_home, inbox):
    env = {**os.environ, "COLUMNS": str(COLS), "TERM": "xterm"}
    out = run_on_pty([sys.executable, "-m", "claimkit", "scan", str(inbox), "--workers", "1",
                      "--quiet"], env)
    assert "\r" not in out.replace("\r\n", "\n")       # no bar: only whole lines
    # With --json and stderr not a terminal: stdout is JSON lines and nothing else.
    res = subprocess.run([sys.executable, "-m", "claimkit", "scan", str(inbox), "--workers",
                          "1", "--json"], capture_output=True, text=True, env=env,
                         check=False)
    for line in res.stdout.splitlines():
        json.loads(line)


def test_log_lines_go_to_the_stderr_of_the_moment(monkeypatch):
    """A caller that swaps and closes sys.stderr (pytest's capture does) leaves no handler
    writing to the closed stream: each record goes to the stderr current when it is logged."""
    import io
    import logging

    from claimkit.cli import setup_logging

    first, second = io.StringIO(), io.StringIO()
    monkeypatch.setattr(sys, "stderr", first)
    setup_logging(True)
    try:
        monkeypatch.setattr(sys, "stderr", second)
        first.close()
        logging.getLogger("claimkit.test").warning("after the swap")
        assert second.getvalue() == "claimkit: claimkit.test: after the swap\n"
    finally:
        setup_logging(False)
