"""A full-page picture of a page as a reader's browser drew it (headless Chromium).

Chromium's ``--screenshot`` flag draws only the window, so the page is loaded
over the DevTools protocol on a private pipe (``--remote-debugging-pipe``:
file descriptors 3 and 4, messages of JSON ended by a NUL byte): navigate,
wait for the load event, read the layout size, and capture beyond the
viewport. No port is opened. The browser runs with a fresh profile folder,
no background networking, no component updates, no sync and no QUIC, so the
only traffic is the page and what it loads.

The snapshot is a second load of the page, by Chromium, a moment after the
WARC capture; the requests Chromium makes are not in the WARC. The dossier
says so.

References
----------
Chrome DevTools Protocol, Page domain (``Page.navigate``,
``Page.getLayoutMetrics``, ``Page.captureScreenshot``), chromedevtools.github.io.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import select
import shutil
import signal
import tempfile
import time
from dataclasses import dataclass

from claimkit.evidence.custodylog import utc_now

__all__ = ["Snapshot", "chromium_path", "take_snapshot"]

WIDTH = 1280
_QUIET = not os.environ.get("CLAIMKIT_DEBUG_CHROMIUM")   # Chromium logs a lot to stderr
MAX_HEIGHT = 16384      # Chromium's own texture limit; a longer page is cut, and we say so
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--disable-default-apps", "--hide-scrollbars",
         "--mute-audio", "--remote-debugging-pipe")


@dataclass
class Snapshot:
    png: bytes
    width: int
    height: int
    page_height: int
    browser: str
    taken: str          # UTC, system clock
    cut: bool


class SnapshotFailed(Exception):
    """Chromium could not draw the page (the capture goes on without a snapshot)."""


def chromium_path() -> str | None:
    """The Chromium executable (Debian's ``chromium`` package), or None."""
    return os.environ.get("CLAIMKIT_CHROMIUM") or shutil.which("chromium") \
        or shutil.which("chromium-browser")


class _Pipe:
    def __init__(self, wfd: int, rfd: int, deadline: float):
        self.wfd, self.rfd, self.deadline = wfd, rfd, deadline
        self.buf = b""
        self.next_id = 0
        self.events: list[dict] = []

    def _read_message(self) -> dict:
        while b"\0" not in self.buf:
            left = self.deadline - time.monotonic()
            if left <= 0:
                raise SnapshotFailed("Chromium did not finish in time")
            ready, _, _ = select.select([self.rfd], [], [], left)
            if not ready:
                continue
            chunk = os.read(self.rfd, 1 << 20)
            if not chunk:
                raise SnapshotFailed("Chromium closed the DevTools pipe")
            self.buf += chunk
        msg, self.buf = self.buf.split(b"\0", 1)
        return json.loads(msg)

    def call(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self.next_id += 1
        msg = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        data = json.dumps(msg).encode() + b"\0"
        while data:
            data = data[os.write(self.wfd, data):]
        while True:
            reply = self._read_message()
            if reply.get("id") == self.next_id:
                if "error" in reply:
                    raise SnapshotFailed(f"{method}: {reply['error'].get('message')}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_event(self, method: str, session: str) -> None:
        while True:
            for i, e in enumerate(self.events):
                if e.get("method") == method and e.get("sessionId") == session:
                    del self.events[i]
                    return
            self.events.append(self._read_message())


def _reap(pid: int, grace: float = 10.0) -> None:
    """Wait for Chromium to leave; end it (by its own process id) if it does not."""
    end = time.monotonic() + grace
    while time.monotonic() < end:
        done, _ = os.waitpid(pid, os.WNOHANG)
        if done:
            return
        time.sleep(0.05)
    try:
        os.kill(pid, signal.SIGKILL)
    except ProcessLookupError:
        return
    os.waitpid(pid, 0)


def _above_four(fd: int) -> int:
    high = fcntl.fcntl(fd, fcntl.F_DUPFD, 10)
    os.close(fd)
    return high


def take_snapshot(url: str, *, timeout: float = 60.0, width: int = WIDTH) -> Snapshot:
    """Load ``url`` in headless Chromium and return a full-page PNG.

    Raises
    ------
    SnapshotFailed
        When Chromium is missing or cannot draw the page.
    """

    exe = chromium_path()
    if exe is None:
        raise SnapshotFailed("Chromium is not installed (Debian: apt-get install chromium)")
    to_child_r, to_child_w = os.pipe()
    from_child_r, from_child_w = os.pipe()
    # The child's ends move above 4 first: a pipe end that is already 3 or 4 would
    # be closed by the shell's own clean-up of the originals.
    to_child_r, from_child_w = _above_four(to_child_r), _above_four(from_child_w)
    profile = tempfile.mkdtemp(prefix="claimkit-chromium-")
    # posix_spawn's dup2 actions put the pipe ends on 3 and 4, where Chromium expects
    # them (the ends were moved above 9 first, so no action overwrites another).
    argv = [exe, *FLAGS, f"--user-data-dir={profile}", f"--window-size={width},900",
            "about:blank"]
    quiet = os.open(os.devnull, os.O_RDWR)
    actions = [(os.POSIX_SPAWN_DUP2, to_child_r, 3), (os.POSIX_SPAWN_DUP2, from_child_w, 4),
               (os.POSIX_SPAWN_DUP2, quiet, 0), (os.POSIX_SPAWN_DUP2, quiet, 1)]
    if _QUIET:
        actions.append((os.POSIX_SPAWN_DUP2, quiet, 2))
    try:
        pid = os.posix_spawn(exe, argv, os.environ, file_actions=actions)
    finally:
        for fd in (to_child_r, from_child_w, quiet):
            os.close(fd)
    pipe = _Pipe(to_child_w, from_child_r, time.monotonic() + timeout)
    try:
        version = pipe.call("Browser.getVersion").get("product", "Chromium")
        target = pipe.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = pipe.call("Target.attachToTarget",
                            {"targetId": target, "flatten": True})["sessionId"]
        pipe.call("Page.enable", session=session)
        taken = utc_now()
        nav = pipe.call("Page.navigate", {"url": url}, session=session)
        if nav.get("errorText"):
            raise SnapshotFailed(f"Chromium could not load the page ({nav['errorText']})")
        pipe.wait_event("Page.loadEventFired", session)
        metrics = pipe.call("Page.getLayoutMetrics", session=session)
        size = metrics.get("cssContentSize") or metrics.get("contentSize") or {}
        page_h = round(size.get("height", 900))
        height = max(1, min(page_h, MAX_HEIGHT))
        pipe.call("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1,
                   "mobile": False}, session=session)
        shot = pipe.call("Page.captureScreenshot",
                         {"format": "png", "captureBeyondViewport": True,
                          "clip": {"x": 0, "y": 0, "width": width, "height": height,
                                   "scale": 1}}, session=session)
        png = base64.b64decode(shot["data"])
        try:
            pipe.call("Browser.close")
        except SnapshotFailed:
            pass
        return Snapshot(png=png, width=width, height=height, page_height=page_h,
                        browser=version, taken=taken, cut=page_h > MAX_HEIGHT)
    except (OSError, ValueError, KeyError) as exc:
        raise SnapshotFailed(f"Chromium's answer could not be used ({exc})") from None
    finally:
        for fd in (to_child_w, from_child_r):
            try:
                os.close(fd)
            except OSError:
                pass
        _reap(pid)
        shutil.rmtree(profile, ignore_errors=True)
