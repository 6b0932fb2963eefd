"""Start-up of one-shot commands: whole processes, and where their import time goes.

    python benchmarks/bench_startup.py [--rounds 5] [--megapixels 1.6] [--before DIR]

Each row is a whole process, timed from start to exit (wall and CPU of the
child), the median over interleaved rounds, all in this one run:

- ``python -c pass`` (the interpreter alone) and ``python -c`` that imports
  Pillow and decodes the test JPEG (the reference of issue 16);
- ``claimkit --help`` and ``claimkit works`` (no passphrase);
- ``claimkit examine FILE`` opening the profile with the passphrase (scrypt at
  the production cost, N = 2**17) and with an unlocked session
  (``claimkit unlock``: no scrypt);
- ``claimkit examine`` in a session of a copy marked under the profile's own
  key (the owner's case: found at the first scale, then the content line and
  the opinion are weighed).

The photo carries no mark (every scale is examined). claimkit is byte-compiled
first (``compileall``, here and in ``--before DIR``), as an installed wheel is:
where ``PYTHONDONTWRITEBYTECODE`` is set, a checkout would compile every claimkit
module from source in every process.

``--before DIR`` also runs the same ``claimkit`` commands from another checkout
(``git worktree add DIR COMMIT``) through ``PYTHONPATH``, interleaved with
these, so that before and after are measured in the same run. Last, one
``python -X importtime`` of ``claimkit examine`` is summed by top-level
package (self times), for this tree and the ``--before`` one.
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

# One whole-process timer for both benchmarks (its peak memory is not used here).
from bench_engine import WRAP

from claimkit.cli import NUMERIC_THREAD_VARS


def run(argv: list[str], env: dict) -> dict:
    # cwd: the temporary folder, because `python -m` puts the current folder first on the
    # path, before PYTHONPATH, and a run from a checkout would import that checkout.
    out = subprocess.run([sys.executable, "-c", WRAP, *argv], capture_output=True, text=True,
                         env=env, check=False, cwd=env["XDG_RUNTIME_DIR"])
    if out.returncode != 0:
        raise SystemExit(f"{' '.join(argv)} failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def import_groups(argv: list[str], env: dict) -> tuple[float, dict[str, float]]:
    """Seconds of import in one ``-X importtime`` run, in total and by top-level package."""
    out = subprocess.run([sys.executable, "-X", "importtime", *argv], capture_output=True,
                         text=True, env=env, check=False, cwd=env["XDG_RUNTIME_DIR"])
    groups: dict[str, float] = collections.Counter()
    for line in out.stderr.splitlines():
        if not line.startswith("import time:") or "self [us]" in line:
            continue
        self_us, _, name = line[len("import time:"):].split("|")
        groups[name.strip().split(".")[0]] += int(self_us) / 1e6
    return sum(groups.values()), dict(groups)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--megapixels", type=float, default=1.6)
    ap.add_argument("--before", type=Path, help="a checkout of the commit to compare with")
    args = ap.parse_args()
    import compileall

    from PIL import Image
    from skimage import data

    import claimkit
    from claimkit import workflow
    from claimkit.evidence.profile import Profile

    compileall.compile_dir(Path(claimkit.__file__).parent, quiet=1)
    if args.before:
        compileall.compile_dir(args.before / "claimkit", quiet=1)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        home = work / "home"
        # No thread settings of ours: the commands run as a user's would (the console entry
        # point starts BLAS single-threaded itself; a --before checkout may not).
        env = {k: v for k, v in os.environ.items()
               if k not in ("CLAIMKIT_TEST_FAST_KDF", "CLAIMKIT_SESSION", "PYTHONPATH",
                            *NUMERIC_THREAD_VARS)}
        env.update(CLAIMKIT_HOME=str(home), XDG_RUNTIME_DIR=str(work))
        os.environ.pop("CLAIMKIT_TEST_FAST_KDF", None)
        os.environ["XDG_RUNTIME_DIR"] = str(work)    # the session file, as the commands see it
        w = round((args.megapixels * 1e6 * 1.5) ** 0.5)
        src = work / "photo.jpg"
        Image.fromarray(data.coffee()).resize((w, round(w / 1.5)), Image.BICUBIC).save(
            src, quality=92)
        marked = work / "marked.jpg"
        with Profile.create(home, "Bench Owner", b"bench") as p:   # production scrypt cost
            session = p.unlock(3600) if hasattr(p, "unlock") else None
            workflow.mark_file(p, src, marked)
        with_pass = dict(env, CLAIMKIT_PASSPHRASE="bench")
        py = sys.executable
        ck = [py, "-m", "claimkit"]
        rows: dict[str, tuple[list[str], dict]] = {
            "python -c pass": ([py, "-c", "pass"], env),
            "python -c decode": ([py, "-c", "import sys; from PIL import Image; "
                                  "Image.open(sys.argv[1]).load()", str(src)], env),
            "claimkit --help": ([*ck, "--help"], env),
            "claimkit works": ([*ck, "works"], env),
            "claimkit examine (passphrase)": ([*ck, "examine", str(src)], with_pass),
        }
        names = ["claimkit --help", "claimkit works", "claimkit examine (passphrase)"]
        if session is not None:
            rows["claimkit examine (session)"] = (
                [*ck, "examine", str(src)], dict(env, CLAIMKIT_SESSION=session.token))
            rows["claimkit examine marked copy (session)"] = (
                [*ck, "examine", str(marked)], dict(env, CLAIMKIT_SESSION=session.token))
            names += ["claimkit examine (session)", "claimkit examine marked copy (session)"]
        if args.before:
            before = dict(env, PYTHONPATH=str(args.before.resolve()))
            for name in names:
                argv, e = rows[name]
                rows[f"BEFORE {name}"] = (argv, {**e, "PYTHONPATH": before["PYTHONPATH"]})
        runs: dict[str, list[dict]] = collections.defaultdict(list)
        for _ in range(args.rounds):
            for name, (argv, e) in rows.items():
                runs[name].append(run(argv, e))

        def med(name: str, key: str) -> float:
            return statistics.median(r[key] for r in runs[name])

        print(f"test photo {src.stat().st_size / 1e6:.1f} MB JPEG, {args.megapixels:g} MP; "
              f"medians of {args.rounds} interleaved rounds; load average "
              f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
        ref_wall, ref_cpu = med("python -c decode", "seconds"), med("python -c decode",
                                                                  "cpu_seconds")
        for name in rows:
            wall, cpu = med(name, "seconds"), med(name, "cpu_seconds")
            print(f"  {name:40s} {wall:6.3f} s (cpu {cpu:6.3f} s)   = {wall / ref_wall:5.2f}x "
                  f"decode process, cpu {cpu / ref_cpu:5.2f}x")
        trees = [("this tree", env)]
        if args.before:
            trees.append(("before", dict(env, PYTHONPATH=str(args.before.resolve()))))
        for label, e in trees:
            total, groups = import_groups(["-m", "claimkit", "examine", str(src)],
                                          dict(e, CLAIMKIT_PASSPHRASE="bench"))
            top = sorted(groups.items(), key=lambda kv: -kv[1])[:8]
            print(f"imports of claimkit examine, {label}: {total:.3f} s; "
                  + ", ".join(f"{k} {v:.3f}" for k, v in top))
        print(f"load average now {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
