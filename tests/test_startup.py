"""Start-up: what a command or an analysis module loads before it does any work.

The time this saves is measured in benchmarks/bench_speed.py; here only the modules loaded are
checked, each in a fresh interpreter, so that a heavy import slipping back fails a test.
"""

import json
import subprocess
import sys

import pytest

HEAVY = ("numpy", "scipy", "matplotlib", "emcee", "flask", "scipy.stats")


def _loaded_after(code: str) -> set[str]:
    """Names of HEAVY modules present in sys.modules after running ``code`` in a new process."""
    script = (
        "import json, sys\n"
        f"{code}\n"
        f"print(json.dumps([m for m in {HEAVY!r} if m in sys.modules]))\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          check=True, timeout=120)
    return set(json.loads(done.stdout.strip().splitlines()[-1]))


@pytest.mark.parametrize("argv", [["--help"], ["verify", "--help"], ["add-admin", "--help"]])
def test_help_loads_no_numerical_or_web_library(argv):
    code = (
        "import contextlib, io\n"
        "from service.cli.main import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        "    try:\n"
        f"        main({argv!r})\n"
        "    except SystemExit:\n"
        "        pass"
    )
    assert _loaded_after(code) == set()


@pytest.mark.parametrize("module", ["analysis.sampling", "analysis.cbt.fit", "analysis.cbt.global_fit",
                                    "analysis.pump.plateau", "analysis.sensors", "analysis.budget"])
def test_analysis_modules_do_not_load_scipy_stats(module):
    # scipy.stats alone costs 0.4-1 s to import; the analysis uses scipy.special's quantiles.
    assert "scipy.stats" not in _loaded_after(f"import {module}")


def test_emcee_keeps_its_moves_but_not_the_kde_move():
    code = (
        "from analysis.sampling import emcee\n"
        "print(emcee.moves.DEMove.__module__, emcee.moves.MHMove.__module__)\n"
        "try:\n"
        "    emcee.moves.KDEMove()\n"
        "except RuntimeError as exc:\n"
        "    print(exc)"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                          timeout=120)
    moves, refusal = done.stdout.strip().splitlines()
    assert moves == "emcee.moves.de emcee.moves.mh"
    assert "KDE move is not loaded" in refusal
