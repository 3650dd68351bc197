"""Write the small data files of the bad-input corpus (deterministic; run from anywhere).

    python tests/bad_inputs/make_data.py

Every value is simulated, not observations.  Every file is a few kilobytes: 2 x 2 cells (lat, lon) x 120 days, or a short
station table.  Each one carries exactly one defect used by a case in
cases.toml; grid.nc is the healthy file the other cases start from.
"""

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

HERE = Path(__file__).resolve().parent / "data"


def base(seed=1, days=120, start="2001-01-01") -> xr.Dataset:
    rng = np.random.default_rng(seed)
    shape = (days, 2, 2)
    tasmax = 10.0 + 3.0 * rng.standard_normal(shape)
    tasmin = 0.5 * tasmax + 2.0 * rng.standard_normal(shape)
    pr = rng.gamma(0.8, 4.0, shape)
    attrs = {"tasmax": {"units": "degC"}, "tasmin": {"units": "degC"}, "pr": {"units": "mm d-1"}}
    ds = xr.Dataset({k: (("time", "lat", "lon"), v.astype("float32"), attrs[k])
                     for k, v in (("tasmax", tasmax), ("tasmin", tasmin), ("pr", pr))},
                    coords={"time": pd.date_range(start, periods=days, freq="D"),
                            "lat": ("lat", [60.0, 61.0], {"units": "degrees_north"}),
                            "lon": ("lon", [20.0, 21.0], {"units": "degrees_east"})})
    ds["elevation"] = (("lat", "lon"), np.array([[0.3, 0.5], [0.4, 0.9]]), {"units": "km"})
    return ds


def main() -> None:
    HERE.mkdir(exist_ok=True)
    base().to_netcdf(HERE / "grid.nc")

    ds = base()
    ds["tasmax"][:] = np.nan
    ds.to_netcdf(HERE / "allnan.nc")

    ds = base()
    ds["tasmax"][:] = 15.0
    ds.to_netcdf(HERE / "constant.nc")

    ds = base()
    ds["tasmin"] = (ds["tasmax"] - 8.0).assign_attrs(units="degC")  # an exact linear function
    ds.to_netcdf(HERE / "collinear.nc")

    ds = base()
    ds["pr"][3, 0, 1] = -2.5  # a sign error in one value
    ds.to_netcdf(HERE / "negative_pr.nc")

    ds = base()
    ds["label"] = (("time", "lat", "lon"), np.full(ds["tasmax"].shape, "ok", dtype=object))
    ds.to_netcdf(HERE / "strings.nc")

    a = base(seed=2)
    b = base(seed=3, start="2001-05-01")
    b["tasmax"] = (b["tasmax"] + 273.15).assign_attrs(units="K")  # one file converted, the other not
    a.to_netcdf(HERE / "units_a.nc")
    b.to_netcdf(HERE / "units_b.nc")

    (HERE / "not_netcdf.nc").write_text("station,tmax\nA,12.5\n")   # a CSV saved under a .nc name
    (HERE / "values.dat").write_text("12.5 3.1\n11.0 2.9\n")

    rng = np.random.default_rng(4)
    n = 90
    table = pd.DataFrame({
        "station": np.repeat(["north", "south", "east"], n // 3),
        "date": np.tile(pd.date_range("2002-01-01", periods=n // 3, freq="D").strftime("%Y-%m-%d"), 3),
        "tmax": np.round(12 + 3 * rng.standard_normal(n), 1),
        "wind": np.round(np.abs(5 + 2 * rng.standard_normal(n)), 1),
        "quality": rng.choice(["good", "suspect"], n),
    })
    table.to_csv(HERE / "stations.csv", index=False)
    table.assign(date=["day %d" % k for k in range(n)]).to_csv(HERE / "stations_bad_dates.csv", index=False)


if __name__ == "__main__":
    main()
