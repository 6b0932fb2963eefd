"""Throughput at a photographer's scale (issue 6), printed as ratios measured in this one run.

    python benchmarks/bench_scale.py [--count12 N] [--scan-count N] [--quick] [--only SECTION]
                                     [--before CHECKOUT]

What it measures (nothing is asserted; targets are printed beside the numbers):

1. **scan** of web-size JPEGs (1-2 megapixels, half of them marked and
   recompressed): files per second on 2 worker processes, and the scan's
   wall time against the time Pillow takes just to decode the same files in
   one process (``Image.open(f).load()``, nothing more). Targets (issue 16):
   >= 20 files/s, <= 6x the decode time. ``--before CHECKOUT`` also scans the
   same files with another checkout's code (the two alternated, each in a
   process of its own) and counts the reports that are identical. It ends
   with the floor: the CPU per file of reading the copy and whitening its
   luma, the two steps every examination starts with whatever the key.
2. **batch mark** of 12-megapixel JPEGs: one worker on one core (in this process) against
   two worker processes, and the one-worker time per file against Pillow's
   decode + encode of the same file. Target: >= 1.8x faster on 2 cores.
3. **cost growth** from 1 to 24 megapixels for one file in one process:
   seconds per megapixel of examine and mark (close to linear if the
   per-megapixel cost stays flat).
4. **peak memory** of the whole process tree of ``claimkit mark FOLDER
   --workers 2`` (the command, the forkserver, the workers), run as a user
   runs it, on the 12-megapixel files and on 24-megapixel files. Target: < 2 GB.

Pictures are made from ``skimage.data`` (coffee, chelsea, rocket, brick,
grass, gravel) resized and mixed with a little noise, each one different (a
batch skips a file it has seen). The profile uses the lowered test key
derivation; opening a profile is not what is measured.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import os
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

os.environ.setdefault("CLAIMKIT_TEST_FAST_KDF", "1")

import numpy as np
from PIL import Image

TARGET_SCAN_RATE = 20.0
TARGET_SCAN_VS_DECODE = 6.0
TARGET_SPEEDUP = 1.8
TARGET_PEAK_MB = 2048


# --------------------------------------------------------------------------- pictures

def _sources() -> list[np.ndarray]:
    from skimage import data
    out = []
    for name in ("coffee", "chelsea", "rocket", "brick", "grass", "gravel"):
        img = getattr(data, name)()
        if img.ndim == 2:
            img = np.stack([img] * 3, axis=-1)
        out.append(img[..., :3])
    return out


def make_picture(index: int, width: int, height: int, sources) -> np.ndarray:
    """A distinct natural-looking picture: one source enlarged, a second blended in, noise."""
    rng = np.random.default_rng(index)
    a = sources[index % len(sources)]
    b = sources[(index * 5 + 1) % len(sources)]
    big = np.asarray(Image.fromarray(a).resize((width, height), Image.BICUBIC), np.float32)
    small = np.asarray(Image.fromarray(b).resize((width // 3, height // 3), Image.BICUBIC),
                       np.float32)
    y, x = rng.integers(0, height - small.shape[0]), rng.integers(0, width - small.shape[1])
    big[y:y + small.shape[0], x:x + small.shape[1]] *= 0.5
    big[y:y + small.shape[0], x:x + small.shape[1]] += 0.5 * small
    big += rng.normal(0, 3.0, big.shape[:2])[..., None].astype(np.float32)
    return np.clip(big, 0, 255).astype(np.uint8)


def write_jpegs(folder: Path, count: int, size: tuple[int, int], *, start: int = 0,
                quality: int = 90) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    src = _sources()
    paths = []
    for i in range(count):
        p = folder / f"img{start + i:04d}.jpg"
        Image.fromarray(make_picture(start + i, *size, src)).save(p, quality=quality)
        paths.append(p)
    return paths


# --------------------------------------------------------------------------- memory

class TreeMemory:
    """Samples the resident memory of this process and all its descendants (Linux /proc)."""

    def __init__(self, interval: float = 0.05, *, include_self: bool = True):
        self.interval = interval
        self.include_self = include_self
        self.peak = 0
        self.own_peak = 0
        self.high_water: dict[int, int] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def tree_rss(self) -> int:
        me = os.getpid()
        parent: dict[int, int] = {}
        for entry in os.listdir("/proc"):
            if not entry.isdigit():
                continue
            try:
                with open(f"/proc/{entry}/stat") as fh:
                    fields = fh.read().rsplit(")", 1)[1].split()
                parent[int(entry)] = int(fields[1])
            except (OSError, IndexError, ValueError):
                continue
        members, changed = {me}, True
        while changed:
            changed = False
            for pid, ppid in parent.items():
                if ppid in members and pid not in members:
                    members.add(pid)
                    changed = True
        if not self.include_self:
            members.discard(me)
        total = 0
        for pid in members:
            try:
                with open(f"/proc/{pid}/status") as fh:
                    for line in fh:
                        if line.startswith("VmRSS:"):
                            total += int(line.split()[1]) * 1024
                            break
            except OSError:
                continue
        return total

    def _run(self):
        while not self._stop.is_set():
            self.peak = max(self.peak, self.tree_rss())
            if self.include_self:
                self.own_peak = max(self.own_peak, _rss(os.getpid()))
            self._note_high_water()
            self._stop.wait(self.interval)

    def _note_high_water(self) -> None:
        """Each descendant's own peak (VmHWM), kept while it lives: the samples may miss a spike."""
        me = os.getpid()
        for entry in os.listdir("/proc"):
            if not entry.isdigit() or int(entry) == me:
                continue
            try:
                with open(f"/proc/{entry}/status") as fh:
                    text = fh.read()
            except OSError:
                continue
            fields = dict(line.split(":", 1) for line in text.splitlines() if ":" in line)
            if int(fields.get("PPid", "0").strip() or 0) not in self._tree():
                continue
            hwm = fields.get("VmHWM")
            if hwm:
                pid = int(entry)
                self.high_water[pid] = max(self.high_water.get(pid, 0),
                                           int(hwm.split()[0]) * 1024)

    def _tree(self) -> set[int]:
        return {os.getpid(), *self.high_water}

    @property
    def bound(self) -> int:
        """Upper bound: this process's sampled peak plus every descendant's own peak."""
        return self.own_peak + sum(self.high_water.values())

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()


