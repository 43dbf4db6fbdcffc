"""Which kernel runs: the compiled one, else the numpy twin with one warning; TRACKER_KERNEL.

Also what the choice rests on: ``import tracker`` loads no solver (PEP 562), so a missing compiled
kernel can neither break the command line's ``--help`` nor hide behind a "circular import".
The end-to-end checks run a fresh interpreter in which importing the compiled kernel fails, as
after an install without a C compiler (.ci/run also checks a real such install).
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

import tracker
from tracker import InputError, Problem, solve
from tracker.core import _kernel, kernel, kernel_numpy

# A fresh interpreter in which the compiled kernel cannot be imported, then the command line.
WITHOUT_COMPILED = """
import importlib.abc, sys

class NoCompiledKernel(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path, target=None):
        if name == "tracker.core._kernel":
            raise ImportError("no compiled kernel (as after an install without a C compiler)")
        return None

sys.meta_path.insert(0, NoCompiledKernel())
from tracker.cli import main
sys.exit(main(sys.argv[1:]))
"""


def run_python(
    code: str, *args: str, kernel_setting: str | None = None
) -> subprocess.CompletedProcess[str]:
    """Run ``code`` in a fresh interpreter with TRACKER_KERNEL set (or unset)."""
    env = {name: value for name, value in os.environ.items() if name != kernel.ENVIRONMENT}
    if kernel_setting is not None:
        env[kernel.ENVIRONMENT] = kernel_setting
    return subprocess.run(
        [sys.executable, "-c", code, *args],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
        check=False,
    )


def test_compiled_kernel_is_preferred() -> None:
    """With TRACKER_KERNEL unset or empty, the compiled kernel runs when it is there."""
    assert [("compiled", _kernel)] * 2 == [kernel.choose(None), kernel.choose("")]


def test_numpy_kernel_on_request() -> None:
    """TRACKER_KERNEL=numpy chooses the numpy kernel, without a warning."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert ("numpy", kernel_numpy) == kernel.choose("numpy")


def test_missing_compiled_kernel_falls_back_with_one_warning(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Without the compiled kernel the numpy one runs, and one RuntimeWarning says so."""
    monkeypatch.setattr(kernel, "compiled", lambda: None)
    with pytest.warns(RuntimeWarning, match="compiled solver kernel .* is missing") as record:
        chosen = kernel.choose(None)
    assert (("numpy", kernel_numpy), 1) == (chosen, len(record))


def test_compiled_kernel_on_request_must_be_there(monkeypatch: pytest.MonkeyPatch) -> None:
    """TRACKER_KERNEL=compiled refuses to run slow: an ImportError when the kernel is missing."""
    monkeypatch.setattr(kernel, "compiled", lambda: None)
    with pytest.raises(ImportError, match="reinstall tracker where a C compiler"):
        kernel.choose("compiled")


def test_unknown_setting_is_an_input_error() -> None:
    """A TRACKER_KERNEL value that names no kernel says which values there are."""
    with pytest.raises(InputError, match="'fast' is not a kernel: use 'compiled', 'numpy'") as info:
        kernel.choose("fast")
    assert kernel.ENVIRONMENT == info.value.field


def test_environment_variable_forces_numpy_for_the_process() -> None:
    """TRACKER_KERNEL=numpy in the environment makes the whole process run the numpy kernel."""
    result = run_python(
        "from tracker.core import kernel, solve; print(kernel.NAME, solve.kernel.KERNEL.__name__)",
        kernel_setting="numpy",
    )
    assert ("numpy tracker.core.kernel_numpy\n", "") == (result.stdout, result.stderr)


def test_import_tracker_loads_no_solver() -> None:
    """``import tracker`` loads neither the solver nor numpy; the first use of a name does."""
    result = run_python(
        "import sys, tracker\n"
        "before = {'tracker.core.solve', 'numpy'} & set(sys.modules)\n"
        "tracker.solve\n"
        "print(sorted(before), 'tracker.core.solve' in sys.modules)"
    )
    assert ("[] True\n", "") == (result.stdout, result.stderr)


def test_every_public_name_loads() -> None:
    """Every name of ``tracker.__all__`` is there, and ``dir(tracker)`` lists it."""
    missing = [name for name in tracker.__all__ if getattr(tracker, name, None) is None]
    assert ([], set()) == (missing, set(tracker.__all__) - set(dir(tracker)))


def test_unknown_name_is_an_attribute_error() -> None:
    """A name the package does not have raises AttributeError (so hasattr works)."""
    with pytest.raises(AttributeError, match="has no attribute 'solver'"):
        _ = tracker.solver


def test_help_works_without_the_compiled_kernel() -> None:
    """``tracker --help`` works where the compiled kernel is missing."""
    result = run_python(WITHOUT_COMPILED, "--help")
    assert (0, True) == (result.returncode, "plan" in result.stdout)


def test_plan_without_the_compiled_kernel_gives_the_same_answer(tmp_path: Path) -> None:
    """``tracker plan`` without the compiled kernel: the same schedule, one warning on stderr."""
    fields = {
        "quantity": 40000,
        "bins": 26,
        "fixed_cost": 0.01,
        "temporary_impact": 2e-4,
        "impact_exponent": 0.5,
        "permanent_impact": 0.0,
        "inventory_penalty": 3e-7,
        "penalty_exponent": 1.5,
        "terminal_penalty": "force",
        "caps": [2500.0] * 6 + [None] * 20,
    }
    path = tmp_path / "problem.json"
    path.write_text(json.dumps(fields))
    result = run_python(WITHOUT_COMPILED, "plan", "--problem", str(path), "--format", "json")
    assert 0 == result.returncode, result.stderr
    assert 1 == result.stderr.count("is missing"), result.stderr
    twin = json.loads(result.stdout)
    compiled = solve(Problem.from_mapping(fields))
    assert ("interior_point", compiled.iterations) == (twin["method"], twin["iterations"])
    assert math.isclose(compiled.objective, twin["objective"], rel_tol=1e-9, abs_tol=0.0)
    assert (
        max(abs(a - b) for a, b in zip(compiled.trades, twin["trades"], strict=True)) <= 1e-9 * 4e4
    )
