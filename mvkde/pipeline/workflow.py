"""Workflow files: schema, defaults and validation in one place.

A workflow is a TOML file (read with the standard library's ``tomllib``).
:data:`SCHEMA` lists every section and key with its default, its type and
its valid choices; :func:`load` reads a file, applies ``--set`` overrides,
checks every key against the schema and returns a :class:`Workflow` holding
the resolved specification (every default filled in), which is what the
runner uses and what the output's provenance records.

Errors are :class:`mvkde.errors.ConfigError` and name the file, the key
path (``estimator.kernel``), the bad value and the valid choices or the
closest match.
"""

from __future__ import annotations

import copy
import math
import os
import tomllib
from pathlib import Path

from ..bandwidth import BandwidthMatrix
from ..errors import ConfigError, MvkdeError, closest_names
from .keys import (Key, SEASONS, _bandwidth, _block_size, _bool, _bounds, _box, _choice, _float, _fractions, _int,
                   _limits, _months, _number_list, _one_of, _opt_str, _paths, _scheduler, _seasons, _show, _size, _str,
                   _str_list, _thresholds, _time_range, estimator_choices, _windows, _sources, _alpha)

__all__ = ["SCHEMA", "Workflow", "load", "loads", "from_arguments", "apply_override", "SEASONS", "REQUIRED",
           "estimator_choices", "key_reference"]


class _Required:
    def __repr__(self):
        return "<required>"


REQUIRED = _Required()


# ---------------------------------------------------------------------------

# ---------------------------------------------------------------------------
# the schema
# ---------------------------------------------------------------------------