def _rss(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


# --------------------------------------------------------------------------- helpers

@contextlib.contextmanager
def quiet():
    """Silence the per-file lines of the batch commands (stdout and stderr)."""
    with open(os.devnull, "w") as null, contextlib.redirect_stdout(null), \
            contextlib.redirect_stderr(null):
        yield


def pillow_decode(paths: list[Path]) -> float:
    """Pillow's plain decode, ``load()`` only: no conversion and no NumPy copy (like for like)."""
    t = time.perf_counter()
    for p in paths:
        with Image.open(p) as im:
            im.load()
    return time.perf_counter() - t


def pillow_decode_encode(paths: list[Path]) -> float:
    """Decode and re-encode as claimkit writes a JPEG (quality 95, 4:4:4, standard Huffman
    tables: claimkit's encoder does not ask for optimised ones, ``imageio._encode``)."""
    t = time.perf_counter()
    for p in paths:
        with Image.open(p) as im:
            im.load()
            buf = io.BytesIO()
            im.save(buf, format="JPEG", quality=95, subsampling=0)
    return time.perf_counter() - t


def line(label: str, value: str, target: str = "") -> None:
    print(f"  {label:<58} {value:>14}   {target}")


# --------------------------------------------------------------------------- sections

def steady_rate(files: list[Path], fn, args_of, workers: int) -> float:
    """Files per second once the pool is up (two warm-up tasks first)."""
    from claimkit.runner import StopGuard, make_engine, run_ordered

    eng = make_engine("local", workers=workers)
    for f in files[:2]:
        eng.submit(fn, *args_of(f)).result()
    t = time.perf_counter()
    run_ordered(eng, fn, ((f, args_of(f)) for f in files), lambda o: None, guard=StopGuard())
    return len(files) / (time.perf_counter() - t)


def load() -> str:
    one, five, _ = os.getloadavg()
    return f"load average {one:.2f} (1 min), {five:.2f} (5 min)"


def measure_scan(profile, files: list[Path]) -> dict:
    """One process's scan of ``files``: CPU per file, files/s on 1 and 2 workers, the reports.

    Best of 2 alternated runs (see bench_mark). ``reports``: each file's report as
    JSON text (the same text whatever claimkit checkout made it, if nothing changed).
    """
    import json

    from claimkit import scan, workflow

    seed, checker = workflow.mark_keys(profile), workflow.owner_payload_check(profile)
    t_one = cpu_one = rate2 = 0.0
    reports: dict[str, str] = {}
    for _ in range(2):
        cpu = time.process_time()
        t = time.perf_counter()
        for f in files:
            rep = scan.scan_task(str(f), seed, checker, 1e-9, None)
            reports[f.name] = json.dumps(rep, sort_keys=True, default=str)
        dt = time.perf_counter() - t
        if not t_one or dt < t_one:
            t_one, cpu_one = dt, (time.process_time() - cpu) / len(files)
        rate2 = max(rate2, steady_rate(files, scan.scan_task,
                                       lambda f: (str(f), seed, checker, 1e-9, None), 2))
    claimed = sum(bool(json.loads(r).get("detected")) for r in reports.values())
    return {"t_one": t_one, "cpu_one": cpu_one, "rate2": rate2, "claimed": claimed,
            "reports": reports}


def scan_floor(files: list[Path]) -> tuple[float, float]:
    """CPU seconds per file of the two steps every examination starts with, best of 2:
    reading the copy as the scan reads it, and whitening its luma (``detect.whiten``,
    the detector's first pass over the picture; no mark can be read without it).

    Neither depends on the key or on the mark, so this is a floor under any scan that
    reads the picture this way, whatever the geometry search costs after it.
    """
    from claimkit import workflow
    from claimkit.imageio import to_luma
    from claimkit.mark import detect

    best_read = best_whiten = float("inf")
    for _ in range(2):
        t_read = t_whiten = 0.0
        for f in files:
            t = time.thread_time()
            luma = to_luma(workflow.read_for_examination(f).pixels)
            t_read += time.thread_time() - t
            t = time.thread_time()
            detect.whiten(luma)
            t_whiten += time.thread_time() - t
        best_read, best_whiten = min(best_read, t_read), min(best_whiten, t_whiten)
    return best_read / len(files), best_whiten / len(files)


def scan_child(web: str, home: str) -> None:
    """``--scan-child``: :func:`measure_scan` in this process (another checkout on PYTHONPATH)."""
    import json

    from claimkit.evidence.profile import Profile

    with Profile.open(Path(home), b"bench") as profile:
        print(json.dumps(measure_scan(profile, sorted(Path(web).glob("*.jpg")))))


def bench_scan(profile, work: Path, count: int, before: Path | None = None) -> None:
    import json
    import subprocess

    from claimkit.cli import scale

    print(f"\n1. scan of {count} web-size JPEGs (1.2-1.9 MP, half marked and recompressed), "
          "best of 2 runs"
          f"  [{load()}]")
    half = count // 2
    write_jpegs(work / "scan-src", half, (1600, 1200), start=1000, quality=95)
    with quiet():
        scale.mark_many(profile, [work / "scan-src"], work / "scan-marked", workers=2)
    web = work / "web"
    web.mkdir()
    for p in sorted((work / "scan-marked").glob("*.jpg")):
        Image.open(p).save(web / f"found-{p.name}", quality=80)
    write_jpegs(web, count - half, (1280, 960), start=2000, quality=80)
    files = sorted(web.glob("*.jpg"))
    mp = np.mean([Image.open(f).size[0] * Image.open(f).size[1] for f in files]) / 1e6
    t_decode = min(pillow_decode(files) for _ in range(2))
    runs: dict[str, list[dict]] = {"this": [], "before": []}
    # With --before: each checkout twice, alternated, each in a fresh process of its own
    # (same files, same keys); the best of each is printed.
    order = ["before", "this", "before", "this"] if before else ["this"]
    for tree in order:
        if not before:
            runs[tree].append(measure_scan(profile, files))
            continue
        checkout = before if tree == "before" else Path(__file__).resolve().parents[1]
        env = dict(os.environ, PYTHONPATH=str(checkout.resolve()))
        out = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--scan-child",
                              str(web), str(work / "home")], capture_output=True, text=True,
                             env=env, cwd=work, check=False)
        if out.returncode != 0:
            raise SystemExit(f"--before scan failed:\n{out.stderr[-2000:]}")
        runs[tree].append(json.loads(out.stdout.strip().splitlines()[-1]))
    with quiet():
        t = time.perf_counter()
        scale.scan_folders(profile, [web], workers=2, json_lines=True)
        t_cmd = time.perf_counter() - t
    line("mean picture size", f"{mp:.2f} MP")
    line("Pillow decode, one process, per file", f"{1000 * t_decode / len(files):.0f} ms")
    for tree in ("before", "this") if before else ("this",):
        rs = runs[tree]
        cpu_one = min(r["cpu_one"] for r in rs)
        t_one = min(r["t_one"] for r in rs)
        rate2 = max(r["rate2"] for r in rs)
        if before:
            print(f"  -- {'this checkout' if tree == 'this' else f'BEFORE ({before})'}")
        line("claimed (of the marked half)", f"{rs[0]['claimed']}/{half}")
        line("examine, one process: CPU time per file", f"{1000 * cpu_one:.0f} ms")
        line("examine CPU per file / Pillow decode per file",
             f"{cpu_one * len(files) / t_decode:.1f}x",
             f"target <= {TARGET_SCAN_VS_DECODE:.0f}x (on 2 cores: "
             f"{cpu_one * len(files) / 2 / t_decode:.1f}x)")
        line("scan, 1 worker (in process)", f"{len(files) / t_one:.1f} files/s")
        line("scan, 2 worker processes, pool already up", f"{rate2:.1f} files/s",
             f"target >= {TARGET_SCAN_RATE:.0f} files/s")
        line("  the same with no other load (2 / CPU per file)", f"{2 / cpu_one:.1f} files/s")
        line("scan wall time on 2 workers / Pillow decode time",
             f"{len(files) / rate2 / t_decode:.1f}x", f"target <= {TARGET_SCAN_VS_DECODE:.0f}x")
        line("speed-up of scan, 2 workers over 1", f"{rate2 * t_one / len(files):.2f}x")
    line("claimkit scan command, 2 workers, incl. pool start", f"{len(files) / t_cmd:.1f} files/s")
    read, whiten = scan_floor(files)
    per_decode = t_decode / len(files)
    print("  the floor, this checkout (CPU per file; key- and mark-independent steps):")
    line("  read the copy as scan reads it (luma window)", f"{1000 * read:.1f} ms",
         f"{read / per_decode:.1f}x decode")
    line("  whiten its luma (detect.whiten), the first pass", f"{1000 * whiten:.1f} ms",
         f"{whiten / per_decode:.1f}x decode")
    line("  the two together", f"{1000 * (read + whiten):.1f} ms",
         f"{(read + whiten) / per_decode:.1f}x decode")
    if before:
        this, other = runs["this"][0]["reports"], runs["before"][0]["reports"]
        same = sum(this[f] == other.get(f) for f in this)
        line("reports identical to the --before checkout's", f"{same}/{len(this)}")


