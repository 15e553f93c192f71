"""Every benchmark script still imports: a restructure must not leave a script behind.

The scripts run for minutes to hours and are not part of the suite; importing each one (its
module body, not its main) catches a moved or renamed name the day it happens.
"""

import importlib.util
import sys
from pathlib import Path

import pytest

BENCHMARKS = sorted((Path(__file__).resolve().parent.parent / "benchmarks").glob("*.py"))


@pytest.mark.parametrize("path", BENCHMARKS, ids=lambda p: p.name)
def test_benchmark_script_imports(path, monkeypatch):
    # As `python benchmarks/x.py` runs it: its folder on the path (scripts import siblings),
    # the module registered under its name (dataclasses look themselves up there).
    monkeypatch.syspath_prepend(str(path.parent))
    spec = importlib.util.spec_from_file_location(path.stem, path)
    module = importlib.util.module_from_spec(spec)
    monkeypatch.setitem(sys.modules, path.stem, module)
    spec.loader.exec_module(module)
    assert callable(getattr(module, "main", None)), f"{path.name} has no main()"
