"""Engine speed and memory on a 24-megapixel colour JPEG (issue 16 targets), printed as ratios.

    python benchmarks/bench_engine.py [--megapixels 24] [--rounds 3] [--breakdown]

Every reference does what claimkit does, no more:

- **decode**: ``Image.open(f).load()`` (no conversion, no NumPy copy);
- **decode + encode**: that decode and a JPEG encode at the quality and
  chroma sampling claimkit writes (quality 95, 4:4:4 = ``subsampling=0``);
- **whole process**: ``python -c`` that imports Pillow and decodes the file,
  beside the whole ``claimkit examine FILE`` command (interpreter start,
  imports, opening the profile with its real scrypt cost, examination), and
  the same command in a session from ``claimkit unlock`` (no scrypt).

``mark`` writes the default format (``formats.DEFAULT_WRITTEN``, printed).
Every ``examine`` reads a copy marked under the examining profile's own key
(the owner's case: the search stops at the first scale that claims); the
session command is also timed on the unmarked photo (every scale is read).
The package is byte-compiled first (``compileall``), as an installed wheel
is: where ``PYTHONDONTWRITEBYTECODE`` is set, a checkout would otherwise
compile every claimkit module from source in every process (about 0.2 s).

Targets (issue 16): examine in process <= 2x decode; ``claimkit examine`` as
a whole process <= 3x the whole decoding process; mark <= 3x decode + 4:4:4
encode; peak memory of any command < 1 GB.

The machine is shared, so nothing is timed alone: each round runs every
measurement once, one after another (in-process ones in their own child
process, three repetitions, median), and the ratios are of the medians over
the rounds, all in this one run. Beside each wall time the process's CPU
time is printed; ``mark`` overlaps writing the file with measuring SSIM on a
second thread, so its CPU time can exceed its wall time.

``--breakdown`` also times the steps of one ``mark`` run one after another
(thread pools replaced by direct calls) and prints each step's share.
``--before DIR`` also times ``mark`` from another checkout in the same rounds;
``--mark-only`` leaves out the examination rows (decode, decode + encode and
mark only).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

from claimkit.cli import NUMERIC_THREAD_VARS

QUALITY = 95      # what claimkit writes (workflow.mark_file's default; 4:4:4 at 90 and above)

CHILD = r"""
import json, os, statistics, sys, time
from pathlib import Path
mode, src, work = sys.argv[1], Path(sys.argv[2]), Path(sys.argv[3])
if mode in ("mark", "examine"):
    from claimkit.evidence.profile import Profile
    from claimkit import workflow
    prof = Profile.open(work / "home", b"bench")
from PIL import Image
walls, cpus = [], []
for i in range(3):
    t = time.perf_counter()
    c = time.process_time()
    if mode == "decode":
        Image.open(src).load()
    elif mode == "decode_encode":
        im = Image.open(src); im.load()
        im.save(work / "re.jpg", quality=QUALITY, subsampling=0)
    elif mode == "mark":
        workflow.mark_file(prof, src, work / f"m{i}.jpg", force=True)
    elif mode == "examine":
        workflow.examine_file(prof, work / "marked.jpg")
    walls.append(time.perf_counter() - t)
    cpus.append(time.process_time() - c)
# VmHWM: this process's own high-water mark (ru_maxrss would carry the parent's over exec).
hwm = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM"))
print(json.dumps({"seconds": statistics.median(walls), "cpu_seconds": statistics.median(cpus),
                  "peak_mb": hwm / 1024}))
""".replace("QUALITY", str(QUALITY))

# A whole process timed from start to exit, with its own peak memory
# (RUSAGE_CHILDREN of this small wrapper holds only that one child).
WRAP = r"""
import json, resource, subprocess, sys, time
t = time.perf_counter()
out = subprocess.run(sys.argv[1:], capture_output=True)
wall = time.perf_counter() - t
if out.returncode not in (0, 1):
    sys.exit(out.stderr.decode()[-2000:])
ru = resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps({"seconds": wall, "cpu_seconds": ru.ru_utime + ru.ru_stime,
                  "peak_mb": ru.ru_maxrss / 1024}))