def timed_mark_task(*args):
    """``batch.mark_task`` that also reports the CPU seconds it used in its worker."""
    from claimkit import batch

    t0 = time.process_time()
    out = _ORIGINAL_MARK_TASK(*args) if _ORIGINAL_MARK_TASK else batch.mark_task(*args)
    out["_cpu"] = time.process_time() - t0
    return out


_ORIGINAL_MARK_TASK = None


@contextlib.contextmanager
def one_core(on: bool = True):
    """Run the block on one core only (``os.sched_setaffinity``): "on one core" as the target says.

    Marking one picture would otherwise use a second thread where a second
    core is free, and the 1-worker baseline would not be one core's work.
    """
    if not on or not hasattr(os, "sched_setaffinity"):
        yield
        return
    saved = os.sched_getaffinity(0)
    os.sched_setaffinity(0, {min(saved)})
    try:
        yield
    finally:
        os.sched_setaffinity(0, saved)


def bench_mark(profile, work: Path, count: int, rounds: int = 2) -> None:
    from claimkit import batch
    from claimkit.cli import scale

    print(f"\n2. batch mark of {count} 12-megapixel JPEGs (4000 x 3000), best of {rounds} "
          f"runs each  [{load()}]")
    folder = work / "mark12"
    files = write_jpegs(folder, count, (4000, 3000), start=3000, quality=92)
    t_de = pillow_decode_encode(files[:2]) / 2
    # The parent's own work per file (hash, serial, register, rename), timed on its main
    # thread only, so that the pool's helper threads and the memory sampler do not count.
    parent = [0.0]

    def timed(fn):
        def wrapper(*a, **k):
            t0 = time.thread_time()
            try:
                return fn(*a, **k)
            finally:
                parent[0] += time.thread_time() - t0
        return wrapper

    batch._MarkBatch._prepare = timed(batch._MarkBatch._prepare)
    batch._MarkBatch._finish = timed(batch._MarkBatch._finish)
    # CPU used inside the workers, to tell work done from CPU time obtained.
    global _ORIGINAL_MARK_TASK
    _ORIGINAL_MARK_TASK = batch.mark_task
    batch.mark_task = timed_mark_task
    task_cpu: list[float] = []
    finish = batch._MarkBatch._finish

    def record(self, job, value):
        task_cpu.append(value.get("_cpu", float("nan")))
        return finish(self, job, value)

    batch._MarkBatch._finish = record
    share = {1: 0.0, 2: 0.0}
    cpu_in_task = {1: float("inf"), 2: float("inf")}
    # 1, 2, 1, 2 workers, the best time of each kept: other work on the machine can only
    # slow a run down, so the fastest run is the least disturbed one.
    times = {1: float("inf"), 2: float("inf")}
    cpu_per_file = parent_cpu = float("inf")
    for run, workers in enumerate((1, 2) * rounds):
        parent[0] = 0.0
        task_cpu.clear()
        out = work / f"mark12-out-{run}"
        # A fresh profile per run: a run must not skip what the one before marked.
        with fresh_profile(work / f"home-mark-{run}") as prof, quiet(), one_core(workers == 1):
            t, cpu = time.perf_counter(), time.process_time()
            code = scale.mark_many(prof, [folder], out, workers=workers)
            wall = time.perf_counter() - t
            if wall < times[workers]:
                times[workers] = wall
                share[workers] = sum(task_cpu) / wall
                cpu_in_task[workers] = sum(task_cpu) / len(task_cpu)
            if workers == 1:
                cpu_per_file = min(cpu_per_file, (time.process_time() - cpu) / count)
            else:
                parent_cpu = min(parent_cpu, parent[0] / count)
        assert code == 0, f"batch mark failed with exit {code}"
        shutil.rmtree(out)
    per_file = times[1] / count
    line("Pillow decode + encode (q95, 4:4:4), per file", f"{t_de:.2f} s")
    line("batch mark, 1 worker on one core (in process), per file", f"{per_file:.2f} s")
    line("batch mark, 1 worker, CPU time per file", f"{cpu_per_file:.2f} s")
    line("mark CPU per file / (decode + encode) per file", f"{cpu_per_file / t_de:.1f}x")
    line("batch mark, 2 workers (incl. pool start), per file", f"{times[2] / count:.2f} s")
    line("  the parent's own CPU per file (hash, register, rename)", f"{parent_cpu:.3f} s")
    line("speed-up, 2 workers over 1", f"{times[1] / times[2]:.2f}x",
         f"target >= {TARGET_SPEEDUP}x")
    line("  CPU seconds per file inside the task, 1 / 2 workers",
         f"{cpu_in_task[1]:.2f} / {cpu_in_task[2]:.2f}", "equal: no extra work in parallel")
    line("  cores the tasks actually got, 1 / 2 workers", f"{share[1]:.2f} / {share[2]:.2f}",
         "2 workers on an idle machine: close to 2")


