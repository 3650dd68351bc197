"""Workflow files: schema and defaults in step, the shipped examples, error messages."""

import re
from pathlib import Path

import pytest

from mvkde.errors import ConfigError
from mvkde.pipeline.workflow import REQUIRED, SCHEMA, VARIABLE_KEYS, key_reference, load, loads

REPO = Path(__file__).resolve().parent.parent
EXAMPLES = sorted((REPO / "workflows").glob("*.toml"))

MINIMAL = """
[input]
path = "data.nc"
variables = ["pr", "tasmax"]
[output]
path = "out.nc"
"""


def test_defaults_pass_their_own_checks():
    # the defaults and the schema live in one table; each default must satisfy its checker
    for sec, keys in SCHEMA.items():
        for k, key in keys.items():
            if key.default is not REQUIRED:
                key.check(key.default, f"{sec}.{k}")
    for k, key in VARIABLE_KEYS.items():
        if key.default is not None:
            key.check(key.default, f"variables.x.{k}")


def test_minimal_workflow_gets_every_default():
    wf = loads(MINIMAL, source="w.toml")
    assert wf["estimator"]["bandwidth"] == "plugin"      # workflow default (shared/DESIGN.md)
    assert wf["estimator"]["kernel"] == "gaussian"
    assert wf["compute"]["scheduler"] == "processes"   # forked workers: threads do not scale (benchmarks)
    assert wf["input"]["sample_dims"] == ["time"]
    assert wf.grid_size() == [64, 64]
    assert set(wf.spec) == set(SCHEMA) | {"variables"}
    for sec, keys in SCHEMA.items():
        assert set(wf.spec[sec]) == set(keys)
    assert wf.spec["variables"]["pr"] == {k: None for k in VARIABLE_KEYS}


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_every_example_validates(path):
    wf = load(path)
    for p in wf["input"]["path"]:
        assert (REPO / p).exists(), f"{path.name}: input {p} is not in the repository"
    assert wf["output"]["path"].startswith("out/")


def test_examples_exist():
    # the shipped examples, by name: adding or removing one is a deliberate change made here too
    assert [p.name for p in EXAMPLES] == ["basin_change.toml", "basin_seasonal.toml", "basin_summer_box.toml",
                                          "stations_temperature_wind.toml", "stations_wind.toml"]


@pytest.mark.parametrize("text, key, shown, hint", [
    ('[estimator]\nkernl = "gaussian"', "estimator.kernl", None, "kernel"),
    ('[estimator]\nkernel = "gausian"', "estimator.kernel", "'gausian'", "gaussian"),
    ('[estimator]\nbandwidth = "plug-in"', "estimator.bandwidth", "'plug-in'", "plugin"),
    ('[compute]\nscheduler = "thread"', "compute.scheduler", "'thread'", "threads"),
    ('[compute]\nworkers = 0', "compute.workers", "0", None),
    ('[grid]\nsize = [64, 64, 64]', "grid.size", "[64, 64, 64]", None),
    ('[grid]\nlimits.prr = [0, 1]', "grid.limits.prr", None, "pr"),
    ('[variables.pr]\nbounds = [0]', "variables.pr.bounds", "[0]", None),
    ('[variables.pr]\nbound = [0, 1]', "variables.pr.bound", None, "bounds"),
    ('[variables.tas]\nbounds = [0, 1]', "variables.tas", None, "tasmax"),
    ('[inputs]\nx = 1', "inputs", None, "input"),
    ('[input.box]\nlat = [61, 60]', "input.box.lat", "[61, 60]", None),
    ('[output]\ndtype = "float16"', "output.dtype", "'float16'", "float32"),
])
def test_errors_name_file_key_value_and_hint(text, key, shown, hint):
    base = MINIMAL.replace("[output]", text + "\n[output]") if not text.startswith(("[input", "[output")) \
        else MINIMAL + "\n" + text
    if text.startswith("[input.box]"):
        base = MINIMAL + "\n" + text
    if text.startswith("[output]"):
        base = MINIMAL.replace('[output]\npath = "out.nc"', '[output]\npath = "out.nc"\n' + text.split("\n", 1)[1])
    with pytest.raises(ConfigError) as info:
        loads(base, source="night/basin.toml")
    msg = str(info.value)
    assert msg.startswith("night/basin.toml:"), msg
    assert key in msg, msg
    if shown:
        assert shown in msg, msg
    if hint:
        assert repr(hint) in msg or hint in msg, msg


def test_missing_required_key():
    with pytest.raises(ConfigError, match=r"w.toml: missing required key 'input.variables'"):
        loads('[input]\npath = "x.nc"\n[output]\npath = "o.nc"', source="w.toml")


def test_point_mass_on_two_variables_refused():
    text = MINIMAL + "[variables.pr]\npoint_mass = 1.0\n[variables.tasmax]\npoint_mass = 0.0\n"
    with pytest.raises(ConfigError, match="at most one variable"):
        loads(text, source="w.toml")


def test_not_toml():
    with pytest.raises(ConfigError, match="w.toml: not valid TOML"):
        loads("[input\npath=", source="w.toml")


def test_overrides_parse_toml_values_and_bare_words():
    wf = loads(MINIMAL, source="w.toml", overrides=[
        "compute.workers=4", "output.path=out/x.nc", "variables.pr.bounds=[0, inf]",
        "grid.limits.tasmax=[-10, 40]", "estimator.kernel=epanechnikov"])
    assert wf["compute"]["workers"] == 4
    assert wf["output"]["path"] == "out/x.nc"
    assert wf.variable("pr")["bounds"] == [0.0, float("inf")]
    assert wf["grid"]["limits"]["tasmax"] == [-10.0, 40.0]
    assert wf["estimator"]["kernel"] == "epanechnikov"
    assert wf.to_json()["variables"]["pr"]["bounds"] == [0.0, "inf"]


def test_bad_override_says_command_line():
    with pytest.raises(ConfigError, match=r"compute.workers \(set on the command line\) = -1"):
        loads(MINIMAL, source="w.toml", overrides=["compute.workers=-1"])
    with pytest.raises(ConfigError, match="key.path=value"):
        loads(MINIMAL, source="w.toml", overrides=["compute.workers"])


def test_key_reference_lists_every_key():
    text = key_reference()
    for sec, keys in SCHEMA.items():
        for k in keys:
            assert f"`{sec}.{k}`" in text
    for k in VARIABLE_KEYS:
        assert f"`variables.NAME.{k}`" in text


def test_key_reference_doc_is_current():
    # docs/workflow_keys.md is generated from the schema: regenerate it when the schema changes
    doc = (REPO / "docs" / "workflow_keys.md").read_text()
    assert key_reference() in doc


def test_key_reference_names_every_selector_and_opt_in_kernel():
    # the table users read must name every selector the workflow accepts, isj included
    from mvkde.bandwidth import SELECTORS
    from mvkde.kernels import HIGHER_ORDER_NAMES

    doc = (REPO / "docs" / "workflow_keys.md").read_text()
    rows = {line.split("|")[1].strip(): line for line in doc.splitlines() if line.startswith("| `")}
    for name in SELECTORS:
        assert re.search(rf"\b{name}\b", rows["`estimator.bandwidth`"]), name
    for name in HIGHER_ORDER_NAMES:
        assert name in rows["`estimator.kernel`"], name