"""

# One mark, step by step: each function mark_file calls is wrapped with a timer
# and the thread pools are replaced by direct calls, so the steps add up.
BREAKDOWN = r"""
import json, os, sys, time
from concurrent.futures import Future
from pathlib import Path
from claimkit import workflow
from claimkit.evidence.profile import Profile
src, work = Path(sys.argv[1]), Path(sys.argv[2])
prof = Profile.open(work / "home", b"bench")

class Direct:
    def __init__(self, *a, **k): pass
    def __enter__(self): return self
    def __exit__(self, *exc): return False
    def submit(self, fn, *a, **k):
        f = Future()
        try:
            f.set_result(fn(*a, **k))
        except BaseException as exc:
            f.set_exception(exc)
        return f
    def map(self, fn, *iterables):
        return [fn(*args) for args in zip(*iterables)]

workflow.ThreadPoolExecutor = Direct
spent = {}
inner = []      # time of the timed steps running inside the current one (not counted twice)
# CPU time of this thread (all steps run in it): a loaded machine does not inflate it;
# exiftool's own process is not in it.
def timed(label, fn):
    def wrapper(*a, **k):
        t = time.thread_time()
        inner.append(0.0)
        try:
            return fn(*a, **k)
        finally:
            took = time.thread_time() - t
            spent[label] = spent.get(label, 0.0) + took - inner.pop()
            if inner:
                inner[-1] += took
    return wrapper

reads = iter(["read + decode original", "decode marked bytes (from memory)"] * 9)
orig_read_picture = workflow.read_picture
def read_picture(*a, **k):
    return timed(next(reads), orig_read_picture)(*a, **k)
workflow.read_picture = read_picture
workflow._luma_band = timed("luma (BT.601, full size, bands)", workflow._luma_band)
workflow.perceptual_fingerprint = timed("perceptual fingerprint", workflow.perceptual_fingerprint)
class Proxy:
    # the module, with some functions replaced (only as workflow sees them)
    def __init__(self, module, **replaced):
        self._module = module
        self.__dict__.update(replaced)
    def __getattr__(self, name):
        return getattr(self._module, name)

workflow.scales = Proxy(workflow.scales, scales_plan=timed(
    "plan: mask, coarse component, key pattern", workflow.scales.scales_plan))
workflow.add_luma_delta_sse = timed("add change to R,G,B + squared changes (bands)",
                                    workflow.add_luma_delta_sse)
workflow._squared_error = timed("squared errors of the file as written", workflow._squared_error)
workflow.write_picture_keeping_bytes = timed("encode JPEG q95 4:4:4 + exiftool + atomic write",
                                             workflow.write_picture_keeping_bytes)
workflow.quality = Proxy(workflow.quality, ssim_estimate=timed(
    "SSIM (192 patches of 64x64, luma included)", workflow.quality.ssim_estimate))
best = None
for i in range(3):
    spent.clear()
    reads = iter(["read + decode original", "decode marked bytes (from memory)"])
    t = time.thread_time()
    workflow.mark_file(prof, src, work / f"b{i}.jpg", force=True)
    total = time.thread_time() - t
    if best is None or total < best[0]:
        best = (total, dict(spent))