def bench_memory(work: Path, folders: list[tuple[str, Path]]) -> None:
    """Peak memory of the real command, ``claimkit mark DIR --out OUT --workers 2``."""
    import subprocess

    print(f"\n4. peak memory of `claimkit mark FOLDER --workers 2` (whole process tree: "
          f"command, forkserver, workers)  [{load()}]")
    for label, folder in folders:
        home = work / f"home-memory-{folder.name}"
        with fresh_profile(home):
            pass
        env = dict(os.environ, CLAIMKIT_HOME=str(home), CLAIMKIT_PASSPHRASE="bench")
        cmd = [sys.executable, "-m", "claimkit", "mark", str(folder), "--out",
               str(work / f"memory-out-{folder.name}"), "--workers", "2", "--json"]
        with TreeMemory(include_self=False) as mem:
            done = subprocess.run(cmd, env=env, capture_output=True, text=True, check=False)
        if done.returncode != 0:
            print(f"  {label}: claimkit mark failed ({done.returncode}): {done.stderr[-300:]}")
            continue
        line(f"{label}, sampled peak", f"{mem.peak / 2**20:.0f} MB",
             f"target < {TARGET_PEAK_MB} MB")
        line("  upper bound: sum of each process's own peak", f"{mem.bound / 2**20:.0f} MB",
             f"target < {TARGET_PEAK_MB} MB")


