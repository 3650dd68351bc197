"""Reproducibility: the same workflow gives bit-identical data whatever runs it, and randomness takes the seed."""

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import mvkde
from mvkde.cli import main

SUBSAMPLE = 80  # input.max_samples: smaller than the 150 days, so every cell is subsampled


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("repro")
    # simulated tasmax/tasmin (not observations): correlated normals
    rng = np.random.default_rng(5)
    shape = (150, 3, 4)
    a = 10 + 3 * rng.standard_normal(shape)
    b = 0.5 * a + 2 * rng.standard_normal(shape)
    a[:7, 1, 2] = np.nan
    ds = xr.Dataset({"tasmax": (("time", "lat", "lon"), a.astype("f4"), {"units": "degC"}),
                     "tasmin": (("time", "lat", "lon"), b.astype("f4"), {"units": "degC"})},
                    coords={"time": pd.date_range("2001-01-01", periods=150), "lat": np.arange(3.0),
                            "lon": np.arange(4.0)})
    ds.to_netcdf(tmp / "archive.nc")
    return tmp / "archive.nc"


def run(folder, data, name, scheduler="threads", workers=2, block_size=2, seed=0):
    out = folder / f"{name}.nc"
    wf = folder / f"{name}.toml"
    wf.write_text(f"""
[input]
path = "{data}"
variables = ["tasmax", "tasmin"]
max_samples = {SUBSAMPLE}
[estimator]
bandwidth = "normal"
seed = {seed}
[grid]
size = 20
[compute]
scheduler = "{scheduler}"
workers = {workers}
block_size = {block_size}
[output]
path = "{out}"
""")
    assert main(["run", str(wf)]) == 0
    return xr.open_dataset(out).load()


def assert_bit_identical(a, b):
    assert list(a.data_vars) == list(b.data_vars)
    for name in a.data_vars:
        x, y = a[name].values, b[name].values
        assert x.dtype == y.dtype and x.shape == y.shape, name
        assert x.tobytes() == y.tobytes(), f"{name} differs"   # bit for bit, NaN payloads included
    for name in a.coords:
        assert a[name].values.tobytes() == b[name].values.tobytes(), name


@pytest.fixture(scope="module")
def reference(archive, tmp_path_factory):
    return run(tmp_path_factory.mktemp("ref"), archive, "reference")


def test_same_workflow_twice_identical_but_for_creation_time(archive, reference, tmp_path):
    # the same workflow file, run again from the same place: only the creation time may differ
    folder = tmp_path
    first = run(folder, archive, "again")
    (folder / "again.nc").unlink()
    second = run(folder, archive, "again")
    assert_bit_identical(first, second)
    assert_bit_identical(first, reference)
    assert set(first.attrs) == set(second.attrs)
    for key in first.attrs:
        if key in ("history", "provenance"):
            continue
        assert str(first.attrs[key]) == str(second.attrs[key]), key
    p1, p2 = json.loads(first.attrs["provenance"]), json.loads(second.attrs["provenance"])
    differing = {k for k in p1 if p1[k] != p2[k]}
    assert differing <= {"created_utc"}, differing
    assert (first["flags"].values & 32).all()  # every cell was subsampled, so the seed was used


@pytest.mark.parametrize("scheduler", ["processes", "local-cluster", "synchronous"])
def test_schedulers_give_bit_identical_data(archive, reference, tmp_path, scheduler):
    assert_bit_identical(run(tmp_path, archive, scheduler, scheduler=scheduler), reference)


def test_block_size_does_not_change_the_subsample(archive, reference, tmp_path):
    # each cell's subsample is seeded by (seed, cell index, split), not by its block
    assert_bit_identical(run(tmp_path, archive, "blocks", block_size=5, workers=1), reference)


def test_seed_changes_the_subsample(archive, reference, tmp_path):
    other = run(tmp_path, archive, "seed", seed=7)
    assert not np.array_equal(other["density"].values, reference["density"].values)
    assert np.array_equal(other["n_samples"].values, reference["n_samples"].values)


def test_library_random_parts_take_the_seed(rng):
    est = mvkde.fit(rng.normal(size=(200, 2)), bandwidth="normal")
    np.testing.assert_array_equal(est.sample(50, seed=3), est.sample(50, seed=3))
    assert not np.array_equal(est.sample(50, seed=3), est.sample(50, seed=4))
    from mvkde import products

    def stat(e):
        return e.pdf(np.zeros((1, 2)))

    a = products.bootstrap(est, stat, replicates=5, seed=11)
    b = products.bootstrap(est, stat, replicates=5, seed=11)
    c = products.bootstrap(est, stat, replicates=5, seed=12)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