#: section -> key -> Key.  ``variables`` is a table of tables (one per variable),
#: described by VARIABLE_KEYS; ``grid.limits`` and ``input.box`` are free tables.
SCHEMA: dict[str, dict[str, Key]] = {
    "input": {
        "path": Key(REQUIRED, _paths, "a netCDF file, a glob of netCDF files, a .csv or .parquet table, or a "
                                      "list of files; relative paths are looked up from the current folder, "
                                      "then from the workflow file's folder (not needed with input.sources)"),
        "windows": Key({}, _windows, "NAME = [start, end]: named time windows (ISO dates, both days included) "
                                     "giving an output dimension window; windows may differ in length and may "
                                     "overlap (a sample in two windows counts in both)"),
        "sources": Key({}, _sources, "NAME = \"path or glob\": several inputs with the same variables and "
                                     "cells, giving an output dimension source (replaces input.path)"),
        "variables": Key(REQUIRED, _str_list(), "variables whose joint density is estimated, in order"),
        "sample_dims": Key(["time"], _str_list(), "dimensions pooled into each sample; every other "
                                                  "dimension of the variables is a cell dimension"),
        "group_by": Key(None, _opt_str, "tables: a column whose values each get their own density; the "
                                        "output dimension is named after it"),
        "time": Key("time", _str, "name of the time dimension (gridded) or time column (tables)"),
        "time_range": Key(None, _time_range, "[start, end], inclusive; ISO dates"),
        "months": Key(None, _months, "keep only these months (1..12)"),
        "seasons": Key(None, _seasons, "keep only these meteorological seasons (DJF, MAM, JJA, SON)"),
        "split_by": Key(None, _one_of("season", "month", optional=True),
                        "\"season\" or \"month\": one density per season (or month) as an extra output "
                        "dimension named season (or month)"),
        "box": Key({}, _box, "coordinate = [lo, hi] ranges (inclusive), e.g. a lat/lon box"),
        "min_samples": Key(30, _int(lo=2), "cells with fewer valid samples get NaN density and a flag"),
        "max_samples": Key(None, _int(lo=2, optional=True), "random subsample (seeded) of larger cells"),
        "format": Key("auto", _one_of("auto", "netcdf", "csv", "parquet"),
                      "input format; auto = from the file suffix"),
    },
    "estimator": {
        "kernel": Key("gaussian", _choice("kernel"), "kernel name (mvkde kernels lists them; opt-in fourth-order "
                                                 "kernels that can go negative: gaussian4, epanechnikov4)", "kernel"),
        "form": Key("product", _choice("form"), "product or spherical kernel", "form"),
        "bandwidth": Key("plugin", _bandwidth, "bandwidth selector (for one variable also sj or isj), or a given "
                                               "d x d matrix H (a list of rows, the covariance of the "
                                               "scaled kernel)", "bandwidth"),
        "parametrization": Key("full", _choice("parametrization"), "full, diagonal or scalar H",
                               "parametrization"),
        "boundary": Key("linear", _choice("boundary"), "boundary correction for bounded variables (used only "
                                                       "when bounds are declared); linear = the linear boundary "
                                                       "kernel (Jones 1993), reflection where it cannot apply "
                                                       "(recorded in the output)", "boundary"),
        "engine": Key("auto", _choice("engine"), "evaluation engine", "engine"),
        "seed": Key(0, _int(lo=0), "seed of every random step (subsampling); recorded in the provenance"),
        "sphere": Key(None, _str_list(optional=True), "[latitude, longitude]: two of input.variables (degrees) "
                                                      "forming one location on the Earth, smoothed with the von "
                                                      "Mises-Fisher kernel; the density is then per km2 and the "
                                                      "output has a cell_area coordinate"),
    },
    "grid": {
        "size": Key([64], _size, "nodes per variable (one number for all, or one per variable)"),
        "limits": Key({}, _limits, "variable = [lo, hi]; default: the pooled data range widened by 20 % "
                                   "each side and cut at the bounds"),
    },
    "compute": {
        "scheduler": Key("processes", _scheduler, "processes (embedded local scheduler; forked worker "
                                                  "processes), threads, local-cluster, synchronous, or the "
                                                  "address of a running dask.distributed scheduler"),
        "workers": Key(None, _int(lo=1, optional=True), "threads, processes or local-cluster workers "
                                                        "(default: the number of cores)"),
        "block_size": Key("auto", _block_size, "cells per dask task (memory per task grows with it); "
                                               "auto = enough blocks to keep every worker busy, at most 64 "
                                               "cells each"),
        "memory_limit": Key("auto", _str, "local-cluster memory limit per worker, e.g. \"2GB\""),
    },
    "products": {
        "marginals": Key(False, _bool, "write marginal_NAME: each variable's marginal density per cell "
                                       "(integrated from the grid; point mass included for the others)"),
        "cdf": Key(False, _bool, "write cdf: P(X <= x componentwise) at every grid node"),
        "exceedance": Key(False, _bool, "write exceedance: P(X > x componentwise) at every grid node"),
        "thresholds": Key([], _thresholds, "points [[x1, x2, ...], ...] at which to write the joint "
                                           "exceedance probability (exceedance_at_threshold)"),
        "hdr_masses": Key([], _fractions, "write hdr_level: density levels whose regions enclose these "
                                          "masses, e.g. [0.5, 0.9, 0.99]"),
        "quantiles": Key([], _fractions, "write quantile_NAME: marginal quantiles at these probabilities"),
        "standard_error": Key(False, _bool, "write density_standard_error: the asymptotic pointwise "
                                            "standard error sqrt(f R(K) / (n |H|^(1/2)))"),
        "samples": Key(0, _int(lo=0), "write this many random draws per cell from its estimate "
                                      "(smoothed bootstrap; seeded by estimator.seed)"),
        "points": Key(None, _opt_str, "a CSV table with one column per variable: write density_at_point "
                                      "for each row"),
        "sectors": Key(0, _int(lo=0), "wind-rose numbers: joint probability per direction sector (this many, "
                                      "centred on 0) and speed class, for a (direction, speed) pair with one "
                                      "circular variable; 0 = none"),
        "speed_classes": Key([], _number_list, "class edges of the linear variable for products.sectors; "
                                               "default: five equal classes over its grid"),
        "bootstrap": Key(0, _int(lo=0), "bootstrap replicates for percentile bands of the density "
                                        "(density_lower/upper) and of exceedance_at_threshold; 0 = none"),
        "band_level": Key(0.9, _float(positive=True), "coverage of the bootstrap bands (0 < level < 1)"),
        "return_periods": Key(False, _bool, "write return_period_and and return_period_or (years) at "
                                            "products.thresholds (Salvadori & De Michele 2004); needs "
                                            "thresholds"),
        "observations_per_year": Key(None, _float(optional=True, positive=True),
                                     "samples per year for the return periods; default: the mean number "
                                     "per year of the selection, from the time coordinate (required when "
                                     "time is not a date)"),
    },
    "compare": {
        "reference": Key(None, _opt_str, "a label of input.windows or input.sources: writes "
                                         "density_difference, density_change_significant, and at "
                                         "products.thresholds probability_ratio (with _lower/_upper from "
                                         "products.bootstrap) for every other label"),
        "alpha": Key(0.05, _alpha, "false discovery rate of the local test over each cell's grid "
                                   "(Benjamini-Hochberg)"),
        "dim": Key(None, _one_of("window", "source", optional=True),
                   "which labels are compared (window or source), when both input.windows and "
                   "input.sources are given; the other stays a plain dimension"),
    },
    "output": {
        "path": Key(REQUIRED, _str, "output netCDF file, or a Zarr store when it ends in .zarr (needs the zarr "
                                    "extra); relative to the current folder"),
        "dtype": Key("float64", _one_of("float64", "float32"), "storage type of the density"),
        "complevel": Key(4, _int(lo=0, hi=9), "zlib compression level (0 = none)"),
        "title": Key(None, _opt_str, "global title attribute"),
        "overwrite": Key(False, _bool, "replace an existing output (also --overwrite)"),
        "resume": Key(False, _bool, "keep finished blocks in a Zarr store next to the output "
                                    "(folder OUTPUT.resume) and skip them when the run is restarted; needs "
                                    "the zarr extra (also installed as the resume extra)"),
    },
}

