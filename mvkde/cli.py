"""The ``mvkde`` command line: a thin layer over the library and the pipeline.

Exit status: 0 on success, 2 on bad input or configuration (one line on
stderr, no traceback), 1 on an unexpected internal error (short message and
the path of a log holding the traceback).

Start-up must stay light (``mvkde --version`` and ``--help`` in well under half a
second): this module imports only the standard library and ``mvkde.errors`` at
module level; each command imports the library or the pipeline it needs.
"""

from __future__ import annotations

import argparse
import os
import sys

from .errors import MvkdeError

EPILOG_CAUTION = (
    "Caution: a density estimate summarises its sample; tails beyond the data are "
    "extrapolation, and local codes and licensed practice decide design values."
)


# ---------------------------------------------------------------------------
# commands
# ---------------------------------------------------------------------------

def cmd_kernels(args) -> int:
    """``mvkde kernels``: print the kernel table (constants and efficiencies).

    Parameters
    ----------
    args : argparse.Namespace
        Parsed arguments of the sub-command (``dim``).

    Returns
    -------
    int
        Exit status (0 on success).
    """
    from .kernels import kernel_table

    d = args.dim
    if d < 1:
        raise MvkdeError(f"--dim must be a positive integer, got {d}")
    from .kernels import HIGHER_ORDER_NAMES, get_kernel

    rows = kernel_table(d)
    w = max(len(name) for name in [r["kernel"] for r in rows] + list(HIGHER_ORDER_NAMES)) + 2
    head = f"{'kernel':<{w}}{'support':<13}{'R(K)':>9}{'mu2(K)':>9}{'R^2 mu2':>10}{'eff.':>8}"
    if d > 1:
        head += f"{'eff. product':>14}{'eff. spherical':>16}"
    head += "  smoothness of the estimate"
    print(f"Kernels (constants on the standard support; efficiency relative to Epanechnikov"
          + (f"; d = {d} columns relative to the spherical Epanechnikov kernel" if d > 1 else "") + ")")
    print(head)
    print("-" * len(head))
    for r in rows:
        line = (f"{r['kernel']:<{w}}{r['support']:<13}{r['R']:>9.5f}{r['mu2']:>9.5f}"
                f"{r['R2mu2']:>10.5f}{r['efficiency']:>8.4f}")
        if d > 1:
            line += f"{r['efficiency_product']:>14.4f}{r['efficiency_spherical']:>16.4f}"
        line += f"  {r['smoothness']}"
        print(line)
    # the opt-in fourth-order kernels: mu2 = 0, so the second-order efficiency does not apply
    for name in HIGHER_ORDER_NAMES:
        k = get_kernel(name)
        support = "[-1, 1]" if k.is_compact else "(-inf, inf)"
        line = f"{name:<{w}}{support:<13}{k.roughness:>9.5f}{k.mu2:>9.5f}{'-':>10}{'-':>8}"
        if d > 1:
            line += f"{'-':>14}{'-':>16}"
        line += f"  {k.smoothness}; fourth order (opt-in): can go negative"
        print(line)
    print()
    print("Epanechnikov has the smallest R^2 mu2 of all non-negative kernels, so it needs the fewest")
    print("samples for a given accuracy; smooth kernels cost a few per cent; a differentiable")
    print("estimate needs a differentiable kernel (biweight, triweight, gaussian). Fourth-order")
    print("kernels (gaussian4, epanechnikov4; mu2 = 0, so no efficiency column) reduce bias but can")
    print("give negative densities.")
    if d > 1:
        print(f"In d = {d} the spherical form is at least as efficient as the product form; the")
        print("Gaussian kernel is the same in both forms.")
    return 0


def cmd_demo(args) -> int:
    """``mvkde demo``: run the example workflow on the sample grids (:func:`mvkde.demo.run`).

    Parameters
    ----------
    args : argparse.Namespace
        Parsed arguments of the sub-command (``out``).

    Returns
    -------
    int
        Exit status (0 on success).
    """
    from . import demo

    return demo.run(out_dir=args.out)


