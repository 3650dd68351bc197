"""Run every benchmark case side by side with the reference libraries.

    python benchmarks/run.py [--smoke] [--only SECTION] [--out benchmarks/results.md]

Each row: mvkde's time, the reference library's time on the same data and
the same H, their ratio (reference / mvkde: > 1 means mvkde is faster) and
the max error relative to the peak density.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import importlib
import math
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
# measure the checkout this script lives in, not whichever mvkde the environment has
# installed (an editable install of another worktree would otherwise be imported)
sys.path.insert(0, str(HERE.parent))

from harness import CASES, NOTES, cores, machine  # noqa: E402

MODULES = ["bench_exact", "bench_engines", "bench_bandwidth", "bench_pipeline", "bench_memory",
           "bench_directional", "bench_compare"]


def fmt(x, digits=3):
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    if isinstance(x, float):
        return f"{x:.{digits}g}"
    return str(x)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--smoke", action="store_true", help="tiny sizes: checks the cases run, not their speed")
    ap.add_argument("--only", default=None, help="run only sections whose name contains this text")
    ap.add_argument("--out", default=str(HERE / "results.md"))
    args = ap.parse_args(argv)
    for m in MODULES:
        importlib.import_module(m)
    import mvkde
    print(f"machine: {machine()}; mvkde from {Path(mvkde.__file__).parent}", flush=True)
    lines = [
        "# mvkde benchmark results",
        "",
        f"Machine: {machine()}. Run: {_dt.datetime.now(_dt.timezone.utc):%Y-%m-%d %H:%M} UTC"
        + (" (smoke sizes: not a speed measurement)" if args.smoke else ""),
        "Command: `make bench` (`python benchmarks/run.py`). Ratio = reference time / mvkde time.",
        f"Cores: {cores()}. mvkde and the references run single-threaded numpy/scipy code paths; "
        "the machine may be shared, so compare ratios measured in the same run, not absolute times.",
        "",
    ]
    sections: dict[str, list[str]] = {}
    for section, fn in CASES:
        if args.only and args.only not in section:
            continue
        print(f"== {section}: {fn.__name__}", flush=True)
        for r in fn(args.smoke):
            met = "-" if r.met is None else ("met" if r.met else "MISSED")
            line = (f"| {r.name} | {fmt(r.mvkde_s)} | {r.reference or '-'} | {fmt(r.reference_s)} | "
                    f"{fmt(r.ratio)} | {fmt(r.max_error, 2)} | {r.target or '-'} | {met} | {r.notes} |")
            print(line, flush=True)
            sections.setdefault(section, []).append(line)
    for section, rows in sections.items():
        lines += [f"## {section}", "",
                  "| case | mvkde (s) | reference | reference (s) | ratio | max error / peak | target "
                  "| met / missed | notes |",
                  "|---|---|---|---|---|---|---|---|---|"] + rows + [""]
    if NOTES:
        lines += ["## Notes", ""] + [f"- {t}" for t in NOTES] + [""]
    Path(args.out).write_text("\n".join(lines) + "\n")
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
