"""Start-up stays light: ``import mvkde`` and the command line's ``--version`` and
``--help`` load none of the heavy dependencies (the import-time check is common
practice, e.g. xarray's ``test_lazy_import``).  Times are measured in
``benchmarks/``, never asserted here."""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("xarray", "pandas", "scipy.stats", "dask", "distributed", "matplotlib")


def run_python(code: str, *args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run([sys.executable, *(["-c", code] if code else []), *args],
                          capture_output=True, text=True, env=env, cwd=ROOT, timeout=120)


LOADED = """
import json, sys
import {module}
print(json.dumps(sorted(m for m in sys.modules
                        if any(m == h or m.startswith(h + ".") for h in {heavy!r}))))
"""


@pytest.mark.parametrize("module", ["mvkde", "mvkde.cli", "mvkde.errors"])
def test_import_loads_no_heavy_module(module):
    result = run_python(LOADED.format(module=module, heavy=HEAVY))
    assert result.returncode == 0, result.stderr
    assert json.loads(result.stdout) == []


def test_cli_version_and_help_load_no_heavy_module():
    code = """
import json, sys, contextlib, io
from mvkde.cli import main
out = io.StringIO()
with contextlib.redirect_stdout(out):
    codes = [main(["--version"]), main(["--help"])]
print(json.dumps({"codes": codes, "text": out.getvalue(), "heavy": sorted(
    m for m in sys.modules if any(m == h or m.startswith(h + ".") for h in %r))}))
""" % (HEAVY,)
    result = run_python(code)
    assert result.returncode == 0, result.stderr
    report = json.loads(result.stdout)
    assert report["codes"] == [0, 0]
    assert "usage: mvkde" in report["text"]
    assert report["heavy"] == []


def test_python_m_mvkde_version_prints_version():
    import mvkde

    result = run_python("", "-m", "mvkde", "--version")
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == f"mvkde {mvkde.__version__}"


def test_public_names_load_on_first_use():
    code = """
import sys
import mvkde
assert "mvkde.estimator" not in sys.modules
names = set(dir(mvkde))
assert {"fit", "DensityEstimate", "kernel_table", "KERNEL_NAMES", "CAUTION"} <= names, names
fit = mvkde.fit
assert "mvkde.estimator" in sys.modules
from mvkde import DensityEstimate, fit as fit_again
assert fit_again is fit
assert mvkde.engines.ENGINES  # library submodules still reachable after a bare import
import numpy as np
est = mvkde.fit(np.random.default_rng(0).normal(size=(50, 2)), bandwidth="normal")
assert isinstance(est, DensityEstimate)
print("ok")
"""
    result = run_python(code)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "ok"


def test_unknown_name_is_an_attribute_error():
    import mvkde

    with pytest.raises(AttributeError, match="no attribute 'not_a_name'"):
        mvkde.not_a_name  # noqa: B018
    for name in mvkde.__all__:
        assert getattr(mvkde, name) is not None