VARIABLE_KEYS: dict[str, Key] = {
    "bounds": Key(None, _bounds, "[lo, hi] support; inf for an open side"),
    "point_mass": Key(None, _float(), "values <= this count as a point mass at the bound (e.g. dry days)"),
    "period": Key(None, _float(positive=True), "period of a circular variable (e.g. 360.0 for degrees)"),
    "units": Key(None, _opt_str, "units, overriding the input's units attribute"),
}


# ---------------------------------------------------------------------------
# loading
# ---------------------------------------------------------------------------

class Workflow:
    """A validated workflow: ``spec`` is the resolved dict with every default."""

    def __init__(self, spec: dict, path: Path | None, overrides: list[str], name: str | None = None):
        self.spec = spec
        self.path = path
        self.overrides = list(overrides)
        self.name = name

    def __getitem__(self, section):
        return self.spec[section]

    @property
    def source(self) -> str:
        return str(self.path) if self.path else (self.name or "<workflow>")

    @property
    def variables(self) -> list[str]:
        return self.spec["input"]["variables"]

    def variable(self, name) -> dict:
        """The ``[variables.NAME]`` settings of one variable.

        Parameters
        ----------
        name : str

        Returns
        -------
        dict
        """
        return self.spec["variables"][name]

    def grid_size(self) -> list[int]:
        """Grid nodes per variable (one given size applies to every variable).

        Returns
        -------
        list of int
        """
        size = self.spec["grid"]["size"]
        return size * len(self.variables) if len(size) == 1 else list(size)

    def input_paths(self) -> list[str]:
        """Input paths resolved: the current folder first, then the workflow's folder.

        Returns
        -------
        list of str
        """
        return self.resolve_paths(self.spec["input"]["path"] or [])

    def resolve_paths(self, paths) -> list[str]:
        """Paths (or globs) resolved: the current folder first, then the workflow's folder.

        Parameters
        ----------
        paths : iterable of str

        Returns
        -------
        list of str
        """
        out = []
        for p in paths:
            q = Path(os.path.expanduser(p))
            if not q.is_absolute() and self.path is not None and not _exists(q):
                alt = self.path.parent / q
                if _exists(alt):
                    q = alt
            out.append(str(q))
        return out

    def to_json(self) -> dict:
        """The resolved specification in plain JSON types (inf written as strings).

        Returns
        -------
        dict
        """
        return _jsonable(self.spec)


def _exists(p: Path) -> bool:
    import glob

    return p.exists() or bool(glob.glob(str(p)))


def _jsonable(obj):
    if isinstance(obj, dict):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return "inf" if obj > 0 else ("-inf" if obj < 0 else "nan")
    return obj


def load(path, overrides=()) -> Workflow:
    """Read, override and validate a workflow file.

    Parameters
    ----------
    path : str or Path
    overrides : sequence of str, optional
        ``key.path=value`` items (see :func:`apply_override`).

    Returns
    -------
    Workflow

    Raises
    ------
    ConfigError
        If the file cannot be read or the workflow is not valid.
    """
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise ConfigError(f"workflow file {path} not found") from None
    except IsADirectoryError:
        raise ConfigError(f"workflow file {path} is a folder: name the .toml file") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"workflow file {path} is not UTF-8 text (byte {exc.start}): save it as UTF-8 "
                          "TOML") from None
    except OSError as exc:
        raise ConfigError(f"cannot read workflow file {path}: {exc.strerror or exc}") from None
    return loads(text, source=path, overrides=overrides)