def _high_water_mb() -> float:
    """This process's peak resident memory (VmHWM; unlike ru_maxrss it starts afresh at exec)."""
    with open("/proc/self/status") as fh:
        for text in fh:
            if text.startswith("VmHWM:"):
                return int(text.split()[1]) / 1024
    return float("nan")


def growth_child(src: str, home: str) -> None:
    """In a fresh process: mark one file, examine the marked copy, report times and peak memory."""
    import json

    from claimkit import batch, scan, workflow
    from claimkit.evidence.profile import Profile
    from claimkit.mark import payload

    with Profile.open(Path(home), b"bench") as prof:
        # The default format (3): serial 1's own keys to mark, every key to examine.
        seed, keys = workflow.embed_keys(prof, 1), workflow.mark_keys(prof)
        checker = workflow.owner_payload_check(prof)
        bits = [int(b) for b in payload.pack(prof.owner_tag, 1, prof.payload_tag(1))]
    p = Path(src)
    # Warm up on a small picture: imports and key tables are not what is measured.
    warm = p.with_name("warm.png")
    Image.fromarray(make_picture(0, 256, 256, _sources())).save(warm)
    batch.mark_task(str(warm), str(p.with_name(".warm.png")), seed, bits, 1.0, 95, None)
    scan.scan_task(str(warm), keys, checker, 1e-9, None)
    base = _high_water_mb()
    staged = p.with_name(".staged.jpg")
    t = time.perf_counter()
    res = batch.mark_task(str(p), str(staged), seed, bits, 1.0, 95, None)
    t_mark = time.perf_counter() - t
    t = time.perf_counter()
    rep = scan.scan_task(str(staged), keys, checker, 1e-9, None)
    t_exam = time.perf_counter() - t
    peak = _high_water_mb()
    print(json.dumps({"mark": t_mark, "examine": t_exam, "peak_mb": peak, "base_mb": base,
                      "ok": "error" not in res and bool(rep.get("detected"))}))


