"""Commands for work at scale: ``scan``.

The batch form of ``mark`` (several inputs or a folder) is parsed by
:mod:`claimkit.cli.engine` and runs :func:`claimkit.batch.mark_many`.
"""

from __future__ import annotations

from pathlib import Path

from claimkit.cli.common import home_dir, passphrase


def add_scale_options(p) -> None:
    """``--workers``, ``--engine``, ``--scheduler`` (shared by ``scan`` and the batch ``mark``)."""
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="worker processes on this machine (default: all cores; 1 runs in "
                        "this process)")
    p.add_argument("--engine", choices=("local", "dask"), default="local",
                   help="local processes (default) or a Dask cluster")
    p.add_argument("--scheduler", metavar="ADDR",
                   help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 (with --engine "
                        "dask; without it a cluster is started on this machine)")


def cmd_scan(args) -> int:
    from claimkit.evidence.profile import Profile
    from claimkit.scan import scan_folders

    with Profile.open(home_dir(args), passphrase()) as profile:
        return scan_folders(
            profile, [Path(d) for d in args.folders], json_lines=args.json,
            report=Path(args.report) if args.report else None,
            case_dir=Path(args.case) if args.case else None,
            engine=args.engine, scheduler=args.scheduler, workers=args.workers,
            progress=False if (args.no_progress or getattr(args, "quiet", False)) else None,
            threshold=args.threshold, max_pixels=args.max_pixels, force=args.force)


def register(sub, common) -> None:
    from claimkit.mark.detect import DEFAULT_THRESHOLD

    p = sub.add_parser(
        "scan", parents=[common], help="look for the owner's mark in every image under folders",
        description="Examine every image under the folders with the owner's key: which are "
                    "marked, which work each is, how sure, and what was done to it. One line "
                    "per file, a summary at the end. Exit 0 when every file was read, 1 when "
                    "some could not be read, 2 when none could. Technical evidence, not legal "
                    "advice.")
    p.add_argument("folders", nargs="+", metavar="DIR",
                   help="folders (recursive), image files, or WARC files (.warc, .warc.gz): "
                        "every image response in a WARC is examined")
    p.add_argument("--json", action="store_true",
                   help="one JSON object per file on stdout; the summary as JSON on stderr")
    p.add_argument("--report", metavar="FILE.csv", help="also write a CSV, one row per file")
    p.add_argument("--force", action="store_true", help="replace an existing --report file")
    p.add_argument("--case", metavar="DIR", help="take every claimed copy into this case")
    p.add_argument("--threshold", type=float, default=DEFAULT_THRESHOLD,
                   help="largest false-alarm bound that counts as a claim (default 1e-9)")
    p.add_argument("--max-pixels", type=int, default=None, metavar="N",
                   help="refuse images with more pixels (decompression-bomb guard)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    add_scale_options(p)
    p.set_defaults(func=cmd_scan)