def cmd_run(args) -> int:
    """``mvkde run``: run a workflow and write its output.

    Parameters
    ----------
    args : argparse.Namespace
        Parsed arguments of the sub-command (``workflow``, ``set``, ``overwrite``).

    Returns
    -------
    int
        Exit status (0 on success).
    """
    from .pipeline.run import run_and_write

    run_and_write(args.workflow, args.set or (), overwrite=args.overwrite,
                  command_line=["mvkde", *sys.argv[1:]] if args.argv is None else ["mvkde", *args.argv])
    return 0


def cmd_check(args) -> int:
    """``mvkde check``: load a workflow and print its plan without running it.

    Parameters
    ----------
    args : argparse.Namespace
        Parsed arguments of the sub-command (``workflow``, ``set``).

    Returns
    -------
    int
        Exit status (0 on success).
    """
    from .pipeline.run import describe_plan, plan_run
    from .pipeline.workflow import load

    wf = load(args.workflow, args.set or ())
    print(describe_plan(plan_run(wf)))
    return 0


def cmd_plot(args) -> int:
    """``mvkde plot``: draw one cell or one field of an output file.

    Parameters
    ----------
    args : argparse.Namespace
        Parsed arguments of the sub-command.

    Returns
    -------
    int
        Exit status (0 on success).
    """
    from .plot import parse_selection, parse_size, plot_output, require_matplotlib

    require_matplotlib()
    selection = parse_selection(args.cell)
    if args.season is not None:
        if "season" in selection and selection["season"] != args.season:
            raise MvkdeError(f"--season {args.season} and --cell season={selection['season']} disagree: give one")
        selection["season"] = args.season
    size = parse_size(args.size, args.width, args.height)
    result = plot_output(args.output, cell=selection, field=args.field, variables=args.variables,
                         out=args.out, size=size)
    for note in result.notes:
        print(f"mvkde plot: {note}")
    print(f"mvkde plot: wrote {result.path} ({result.kind}, {result.size[0]}x{result.size[1]} pixels)")
    return 0


def cmd_inspect(args) -> int:
    """``mvkde inspect``: summarise an output file (text, or JSON with ``--json``).

    Parameters
    ----------
    args : argparse.Namespace
        Parsed arguments of the sub-command (``output``, ``json``).

    Returns
    -------
    int
        Exit status (0 on success).
    """
    from .inspect import format_summary, open_output, summarise, to_json

    ds = open_output(args.output)
    try:
        summary = summarise(ds, args.output)
    finally:
        ds.close()
    print(to_json(summary) if args.json else format_summary(summary))
    return 0


# ---------------------------------------------------------------------------
# parser
# ---------------------------------------------------------------------------