print(json.dumps({"total": best[0], "steps": best[1]}))
"""


def child(mode: str, src: Path, work: Path, tree: Path | None = None) -> dict:
    """One in-process measurement in its own child; ``tree``: a checkout to import instead."""
    env = dict(os.environ, CLAIMKIT_TEST_FAST_KDF="1", OMP_NUM_THREADS="1")
    if tree is not None:
        env["PYTHONPATH"] = str(tree.resolve())
    argv = ([sys.executable, "-c", BREAKDOWN, str(src), str(work)] if mode == "breakdown"
            else [sys.executable, "-c", CHILD, mode, str(src), str(work)])
    return _run(argv, env, mode)


def whole_process(argv: list[str], env: dict, label: str) -> dict:
    return _run([sys.executable, "-c", WRAP, *argv], env, label)


def _run(argv: list[str], env: dict, label: str) -> dict:
    # cwd: the temporary folder, because `python -c` puts the current folder first on the path,
    # before PYTHONPATH, and a run from a checkout would import that checkout.
    out = subprocess.run(argv, capture_output=True, text=True, env=env, check=False,
                         cwd=tempfile.gettempdir())
    if out.returncode != 0:
        raise SystemExit(f"{label} failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def _claimkit_command() -> list[str]:
    """The installed console script next to this interpreter, else ``python -m claimkit``."""
    script = Path(sys.executable).with_name("claimkit")
    return [str(script)] if script.exists() else [sys.executable, "-m", "claimkit"]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--megapixels", type=float, default=24.0)
    ap.add_argument("--rounds", type=int, default=3, help="interleaved rounds (median taken)")
    ap.add_argument("--breakdown", action="store_true",
                    help="also time the steps of one mark, one after another")
    ap.add_argument("--before", type=Path,
                    help="a checkout of the commit to compare with: its mark is timed in the "
                         "same rounds (row BEFORE)")
    ap.add_argument("--mark-only", action="store_true",
                    help="time decode, decode + encode and mark only (no examination rows)")
    args = ap.parse_args()
    import compileall

    import numpy as np
    from PIL import Image
    from skimage import data

    import claimkit
    from claimkit import workflow
    from claimkit.evidence.profile import Profile
    from claimkit.mark import formats

    compileall.compile_dir(Path(claimkit.__file__).parent, quiet=1)
    if args.before:
        compileall.compile_dir(args.before / "claimkit", quiet=1)

    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        fast = dict(os.environ, CLAIMKIT_TEST_FAST_KDF="1")
        os.environ["CLAIMKIT_TEST_FAST_KDF"] = "1"
        Profile.create(work / "home", "Bench Owner", b"bench").close()
        # The command-line profile has the real key derivation: a user's command pays it.
        del os.environ["CLAIMKIT_TEST_FAST_KDF"]
        os.environ["XDG_RUNTIME_DIR"] = str(work)     # where `claimkit unlock` keeps its file
        with Profile.create(work / "home-cli", "Bench Owner", b"bench") as p:
            session = p.unlock(3600)                  # as `eval "$(claimkit unlock)"` would
        base = Image.fromarray(data.rocket())
        w = round((args.megapixels * 1e6 * 1.5) ** 0.5)
        h = round(w / 1.5)
        big = base.resize((w, h), Image.BICUBIC)
        # Add fine grain so the JPEG is as costly to code as a real photo.
        arr = np.asarray(big).astype(np.int16)
        arr += np.random.default_rng(0).integers(-6, 7, arr.shape, dtype=np.int16)
        src = work / "photo.jpg"
        Image.fromarray(np.clip(arr, 0, 255).astype(np.uint8)).save(src, quality=92)
        del arr, big
        print(f"test photo: {w}x{h} ({w * h / 1e6:.1f} MP), {src.stat().st_size / 1e6:.1f} MB JPEG"
              f"; load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
        child("mark", src, work)
        os.replace(work / "m0.jpg", work / "marked.jpg")
        marked = work / "marked.jpg"
        # The whole-process commands examine a copy marked under their own profile's key.
        with Profile.open(work / "home-cli", b"bench") as p:
            workflow.mark_file(p, src, work / "marked-cli.jpg")
        marked_cli = work / "marked-cli.jpg"
        print(f"mark format written: {formats.DEFAULT_WRITTEN} (the default)")
        # The commands run as a user's would: no thread settings of ours (the console
        # entry point starts BLAS single-threaded itself unless the environment says otherwise).
        cli_env = {k: v for k, v in os.environ.items() if k not in NUMERIC_THREAD_VARS}
        cli_env.update(CLAIMKIT_HOME=str(work / "home-cli"), CLAIMKIT_PASSPHRASE="bench")
        session_env = {k: v for k, v in cli_env.items() if k != "CLAIMKIT_PASSPHRASE"}
        session_env["CLAIMKIT_SESSION"] = session.token
        decode_cmd = [sys.executable, "-c",
                      "import sys; from PIL import Image; Image.open(sys.argv[1]).load()",
                      str(marked)]
        runs: dict[str, list[dict]] = {}
        for _ in range(args.rounds):
            for name, fn in (
                ("decode", lambda: child("decode", marked, work)),
                ("examine", lambda: child("examine", src, work)),
                ("proc_decode", lambda: whole_process(decode_cmd, fast, "python -c decode")),
                ("proc_examine", lambda: whole_process(
                    [*_claimkit_command(), "examine", str(marked_cli)], cli_env,
                    "claimkit examine")),
                ("proc_examine_session", lambda: whole_process(
                    [*_claimkit_command(), "examine", str(marked_cli)], session_env,
                    "claimkit examine (unlocked session)")),
                ("proc_examine_unmarked", lambda: whole_process(
                    [*_claimkit_command(), "examine", str(src)], session_env,
                    "claimkit examine (unmarked, unlocked session)")),
                ("decode_encode", lambda: child("decode_encode", src, work)),
                ("mark", lambda: child("mark", src, work)),
                ("mark_before", lambda: child("mark", src, work, args.before)),
            ):
                if name == "mark_before" and not args.before:
                    continue
                if args.mark_only and name not in ("decode", "decode_encode", "mark",
                                                    "mark_before"):
                    continue
                runs.setdefault(name, []).append(fn())

        def med(name: str, key: str = "seconds") -> float:
            return statistics.median(r[key] for r in runs[name])

        def peak(name: str) -> float:
            return max(r["peak_mb"] for r in runs[name])

        def show(label: str, name: str, ref: str | None = None, target: float | None = None):
            text = f"{label:34s} {med(name):6.2f} s  (cpu {med(name, 'cpu_seconds'):5.2f} s)"
            if ref:
                text += (f"   = {med(name) / med(ref):4.2f}x {ref}, cpu"
                         f" {med(name, 'cpu_seconds') / med(ref, 'cpu_seconds'):4.2f}x")
                if target:
                    text += f" (target <= {target:g})"
            print(text + f"   peak {peak(name):5.0f} MB")

        print(f"medians of {args.rounds} interleaved rounds (each in-process figure itself "
              "a median of 3):")
        show("Pillow decode (load only)", "decode")
        show(f"Pillow decode + encode q{QUALITY} 4:4:4", "decode_encode")
        if not args.mark_only:
            show("claimkit examine, in process", "examine", "decode", 2)
        show("claimkit mark, in process", "mark", "decode_encode", 3)
        if args.before:
            show(f"  BEFORE ({args.before.name})", "mark_before", "decode_encode", 3)
        if not args.mark_only:
            show("whole process: python -c decode", "proc_decode")
            show("whole process: claimkit examine", "proc_examine", "proc_decode", 3)
            show("  the same in an unlocked session", "proc_examine_session", "proc_decode", 3)
            show("  session, the unmarked photo", "proc_examine_unmarked", "proc_decode", 3)
        print("peak memory target: < 1024 MB for any command")
        print("On a loaded machine the wall times wait for cores; the CPU-time ratios are the "
              "steadier ones\n(mark's CPU counts both of its threads, so its CPU ratio is an "
              f"upper bound). Load average now {os.getloadavg()[0]:.1f}.")
        if args.breakdown:
            bd = child("breakdown", src, work)
            total = bd["total"]
            print(f"\nmark, step by step (no overlap), CPU seconds, best of 3: {total:.2f} s"
                  f" = {total / med('decode_encode', 'cpu_seconds'):.2f} x decode+encode CPU")
            rest = total
            for label, sec in sorted(bd["steps"].items(), key=lambda kv: -kv[1]):
                rest -= sec
                print(f"  {label:46s} {sec:5.2f} s  {100 * sec / total:4.0f} %")
            print(f"  {'other (registry, signing, checks, hashing)':46s} {rest:5.2f} s"
                  f"  {100 * rest / total:4.0f} %")


if __name__ == "__main__":
    main()
