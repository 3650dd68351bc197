"""The benchmark suite runs end to end on tiny sizes (a smoke test: no timing is asserted)."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_benchmark_cases_run_on_tiny_sizes(tmp_path):
    out = tmp_path / "results.md"
    proc = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "run.py"), "--smoke", "--out", str(out)],
                          cwd=ROOT, capture_output=True, text=True, timeout=300,
                          env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    assert proc.returncode == 0, proc.stderr[-3000:]
    text = out.read_text()
    assert "Cores:" in text
    for section in ("binned grids vs scipy.stats.gaussian_kde", "large samples (time and memory)",
                    "scattered points vs scikit-learn KernelDensity",
                    "small sample vs statsmodels KDEMultivariate"):
        assert f"## {section}" in text
    # every row carries a finite time and, where there is a reference, a small error
    rows = [line for line in text.splitlines() if line.startswith("| ") and not line.startswith("| case")]
    assert len(rows) >= 6
    for line in rows:
        cells = [c.strip() for c in line.strip("|").split("|")]
        assert float(cells[1]) > 0
        if cells[5] != "-":
            assert float(cells[5]) < 1e-2, line
