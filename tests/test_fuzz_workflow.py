"""Fuzzing the workflow reader: any input gives a Workflow or an MvkdeError, never another exception.

Four generators: arbitrary text; arbitrary bytes in a file (encodings);
TOML documents built from the schema's own section and key names with
values of every TOML type (so most documents get past the parser and
exercise the validators and cross-checks); and ``--set`` overrides.
"""

import datetime as dt
import json
import math

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from mvkde.errors import MvkdeError
from mvkde.pipeline.workflow import SCHEMA, VARIABLE_KEYS, Workflow, load, loads

SETTINGS = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])

NAMES = ["pr", "tasmax", "tasmin", "wind", "time", "lat", "x"]


def read(text, overrides=()):
    """The property: a Workflow or an MvkdeError (with a non-empty one-line message)."""
    try:
        wf = loads(text, source="fuzz.toml", overrides=overrides)
    except MvkdeError as exc:
        message = str(exc)
        assert message and "\n" not in message.strip() or "not valid TOML" in message, message
        return None
    assert isinstance(wf, Workflow)
    json.dumps(wf.to_json(), allow_nan=False)  # the resolved spec is recordable as provenance
    return wf


# -- TOML values of every type -------------------------------------------------------------

def toml_string(s: str) -> str:
    return json.dumps(s)  # a JSON string is a valid TOML basic string


def toml_float(x: float) -> str:
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return repr(float(x))


scalars = st.one_of(
    st.booleans().map(lambda b: "true" if b else "false"),
    st.integers(-2**63, 2**63 - 1).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(toml_float),
    st.sampled_from(NAMES + ["gaussian", "epanechnikov", "threads", "tcp://127.0.0.1:8786", "auto", "JJA",
                             "season", "month", "", " ", "float32", "*.nc", "out.nc"]).map(toml_string),
    st.text(max_size=12).map(toml_string),
    st.dates(min_value=dt.date(1, 1, 1)).map(lambda d: d.isoformat()),
    st.datetimes().map(lambda d: d.isoformat()),
    st.times().map(lambda t: t.isoformat()),
)


def values(depth=2):
    if depth == 0:
        return scalars
    inner = values(depth - 1)
    return st.one_of(
        scalars,
        st.lists(inner, max_size=4).map(lambda xs: "[" + ", ".join(xs) + "]"),
        st.dictionaries(st.sampled_from(NAMES + ["lo", "hi"]), inner, max_size=3).map(
            lambda d: "{" + ", ".join(f"{k} = {v}" for k, v in d.items()) + "}"),
    )


KEYS = {sec: list(keys) + ["unknown_key"] for sec, keys in SCHEMA.items()}


@st.composite
def documents(draw):
    lines = []
    sections = draw(st.lists(st.sampled_from(list(KEYS) + ["variables", "extra"]), unique=True, max_size=6))
    # usually a plausible core so that validation reaches the later checks
    if draw(st.booleans()):
        names = draw(st.lists(st.sampled_from(NAMES), min_size=1, max_size=3, unique=True))
        lines += ["[input]", 'path = "data.nc"', "variables = " + json.dumps(names)]
        for k in draw(st.lists(st.sampled_from(KEYS["input"]), unique=True, max_size=4)):
            if k not in ("path", "variables"):
                lines.append(f"{k} = {draw(values())}")
        lines += ["[output]", 'path = "out.nc"']
        sections = [s for s in sections if s not in ("input", "output")]
    for sec in sections:
        if sec == "variables":
            for name in draw(st.lists(st.sampled_from(NAMES), unique=True, max_size=2)):
                lines.append(f"[variables.{name}]")
                for k in draw(st.lists(st.sampled_from(list(VARIABLE_KEYS) + ["colour"]), unique=True, max_size=3)):
                    lines.append(f"{k} = {draw(values(1))}")
            continue
        lines.append(f"[{sec}]")
        keys = KEYS.get(sec, ["a", "b"])
        for k in draw(st.lists(st.sampled_from(keys), unique=True, max_size=5)):
            lines.append(f"{k} = {draw(values())}")
    return "\n".join(lines) + "\n"


@SETTINGS
@given(documents())
def test_schema_shaped_documents(text):
    read(text)


@SETTINGS
@given(st.text(max_size=300))
def test_arbitrary_text(text):
    read(text)


@settings(max_examples=100, deadline=None)
@given(st.binary(max_size=200))
def test_arbitrary_bytes_in_a_file(tmp_path_factory, blob):
    path = tmp_path_factory.mktemp("fuzz") / "w.toml"
    path.write_bytes(blob)
    try:
        load(path)
    except MvkdeError:
        pass


BASE = '[input]\npath = "data.nc"\nvariables = ["pr", "tasmax"]\n[output]\npath = "out.nc"\n'


@SETTINGS
@given(st.lists(st.one_of(
    st.text(max_size=40),
    st.builds(lambda k, v: f"{k}={v}",
              st.sampled_from([f"{s}.{k}" for s, keys in KEYS.items() for k in keys]
                              + ["variables.pr.bounds", "variables.pr.point_mass", "grid.limits.pr",
                                 "input.box.lat", "input", "input.path.x", ".", "a..b"]),
              values()),
), max_size=3))
def test_overrides(overrides):
    read(BASE, overrides)


def test_a_valid_document_still_reads():
    # the harness is not vacuous: a good document gives a Workflow, a bad one an error
    wf = read(BASE)
    assert isinstance(wf, Workflow) and wf["input"]["variables"] == ["pr", "tasmax"]
    assert wf["output"]["path"] == "out.nc" and wf.grid_size() == [64, 64]   # schema default size
    assert read(BASE + "[grid]\nsize = 1\n") is None