def loads(text: str, source=None, overrides=()) -> Workflow:
    """Validate a workflow given as TOML text (``source`` names it in messages).

    Parameters
    ----------
    text : str
    source : str or Path, optional
    overrides : sequence of str, optional

    Returns
    -------
    Workflow
    """
    name = str(source) if source else "<workflow>"
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{name}: not valid TOML: {exc}") from None
    for item in overrides:
        apply_override(raw, item, name)
    spec = _validate(raw, name, overridden={_override_key(o) for o in overrides})
    return Workflow(spec, Path(source) if source else None, list(overrides))


def from_arguments(raw: dict, name: str) -> Workflow:
    """Validate a workflow given as a dict in the TOML layout (built from a function's arguments).

    Parameters
    ----------
    raw : dict
    name : str
        Names the workflow in messages.

    Returns
    -------
    Workflow
    """
    return Workflow(_validate(raw, name), None, [], name=name)


def _override_key(item: str) -> str:
    return item.split("=", 1)[0].strip()


def apply_override(raw: dict, item: str, source: str = "<workflow>") -> None:
    """Apply one ``key.path=value`` (value in TOML syntax; bare words are strings).

    Parameters
    ----------
    raw : dict
        Changed in place.
    item : str
    source : str, optional
        Names the workflow in messages.

    Raises
    ------
    ConfigError
        If ``item`` is not of that form or its path runs through a value.
    """
    if "=" not in item:
        raise ConfigError(f"--set {item!r}: expected key.path=value, e.g. compute.workers=4")
    key, text = (s.strip() for s in item.split("=", 1))
    parts = key.split(".")
    if not key or not all(parts):
        raise ConfigError(f"--set {item!r}: the key path {key!r} is not of the form section.key")
    try:
        value = tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        value = text  # a bare word such as threads or out/x.nc
    node = raw
    for p in parts[:-1]:
        child = node.setdefault(p, {})
        if not isinstance(child, dict):
            raise ConfigError(f"{source}: --set {key}: {p} is a value, not a table")
        node = child
    node[parts[-1]] = value


def _where(source, path, overridden) -> str:
    note = " (set on the command line)" if path in overridden else ""
    return f"{source}: {path}{note}"


def _unknown(source, path, key, valid) -> ConfigError:
    full = f"{path}.{key}" if path else key
    return ConfigError(f"{source}: unknown key {full!r}" + closest_names(key, valid)
                       + f"; valid keys here: {', '.join(sorted(valid))}")


def _validate(raw: dict, source: str, overridden=frozenset()) -> dict:
    sections = set(SCHEMA) | {"variables"}
    for sec, val in raw.items():
        if sec not in sections:
            raise _unknown(source, "", sec, sections)
        if not isinstance(val, dict):
            raise ConfigError(f"{source}: {sec} must be a table ([{sec}]), got {_show(val)}")
    spec: dict = {}
    for sec, keys in SCHEMA.items():
        given = raw.get(sec, {})
        for k in given:
            if k not in keys:
                raise _unknown(source, sec, k, keys)
        spec[sec] = {}
        for k, key in keys.items():
            path = f"{sec}.{k}"
            if k in given:
                spec[sec][k] = key.check(given[k], _where(source, path, overridden))
            elif key.default is REQUIRED and path == "input.path" and given.get("sources"):
                spec[sec][k] = None  # every input is a source
            elif key.default is REQUIRED:
                raise ConfigError(f"{source}: missing required key {path!r} ({key.doc})")
            else:
                spec[sec][k] = copy.deepcopy(key.default)

    names = spec["input"]["variables"]
    # per-variable tables
    given_vars = raw.get("variables", {})
    for v, table in given_vars.items():
        if v not in names:
            raise ConfigError(f"{source}: [variables.{v}] names a variable not in input.variables "
                              f"{names}" + closest_names(v, names))
        if not isinstance(table, dict):
            raise ConfigError(f"{source}: variables.{v} must be a table ([variables.{v}])")
        for k in table:
            if k not in VARIABLE_KEYS:
                raise _unknown(source, f"variables.{v}", k, VARIABLE_KEYS)
    spec["variables"] = {}
    for v in names:
        table = given_vars.get(v, {})
        spec["variables"][v] = {
            k: (key.check(table[k], _where(source, f"variables.{v}.{k}", overridden)) if k in table
                else copy.deepcopy(key.default))
            for k, key in VARIABLE_KEYS.items()
        }

    _cross_checks(spec, source)
    _label_checks(spec, source)
    return spec


