"""The command line: exit codes, one-line errors, the kernel table."""

import subprocess
import sys

from mvkde.cli import main


def test_kernels_table(capsys):
    assert main(["kernels", "--dim", "3"]) == 0
    out = capsys.readouterr().out
    for name in ("uniform", "triangular", "epanechnikov", "biweight", "triweight", "cosine", "gaussian"):
        assert name in out
    assert "0.9532" in out  # product Epanechnikov efficiency in d = 3 [calc, Silverman 1986 eq. 4.4]
    assert "0.9512" in out  # Gaussian 1-D efficiency, Silverman 1986 Table 3.1


def test_bad_dim_exit_2(capsys):
    assert main(["kernels", "--dim", "0"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--dim" in err


def test_console_script_no_traceback():
    proc = subprocess.run([sys.executable, "-m", "mvkde.cli", "kernels", "--dim", "-1"],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr


def test_help_mentions_commands(capsys):
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    for cmd in ("run", "check", "kernels", "plot", "inspect", "demo"):
        assert cmd in out


def test_kernels_table_lists_the_fourth_order_kernels_as_able_to_go_negative(capsys):
    assert main(["kernels"]) == 0
    rows = {line.split()[0]: line for line in capsys.readouterr().out.splitlines() if line.strip()}
    for name in ("gaussian4", "epanechnikov4"):
        assert name in rows and "can go negative" in rows[name], rows.get(name)
    # R(K) of the fourth-order Gaussian (3 - u^2) phi(u) / 2 is 27 / (32 sqrt(pi)) [closed form]
    assert "0.47603" in rows["gaussian4"]
    assert "1.25000" in rows["epanechnikov4"]   # R(K) of (15/32)(3 - 10u^2 + 7u^4) [closed form]
