"""Every command and every option has --help text (argparse's own parser tree is walked)."""

from __future__ import annotations

import argparse

import pytest

from claimkit.cli import build_parser


def _walk(parser: argparse.ArgumentParser, path: str):
    yield path, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            helps = {a.dest: a.help for a in action._choices_actions}
            for name, sub in action.choices.items():
                assert helps.get(name), f"{path} {name}: no help line in the command list"
                yield from _walk(sub, f"{path} {name}")


def test_every_command_and_option_has_help():
    missing = []
    for path, parser in _walk(build_parser(), "claimkit"):
        for action in parser._actions:
            if isinstance(action, (argparse._HelpAction, argparse._SubParsersAction)):
                continue
            if not action.help or action.help == argparse.SUPPRESS:
                missing.append(f"{path} {'/'.join(action.option_strings) or action.dest}")
    assert not missing, missing


def test_the_parser_and_the_profile_listing_load_no_numerics(tmp_path, profile_home):
    # Start-up of one-shot commands (benchmarks/bench_startup.py measures it): building the
    # parser, and a command that only reads the registry, must not import NumPy or SciPy
    # (a module-level import of the numeric core in a command module would bring both back).
    import subprocess
    import sys

    probe = ("import sys; from claimkit.cli import build_parser, main; build_parser(); "
             "code = main(sys.argv[1:]) if sys.argv[1:] else 0; "
             "heavy = sorted(m for m in ('numpy', 'scipy', 'PIL') if m in sys.modules); "
             "print(code, heavy, file=sys.stderr)")
    for argv in ([], ["works"]):
        out = subprocess.run([sys.executable, "-c", probe, *argv], capture_output=True, text=True,
                             check=False, cwd=tmp_path)
        assert out.stderr.strip().splitlines()[-1:] == ["0 []"], (argv, out.stderr[-2000:])


def test_every_help_page_fits_a_60_column_terminal(monkeypatch):
    # argparse wraps what it formats to $COLUMNS - 2; hand-formatted epilogs
    # (RawDescriptionHelpFormatter) are not wrapped, so they must be written to fit.
    monkeypatch.setenv("COLUMNS", "60")
    wide = []
    for path, parser in _walk(build_parser(), "claimkit"):
        for line in parser.format_help().splitlines():
            if len(line) > 60:
                wide.append(f"{path}: {line}")
    assert not wide, "\n".join(wide)


def test_the_command_line_loads_numpy_parts_it_never_uses_only_when_used():
    # SciPy's array-API layer reads every public numpy name at import, which would load
    # numpy.f2py and numpy.testing (and with them unittest and charset_normalizer) in every
    # examining command. The entry point defers them; using one still loads all of it.
    import subprocess
    import sys

    probe = (
        "import sys; from claimkit.cli import defer_unused_numpy_parts, DEFERRED_NUMPY_PARTS; "
        "defer_unused_numpy_parts(); import scipy.fft, scipy.ndimage, scipy.sparse; "
        "assert 'numpy' in sys.modules; "
        "loaded = sorted(m for m in ('unittest', 'numpy.f2py.crackfortran', "
        "'numpy.testing._private.utils', 'numpy.polynomial.polynomial') if m in sys.modules); "
        "import numpy; numpy.testing.assert_equal(numpy.polynomial.Polynomial([1, 2])(3), 7); "
        "print(loaded, 'unittest' in sys.modules, len(DEFERRED_NUMPY_PARTS))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=False)
    assert out.stdout.split() == ["[]", "True", "3"], out.stderr[-2000:]


def test_examines_content_line_without_a_reference_loads_no_registration_code():
    # `claimkit examine` weighs the content line on the work record's fingerprint unless
    # --originals gives the registered file: scipy.signal and scikit-image's feature,
    # registration and transform modules (about 0.6 s of CPU to import) load only when used.
    import subprocess
    import sys

    probe = ("import sys; import claimkit.cli.engine, claimkit.case.examine; "
             "print(sorted(m for m in ('scipy.signal', 'scipy.stats', 'skimage.feature', "
             "'skimage.registration', 'skimage.transform', 'skimage.measure', 'skimage.metrics') "
             "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=False)
    assert out.stdout.split() == ["[]"], out.stderr[-2000:]


def test_the_command_line_starts_blas_single_threaded_unless_told_otherwise():
    # OpenBLAS's own count, read through its C API (openblas_get_num_threads, as bundled
    # in NumPy's wheels): without the entry point's default it starts one thread per core.
    import glob
    import os
    import subprocess
    import sys

    import numpy

    libs = glob.glob(os.path.join(os.path.dirname(numpy.__file__), os.pardir, "numpy.libs",
                                  "libscipy_openblas*.so"))
    if not libs or (os.cpu_count() or 1) < 2:
        pytest.skip("NumPy without its bundled OpenBLAS, or one core: nothing to tell apart")
    probe = ("import ctypes, sys; from claimkit.cli import single_threaded_numerics; "
             "sys.argv[1] == 'yes' and single_threaded_numerics(); import numpy; "
             f"lib = ctypes.CDLL({libs[0]!r}); print(lib.scipy_openblas_get_num_threads64_())")
    env = {k: v for k, v in os.environ.items()
           if k not in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "OMP_NUM_THREADS")}

    def threads(*argv: str, **extra: str) -> int:
        out = subprocess.run([sys.executable, "-c", probe, *argv], capture_output=True,
                             text=True, check=False, env={**env, **extra})
        return int(out.stdout.strip() or -1)

    assert threads("no") == os.cpu_count()
    assert threads("yes") == 1
    assert threads("yes", OPENBLAS_NUM_THREADS="2") == 2