def _label_checks(spec: dict, source: str) -> None:
    """input.windows / input.sources, [compare] and the return periods: the combinations that cannot run."""
    inp, cmp_, prod = spec["input"], spec["compare"], spec["products"]
    if inp["sources"] and inp["path"] is not None:
        raise ConfigError(f"{source}: input.path and input.sources are both given: with sources, every input "
                          "is a source (drop input.path)")
    present = {dim: list(inp[key]) for dim, key in (("window", "windows"), ("source", "sources")) if inp[key]}
    if cmp_["dim"] is not None and cmp_["dim"] not in present:
        raise ConfigError(f"{source}: compare.dim = {cmp_['dim']!r} but input.{cmp_['dim']}s is not given")
    if cmp_["reference"] is not None:
        if not present:
            raise ConfigError(f"{source}: compare.reference = {cmp_['reference']!r} needs labels to compare: "
                              "give input.windows or input.sources")
        if len(present) == 2 and cmp_["dim"] is None:
            raise ConfigError(f"{source}: both input.windows and input.sources are given: set compare.dim = "
                              "\"window\" or \"source\" to say which labels are compared")
        dim = cmp_["dim"] or next(iter(present))
        labels = present[dim]
        if cmp_["reference"] not in labels:
            raise ConfigError(f"{source}: compare.reference = {cmp_['reference']!r} is not a {dim} label; the "
                              f"{dim} labels are: {', '.join(labels)}" + closest_names(cmp_["reference"], labels))
        if len(labels) < 2:
            raise ConfigError(f"{source}: compare.reference = {cmp_['reference']!r} is the only {dim} label: "
                              f"give at least two input.{dim}s")
    elif cmp_["dim"] is not None:
        raise ConfigError(f"{source}: compare.dim is set but compare.reference is not: name the reference label")
    if prod["return_periods"] and not prod["thresholds"]:
        raise ConfigError(f"{source}: products.return_periods = true needs products.thresholds (the points "
                          "whose joint return periods are written)")


