"""The ``claimkit`` command line: parse, call the Python API, print.

Each area of the tool registers its own sub-commands from a module of this
package (``engine``, ``evidence``, ``casework``, ``scale``), so that the
commands of one area can change without touching the others. Nothing in the
library imports this package.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import os
import sys

from claimkit import __version__
from claimkit.errors import ClaimkitError

# Modules that provide ``register(subparsers, common)``.
AREAS = ("engine", "evidence", "casework", "scale", "stress", "rights")


_USER_FIXABLE = {errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOSPC, errno.EDQUOT,
                 errno.ENOENT, errno.ENOTDIR, errno.EISDIR, errno.EEXIST, errno.ENAMETOOLONG}


def add_output_options(p: argparse.ArgumentParser) -> None:
    """``--quiet`` and ``--verbose``, accepted before or after any command."""
    p.add_argument("--quiet", "-q", action="store_true", default=argparse.SUPPRESS,
                   help="no progress bar")
    p.add_argument("--verbose", "-v", action="store_true", default=argparse.SUPPRESS,
                   help="also show the warnings of the libraries claimkit uses (Pillow, "
                        "tifffile, exiftool) on stderr")


def setup_logging(verbose: bool) -> None:
    """Route third-party warnings through ``logging``; show them only with ``--verbose``.

    Pillow's and tifffile's warnings (a metadata tag with an odd count, say)
    are not problems of the user's input: without ``--verbose`` they are
    kept off stderr, so that ``--json`` output and one-line errors stay clean.
    Worker processes inherit the choice through ``PYTHONWARNINGS``.
    """
    import logging
    import warnings

    logging.captureWarnings(True)
    root = logging.getLogger()
    for h in list(root.handlers):
        if getattr(h, "_claimkit", False):
            root.removeHandler(h)
    handler = logging.StreamHandler(sys.stderr)
    handler._claimkit = True  # type: ignore[attr-defined]
    handler.setFormatter(logging.Formatter("claimkit: %(name)s: %(message)s"))
    root.addHandler(handler)
    root.setLevel(logging.INFO if verbose else logging.CRITICAL)
    if verbose:
        warnings.simplefilter("default")
        os.environ.pop("PYTHONWARNINGS", None)
    else:
        warnings.simplefilter("ignore")
        os.environ["PYTHONWARNINGS"] = "ignore"


def build_parser() -> argparse.ArgumentParser:
    # SUPPRESS: an option given before the command must not be reset by the
    # command's own copy of it (both levels accept --home and --debug).
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--home", metavar="DIR", default=argparse.SUPPRESS,
                        help="owner profile folder (default: $CLAIMKIT_HOME or ~/.claimkit)")
    common.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                        help="show a full traceback on errors")
    add_output_options(common)
    parser = argparse.ArgumentParser(
        prog="claimkit",
        description="Mark photos invisibly, examine disputed copies, and hand over "
                    "evidence that another expert can re-check. Technical evidence, "
                    "not legal advice.",
        parents=[common],
    )
    parser.add_argument("--version", action="version", version=f"claimkit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in AREAS:
        importlib.import_module(f"claimkit.cli.{name}").register(sub, common)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    setup_logging(bool(getattr(args, "verbose", False)))
    try:
        code = args.func(args)
    except ClaimkitError as exc:
        if getattr(args, "debug", False):
            raise
        print(f"claimkit: error: {exc.line()}", file=sys.stderr)
        if exc.hint:
            print(f"claimkit: hint: {exc.hint}", file=sys.stderr)
        return exc.exit_code
    except BrokenPipeError:  # output piped into e.g. `head`: stop quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        print("claimkit: interrupted", file=sys.stderr)
        return 130
    except OSError as exc:
        # A folder the user cannot write to, a full disk, a missing folder: the user can
        # fix these, so they are bad input (exit 2), named by the file, not internal faults.
        if getattr(args, "debug", False) or exc.errno not in _USER_FIXABLE:
            if getattr(args, "debug", False):
                raise
            print(f"claimkit: error: internal fault ({type(exc).__name__}: {exc}); "
                  "run again with --debug for the details", file=sys.stderr)
            return 3
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"claimkit: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return 2
    except Exception as exc:  # an internal fault: one line unless --debug
        if getattr(args, "debug", False):
            raise
        print(f"claimkit: error: internal fault ({type(exc).__name__}: {exc}); "
              "run again with --debug for the details", file=sys.stderr)
        return 3
    return int(code or 0)


def run() -> None:  # pragma: no cover - console entry point
    sys.exit(main())