def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``mvkde`` and its sub-commands.

    Returns
    -------
    argparse.ArgumentParser
        Each sub-command sets ``func`` to its ``cmd_*`` function.
    """
    parser = argparse.ArgumentParser(
        prog="mvkde",
        description=("Joint probability densities of environmental variables: kernel density "
                     "estimates per station, grid cell and season, written as labelled netCDF "
                     "with provenance."),
        epilog=EPILOG_CAUTION,
    )
    from . import __version__
    parser.add_argument("--version", action="version", version=f"mvkde {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("kernels", help="table of kernels: constants, efficiency, smoothness",
                       description="Print every kernel's support, R(K), mu2(K), R(K)^2 mu2(K), AMISE "
                                   "efficiency relative to Epanechnikov and the smoothness of the "
                                   "estimate it gives; with --dim D > 1 also the efficiency of the "
                                   "product and spherical forms in D dimensions.")
    p.add_argument("--dim", type=int, default=1, metavar="D", help="number of variables (default 1)")
    p.set_defaults(func=cmd_kernels)

    p = sub.add_parser("demo", help="run the example on the shipped Aldmere basin sample data",
                       description="Fit and write densities from the invented Aldmere basin sample "
                                   "data in sample_grids/, with the embedded local scheduler.")
    p.add_argument("--out", default="out", help="output folder (default: out)")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("run", help="run a workflow file: densities per cell written to netCDF (or Zarr)",
                       description="Run a TOML workflow: read the inputs, estimate one joint density per "
                                   "cell (and season or group), write a labelled netCDF file with provenance.")
    p.add_argument("workflow", metavar="WORKFLOW", help="the workflow file (.toml)")
    p.add_argument("--set", action="append", metavar="KEY.PATH=VALUE",
                   help="override a workflow key, e.g. --set compute.workers=4 (repeatable; TOML values)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("check", help="validate a workflow and print its plan",
                       description="Validate a workflow and print the plan: cells, samples per cell, grid, "
                                   "estimated memory per task and output size. Reads coordinates and metadata, "
                                   "not the data values (a table is read to count its rows per group).")
    p.add_argument("workflow", metavar="WORKFLOW", help="the workflow file (.toml)")
    p.add_argument("--set", action="append", metavar="KEY.PATH=VALUE", help="override a workflow key")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("plot", help="quick-look picture (PNG) of an output file",
                       description="Draw one cell's density (joint density with its 50/90/99 % highest-density "
                                   "regions and marginals for two variables, a line for one, a circular plot "
                                   "for a direction) or, with --field, a map of a per-cell value. Needs the "
                                   "plot extra (matplotlib).")
    p.add_argument("output", metavar="OUTPUT.nc", help="a density file written by mvkde run")
    p.add_argument("--cell", action="append", metavar="DIM=VALUE[,DIM=VALUE]",
                   help="choose the cell: any cell dimension (lat, lon, season, station ...); nearest value "
                        "for numeric coordinates and dates (the value used is printed), exact for labels "
                        "(repeatable)")
    p.add_argument("--season", metavar="LABEL", help="same as --cell season=LABEL")
    p.add_argument("--field", metavar="NAME",
                   help="map a per-cell value: n_samples, grid_mass, flags, bandwidth[A,B], "
                        "exceedance[A>VALUE,B>VALUE] (always computed from the density) ...; or draw one "
                        "cell's grid product (cdf, exceedance, marginal_A) with every cell dim chosen")
    p.add_argument("--variables", metavar="A[,B]",
                   help="the one or two variables to draw (the others are integrated out; default: the first two)")
    p.add_argument("-o", "--out", metavar="FILE.png", help="picture to write (default: beside OUTPUT.nc)")
    p.add_argument("--size", metavar="WxH",
                   help="picture size in pixels (1200x900) or inches (12x9in, 100 pixels per inch); default "
                        "900x700, a map's canvas shaped like the map")
    p.add_argument("--width", metavar="PIXELS", help="picture width in pixels")
    p.add_argument("--height", metavar="PIXELS", help="picture height in pixels")
    p.set_defaults(func=cmd_plot)

    p = sub.add_parser("inspect", help="summary of an output file: cells, variables, estimator, flags, provenance",
                       description="Print what an output file holds and how it was made: dims and cells, "
                                   "variables and units, kernel, bandwidth selector and boundary method, "
                                   "bandwidth ranges over cells, flagged cells, warnings and the provenance "
                                   "(inputs with their SHA-256, versions, time).")
    p.add_argument("output", metavar="OUTPUT.nc", help="a density file written by mvkde run")
    p.add_argument("--json", action="store_true", help="print JSON for machines (the provenance record as stored)")
    p.set_defaults(func=cmd_inspect)
    return parser


def main(argv=None) -> int:
    """Entry point of the ``mvkde`` command.

    Library errors (:class:`~mvkde.errors.MvkdeError`) print one line; an
    internal error writes its traceback to a log file in the temporary directory.

    Parameters
    ----------
    argv : list of str, optional
        Arguments (default ``sys.argv[1:]``).

    Returns
    -------
    int
        Exit status: 0 on success, 1 on an internal error, 2 on a usage or input
        error (or no command), 130 on interruption.
    """
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        args.argv = None if argv is None else list(argv)
    except SystemExit as exc:  # argparse already printed its one-line usage error
        return int(exc.code or 0)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except MvkdeError as exc:
        print(f"mvkde {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"mvkde {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into head & co.: not an error
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except Exception as exc:  # an internal error: keep the traceback in a log, not on screen
        import tempfile
        import traceback
        from pathlib import Path

        log = Path(tempfile.gettempdir()) / f"mvkde-error-{os.getpid()}.log"
        log.write_text(traceback.format_exc())
        print(f"mvkde {args.command}: internal error ({type(exc).__name__}: {exc}); "
              f"traceback in {log}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