def _cross_checks(spec: dict, source: str) -> None:
    inp, names = spec["input"], spec["input"]["variables"]
    d = len(names)
    size = spec["grid"]["size"]
    if len(size) not in (1, d):
        raise ConfigError(f"{source}: grid.size = {size} has {len(size)} entries for {d} variables "
                          f"({', '.join(names)}): give one number or {d}")
    for v in spec["grid"]["limits"]:
        if v not in names:
            raise ConfigError(f"{source}: grid.limits.{v} names a variable not in input.variables "
                              f"{names}" + closest_names(v, names))
    overlap = set(names) & set(inp["sample_dims"])
    if overlap:
        raise ConfigError(f"{source}: input.sample_dims {inp['sample_dims']} contains variable name(s) "
                          f"{sorted(overlap)}: list dimensions there, variables in input.variables")
    if inp["group_by"] is not None and inp["group_by"] in names:
        raise ConfigError(f"{source}: input.group_by = {inp['group_by']!r} is also in input.variables")
    prod = spec["products"]
    for k, point in enumerate(prod["thresholds"]):
        if len(point) != d:
            raise ConfigError(f"{source}: products.thresholds[{k}] = {point} has {len(point)} numbers for "
                              f"{d} variables ({', '.join(names)}): give one per variable")
    if prod["sectors"]:
        circular = [v for v in names if spec["variables"][v]["period"] is not None]
        if d != 2 or len(circular) != 1:
            raise ConfigError(f"{source}: products.sectors needs two variables, one of them circular "
                              f"(a period under [variables.NAME]); got {', '.join(names)} with "
                              f"{len(circular)} circular")
        if prod["sectors"] < 2:
            raise ConfigError(f"{source}: products.sectors = {prod['sectors']}: give at least 2 sectors")
    if prod["speed_classes"] and len(prod["speed_classes"]) < 2:
        raise ConfigError(f"{source}: products.speed_classes needs at least two edges")
    if not 0 < prod["band_level"] < 1:
        raise ConfigError(f"{source}: products.band_level = {prod['band_level']} must lie strictly "
                          "between 0 and 1, e.g. 0.9")
    if inp["months"] is not None and inp["seasons"] is not None:
        raise ConfigError(f"{source}: input.months and input.seasons both select months: give one")
    if inp["min_samples"] < d + 1:
        raise ConfigError(f"{source}: input.min_samples = {inp['min_samples']} is below the {d + 1} "
                          f"samples {d} variables need at the very least")
    if inp["max_samples"] is not None and inp["max_samples"] < inp["min_samples"]:
        raise ConfigError(f"{source}: input.max_samples = {inp['max_samples']} is below "
                          f"input.min_samples = {inp['min_samples']}")
    H = spec["estimator"]["bandwidth"]
    if isinstance(H, list):
        if len(H) != d or any(len(r) != d for r in H):
            raise ConfigError(f"{source}: estimator.bandwidth is a {len(H)} x {len(H[0])} matrix"
                              f"{'' if all(len(r) == len(H[0]) for r in H) else ' with rows of unequal length'}"
                              f" but input.variables has {d} variables: give a {d} x {d} matrix")
        try:
            BandwidthMatrix.from_matrix(H, d, argument=f"{source}: estimator.bandwidth")
        except MvkdeError as exc:
            raise ConfigError(str(exc)) from None
    sphere = spec["estimator"]["sphere"]
    if sphere is not None:
        if len(sphere) != 2:
            raise ConfigError(f"{source}: estimator.sphere = {sphere} must name two variables: "
                              "[latitude, longitude]")
        missing = [v for v in sphere if v not in names]
        if missing:
            raise ConfigError(f"{source}: estimator.sphere names {missing}, not in input.variables = {names}")
        for v in sphere:
            table = spec["variables"][v]
            for key in ("bounds", "period", "point_mass"):
                if table[key] is not None:
                    raise ConfigError(f"{source}: variables.{v}.{key} is set but {v} is part of the spherical "
                                      f"location estimator.sphere: drop variables.{v}.{key}")
    masses = [v for v in names if spec["variables"][v]["point_mass"] is not None]
    if len(masses) > 1:
        raise ConfigError(f"{source}: point_mass is set for {masses}: at most one variable may carry a "
                          "point mass")
    for v in names:
        table = spec["variables"][v]
        if table["point_mass"] is not None and table["period"] is not None:
            raise ConfigError(f"{source}: variables.{v} has both point_mass and period: a circular "
                              "variable has no point mass")
        if table["period"] is not None and table["bounds"] is not None:
            raise ConfigError(f"{source}: variables.{v} has both bounds and period: a circular variable "
                              "is unbounded; drop variables.{v}.bounds")
        if table["point_mass"] is not None and table["bounds"] is not None:
            lo, hi = table["bounds"]
            if not lo <= table["point_mass"] < hi:
                raise ConfigError(f"{source}: variables.{v}.point_mass = {table['point_mass']} lies outside "
                                  f"variables.{v}.bounds = {table['bounds']}")
        lim = spec["grid"]["limits"].get(v)
        if lim is not None and table["bounds"] is not None:
            lo, hi = table["bounds"]
            if lim[1] <= lo or lim[0] >= hi:
                raise ConfigError(f"{source}: grid.limits.{v} = {lim} lies outside variables.{v}.bounds = "
                                  f"{table['bounds']}")


# ---------------------------------------------------------------------------
# documentation
# ---------------------------------------------------------------------------

def key_reference() -> str:
    """Markdown table of every key, default and meaning (docs/workflow_keys.md is made from it).

    Returns
    -------
    str
    """
    lines = ["| key | default | meaning |", "|---|---|---|"]

    def fmt(v):
        if v is REQUIRED:
            return "required"
        if v is None:
            return "-"
        return f"`{_jsonable(v)!r}`".replace("'", '"') if not isinstance(v, str) else f'`"{v}"`'

    for sec, keys in SCHEMA.items():
        for k, key in keys.items():
            doc = key.doc
            if key.choices:
                doc += " (one of: " + ", ".join(estimator_choices()[key.choices]) + ")"
            lines.append(f"| `{sec}.{k}` | {fmt(key.default)} | {doc} |")
    for k, key in VARIABLE_KEYS.items():
        lines.append(f"| `variables.NAME.{k}` | {fmt(key.default)} | {key.doc} |")
    return "\n".join(lines)


if __name__ == "__main__":  # python -m mvkde.pipeline.workflow > table for docs/workflow_keys.md
    print(key_reference())