def bench_growth(home: Path, work: Path, sizes) -> None:
    import json
    import subprocess

    print(f"\n3. cost growth with picture size (one file, a fresh process each)  [{load()}]")
    print(f"  {'MP':>5} {'decode s':>9} {'examine s':>10} {'s/MP':>7} {'mark s':>8} "
          f"{'s/MP':>7} {'peak MB':>8}")
    rows = []
    for w, h in sizes:
        p = write_jpegs(work / f"growth-{w}", 1, (w, h), start=4000 + w, quality=92)[0]
        t_dec = min(pillow_decode([p]) for _ in range(2))
        out = subprocess.run([sys.executable, __file__, "--growth-child", str(p), str(home)],
                             capture_output=True, text=True, check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        if not r["ok"]:
            print(f"  {w}x{h}: the marked copy was not found again")
        mp = w * h / 1e6
        rows.append((mp, r["examine"] / mp, r["mark"] / mp, r["peak_mb"]))
        print(f"  {mp:5.1f} {t_dec:9.2f} {r['examine']:10.2f} {r['examine'] / mp:7.3f} "
              f"{r['mark']:8.2f} {r['mark'] / mp:7.3f} {r['peak_mb']:8.0f}")
    first, last = rows[0], rows[-1]
    line(f"examine s/MP at {last[0]:.0f} MP / at {first[0]:.0f} MP", f"{last[1] / first[1]:.2f}x",
         "1.0 = linear in pixels; below 1: examine reads a window")
    line(f"mark s/MP at {last[0]:.0f} MP / at {first[0]:.0f} MP", f"{last[2] / first[2]:.2f}x",
         "1.0 = linear in pixels")
    line(f"peak memory of one process marking {last[0]:.0f} MP", f"{last[3]:.0f} MB",
         "with 2 workers, about twice this")


@contextlib.contextmanager
def fresh_profile(home: Path):
    from claimkit.evidence.profile import Profile

    Profile.create(home, "Ilse Marrow (benchmark)", b"bench").close()
    prof = Profile.open(home, b"bench")
    try:
        yield prof
    finally:
        prof.close()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--count12", type=int, default=16,
                    help="12-MP files in the batch-mark test (issue 6 names 200; default 16)")
    ap.add_argument("--scan-count", type=int, default=48, help="web-size files to scan")
    ap.add_argument("--quick", action="store_true", help="small counts, sizes up to 12 MP")
    ap.add_argument("--only", choices=("scan", "mark", "growth", "memory"), action="append",
                    help="run only these sections (repeatable)")
    ap.add_argument("--before", type=Path,
                    help="a checkout of the commit to compare with: the scan section also runs "
                         "its code on the same files and keys, and compares the reports")
    ap.add_argument("--growth-child", nargs=2, metavar=("FILE", "HOME"), help=argparse.SUPPRESS)
    ap.add_argument("--scan-child", nargs=2, metavar=("WEB", "HOME"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.growth_child:
        growth_child(*args.growth_child)
        return 0
    if args.scan_child:
        scan_child(*args.scan_child)
        return 0
    sizes = [(1200, 900), (2400, 1800), (4000, 3000), (6000, 4000)]
    if args.quick:
        args.count12, args.scan_count, sizes = 4, 16, sizes[:3]
    from claimkit.runner import default_workers
    print(f"claimkit scale benchmark: {default_workers()} usable cores, "
          f"Python {sys.version.split()[0]}")
    with tempfile.TemporaryDirectory(prefix="claimkit-bench-") as tmp:
        work = Path(tmp)
        only = set(args.only or ("scan", "mark", "growth", "memory"))
        with fresh_profile(work / "home") as profile:
            if "scan" in only:
                bench_scan(profile, work, args.scan_count, args.before)
            if "mark" in only:
                bench_mark(profile, work, args.count12)
        if "growth" in only:
            bench_growth(work / "home", work, sizes)
        if "memory" in only:
            if not (work / "mark12").is_dir():
                write_jpegs(work / "mark12", args.count12, (4000, 3000), start=3000, quality=92)
            big = work / "mark24"
            write_jpegs(big, 4, sizes[-1], start=6000, quality=92)
            bench_memory(work, [(f"{args.count12} files of 12 MP", work / "mark12"),
                                (f"4 files of {sizes[-1][0] * sizes[-1][1] / 1e6:.0f} MP", big)])
    print(f"\n[{load()}] Numbers are from this run on this machine; nothing is asserted. "
          "Other work on the machine (see the load averages) lowers the wall-clock rates "
          "and the speed-ups; CPU times per file are not affected.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
