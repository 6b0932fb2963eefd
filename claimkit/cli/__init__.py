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
    class _Stderr(logging.StreamHandler):
        # The stderr of the moment, not the one at set-up: a caller that swaps sys.stderr
        # (a test's capture, a shell embedding main()) and closes it later must not leave a
        # handler writing to a closed stream ("--- Logging error ---").
        @property  # type: ignore[override]
        def stream(self):
            return sys.stderr

        @stream.setter
        def stream(self, value) -> None:
            pass

    handler = _Stderr()
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


# Parts of NumPy that no command uses, but that SciPy's array-API layer loads at import
# (its copy of the numpy namespace reads every public name, submodules included):
# numpy.f2py (with charset_normalizer), numpy.testing (with unittest) and numpy.polynomial
# cost about 0.15 s of CPU in every command that examines (benchmarks/bench_startup.py).
# Not numpy.ma: NumPy's own np.unique reads it, and a module loaded on first use must
# not be first used from two threads at once (Python 3.11's LazyLoader takes no lock).
DEFERRED_NUMPY_PARTS = ("numpy.f2py", "numpy.testing", "numpy.polynomial")


class _DeferredParts:
    """An import finder that hands the :data:`DEFERRED_NUMPY_PARTS` to ``LazyLoader``.

    The standard library's ``importlib.util.LazyLoader``: importing one of
    these parts gives the module object at once, and its code runs on the
    first attribute read, so anything that does use one gets the whole
    module. The other finders still locate the module; this one only wraps
    their loader.
    """

    def find_spec(self, name, path=None, target=None):
        if name not in DEFERRED_NUMPY_PARTS:
            return None
        import importlib.util

        for finder in sys.meta_path:
            if finder is self or not hasattr(finder, "find_spec"):
                continue
            spec = finder.find_spec(name, path, target)
            if spec is not None:
                if spec.loader is not None and hasattr(spec.loader, "exec_module"):
                    spec.loader = importlib.util.LazyLoader(spec.loader)
                return spec
        return None


def defer_unused_numpy_parts() -> None:
    """Load the :data:`DEFERRED_NUMPY_PARTS` when first used instead of at import.

    Installed by the command-line entry point only (not by the library, nor
    for tests that call :func:`main`); parts already loaded stay as they are.
    NumPy itself is not imported here: commands that need no NumPy still
    start without it.
    """
    if not any(isinstance(f, _DeferredParts) for f in sys.meta_path):
        sys.meta_path.insert(0, _DeferredParts())


# claimkit's matrix products are small (2 x 2 up to a few hundred rows): a BLAS thread
# pool does not shorten them, and on this 2-core machine its idle threads spun for about
# 0.2 s of CPU in every `claimkit examine` (0.98 s instead of 1.20 s; the same wall time
# and byte-identical JSON). The console entry point starts single-threaded BLAS unless
# the user's environment says otherwise; process pools inherit it.
NUMERIC_THREAD_VARS = ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "OMP_NUM_THREADS")


def single_threaded_numerics(environ: dict | None = None) -> None:
    """Set each of :data:`NUMERIC_THREAD_VARS` to 1 where it is not set (before NumPy loads)."""
    env = os.environ if environ is None else environ
    for var in NUMERIC_THREAD_VARS:
        env.setdefault(var, "1")


def run() -> None:  # pragma: no cover - console entry point
    single_threaded_numerics()
    if len(sys.argv) > 1 and sys.argv[1] not in ("-h", "--help", "--version"):
        defer_unused_numpy_parts()
    sys.exit(main())
