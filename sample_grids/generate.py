"""Generate the invented sample data of the Aldmere basin.

The Aldmere basin is fictional: a small upland catchment on a coarse 0.5
degree grid, with daily precipitation (dry days included) and daily maximum
temperature for a few years, and a table of five invented weather stations
that adds wind speed and direction.  Every number comes from the known law
written below, so tests can compare estimates with the truth.

The law (per cell, per meteorological season s = DJF, MAM, JJA, SON):

* elevation ``e`` (km) = 0.3 + 0.9 * bump(lat, lon), a smooth invented relief;
* a day is wet with probability ``P_WET[s]``;
* dry day: ``pr = 0`` with probability 0.8, else a trace ``pr ~ U(0, 1)`` mm;
* wet day: ``pr = 1 + Gamma(shape=0.7, scale=SCALE[s] * (1 + 0.4 e))`` mm;
* ``tasmax ~ N(T_MEAN[s] - 6.5 e - 1.5 * wet, 3.0^2)`` degC.

So values <= 1 mm are the dry point mass (the common 1 mm wet-day
threshold), and the continuous part of the joint density of (pr, tasmax) on
wet days is ``P_WET * gamma(pr - 1) * normal(tasmax)``.

A second, warmer and wetter period (``basin_daily_warm.nc``, three years
from 2041): the same law with ``tasmax`` raised by ``WARMING`` = 1.5 K and
wet-day amounts above the 1 mm threshold scaled by ``WETTER`` = 1.10.  With
``input.path`` listing both files, ``workflows/basin_change.toml`` compares
the two windows.  ``basin_daily.nc`` itself is unchanged.

Run ``python sample_grids/generate.py`` to rewrite the files next to it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from scipy import stats

HERE = Path(__file__).resolve().parent
SEASONS = ("DJF", "MAM", "JJA", "SON")
P_WET = {"DJF": 0.45, "MAM": 0.40, "JJA": 0.30, "SON": 0.50}
SCALE = {"DJF": 5.0, "MAM": 4.0, "JJA": 7.0, "SON": 6.0}
T_MEAN = {"DJF": 3.0, "MAM": 12.0, "JJA": 22.0, "SON": 13.0}
T_SD = 3.0
WET_SHAPE = 0.7
WET_THRESHOLD = 1.0
LAT = np.arange(60.0, 62.5, 0.5)        # 5 rows
LON = np.arange(20.0, 23.5, 0.5)        # 7 columns
SEED = 20261201
WARMING = 1.5          # K added to tasmax in the warm period
WETTER = 1.10          # factor on wet-day amounts above the threshold in the warm period
WARM_START = "2041-01-01"


def season_of(months: np.ndarray) -> np.ndarray:
    names = np.array(["DJF", "DJF", "MAM", "MAM", "MAM", "JJA", "JJA", "JJA", "SON", "SON", "SON", "DJF"])
    return names[np.asarray(months) - 1]


def elevation(lat, lon):
    """Invented relief in km: a ridge across the middle of the basin."""
    lat, lon = np.meshgrid(lat, lon, indexing="ij")
    bump = np.exp(-((lat - 61.0) ** 2) / 0.8 - ((lon - 21.5) ** 2) / 2.0)
    return 0.3 + 0.9 * bump


def simulate(dates: pd.DatetimeIndex, elev: np.ndarray, rng: np.random.Generator, warming: float = 0.0,
             wetter: float = 1.0):
    """Daily pr and tasmax with shape (time, *elev.shape) from the law above (shifted by ``warming``
    degC and wet-day amounts scaled by ``wetter`` for the warm period)."""
    seasons = season_of(dates.month)
    shape = (len(dates),) + elev.shape
    p_wet = np.array([P_WET[s] for s in seasons]).reshape((-1,) + (1,) * elev.ndim)
    scale = np.array([SCALE[s] for s in seasons]).reshape(p_wet.shape) * (1 + 0.4 * elev)
    t_mean = np.array([T_MEAN[s] for s in seasons]).reshape(p_wet.shape) - 6.5 * elev
    wet = rng.random(shape) < p_wet
    trace = rng.random(shape) < 0.2
    pr = np.where(wet, WET_THRESHOLD + rng.gamma(WET_SHAPE, 1.0, size=shape) * scale * wetter,
                  np.where(trace, rng.random(shape) * WET_THRESHOLD, 0.0))
    tasmax = t_mean + warming - 1.5 * wet + T_SD * rng.standard_normal(shape)
    return pr, tasmax


def true_wet_density(pr, tasmax, elev: float, season: str | None = None, months=None):
    """Known density of the continuous (wet-day) part at (pr, tasmax).

    With ``season`` None the law is the mixture over the seasons weighted by
    their share of days in ``months`` (default: all twelve months).
    """
    if season is not None:
        weights = {season: 1.0}
    else:
        months = np.arange(1, 13) if months is None else np.asarray(months)
        days = pd.Series(pd.date_range("2001-01-01", "2004-12-31", freq="D"))
        keep = days[days.dt.month.isin(months)]
        share = pd.Series(season_of(keep.dt.month.to_numpy())).value_counts(normalize=True)
        weights = share.to_dict()
    total = 0.0
    for s, wgt in weights.items():
        g = stats.gamma.pdf(pr - WET_THRESHOLD, WET_SHAPE, scale=SCALE[s] * (1 + 0.4 * elev))
        t = stats.norm.pdf(tasmax, T_MEAN[s] - 6.5 * elev - 1.5, T_SD)
        total = total + wgt * P_WET[s] * g * t
    return total


def true_tasmax_density(tasmax, elev: float, months=None):
    """Known density of tasmax over all days (wet and dry) in ``months`` (default all).

    Per season: ``P_WET N(T - 6.5 e - 1.5, T_SD^2) + (1 - P_WET) N(T - 6.5 e, T_SD^2)``,
    mixed over the seasons by their share of days.
    """
    months = np.arange(1, 13) if months is None else np.asarray(months)
    days = pd.Series(pd.date_range("2001-01-01", "2004-12-31", freq="D"))
    keep = days[days.dt.month.isin(months)]
    share = pd.Series(season_of(keep.dt.month.to_numpy())).value_counts(normalize=True)
    total = 0.0
    for s, wgt in share.items():
        mean = T_MEAN[s] - 6.5 * elev
        total = total + wgt * (P_WET[s] * stats.norm.pdf(tasmax, mean - 1.5, T_SD)
                               + (1 - P_WET[s]) * stats.norm.pdf(tasmax, mean, T_SD))
    return total


def make_grid(years: int = 4, seed: int = SEED, lat=LAT, lon=LON, start: str = "2001-01-01", warming: float = 0.0,
              wetter: float = 1.0) -> xr.Dataset:
    """The gridded sample data: ``years`` of daily pr and tasmax on the ``lat`` x ``lon`` grid."""
    rng = np.random.default_rng(seed)
    dates = pd.date_range(start, periods=int(round(365.25 * years)), freq="D")
    lat, lon = np.asarray(lat, dtype=float), np.asarray(lon, dtype=float)
    elev = elevation(lat, lon)
    pr, tasmax = simulate(dates, elev, rng, warming=warming, wetter=wetter)
    ds = xr.Dataset(
        {
            "pr": (("time", "lat", "lon"), pr.astype("float32"), {
                "standard_name": "lwe_thickness_of_precipitation_amount", "long_name": "daily precipitation",
                "units": "mm d-1"}),
            "tasmax": (("time", "lat", "lon"), tasmax.astype("float32"), {
                "standard_name": "air_temperature", "long_name": "daily maximum near-surface air temperature",
                "units": "degC"}),
            "elevation": (("lat", "lon"), elev, {"long_name": "invented cell elevation", "units": "km"}),
        },
        coords={
            "time": ("time", dates),
            "lat": ("lat", lat, {"standard_name": "latitude", "units": "degrees_north"}),
            "lon": ("lon", lon, {"standard_name": "longitude", "units": "degrees_east"}),
        },
        attrs={
            "title": "Aldmere basin sample grid (invented data)",
            "Conventions": "CF-1.8",
            "source": "sample_grids/generate.py: synthetic, from a known law; not observations",
        },
    )
    return ds


STATIONS = {  # invented stations: name -> (lat, lon, elevation km)
    "aldmere_lock": (60.6, 20.4, 0.35),
    "brackenfold": (61.0, 21.4, 1.05),
    "cold_harbour": (61.7, 22.6, 0.60),
    "dunmoss": (60.3, 22.9, 0.42),
    "eastwick_fell": (61.9, 20.9, 0.80),
}


def make_stations(years: int = 4, seed: int = SEED + 1) -> pd.DataFrame:
    """Daily station table with pr, tasmax, wind speed (m s-1) and direction (degrees)."""
    rng = np.random.default_rng(seed)
    dates = pd.date_range("2001-01-01", periods=int(round(365.25 * years)), freq="D")
    frames = []
    for name, (lat, lon, elev) in STATIONS.items():
        pr, tasmax = simulate(dates, np.array([elev]), rng)
        # prevailing south-westerlies with a north-easterly second mode
        sw = rng.random(len(dates)) < 0.7
        direction = np.where(sw, rng.vonmises(np.deg2rad(225 - 180), 2.5, len(dates)),
                             rng.vonmises(np.deg2rad(45 - 180), 4.0, len(dates)))
        direction = (np.rad2deg(direction) + 180.0) % 360.0
        speed = rng.weibull(2.0, len(dates)) * np.where(sw, 7.0, 4.5) * (1 + 0.3 * elev)
        frames.append(pd.DataFrame({
            "station": name, "date": dates, "lat": lat, "lon": lon,
            "pr": pr[:, 0].round(2), "tasmax": tasmax[:, 0].round(2),
            "wind_speed": speed.round(2), "wind_dir": direction.round(1),
        }))
    return pd.concat(frames, ignore_index=True)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description="Write the invented Aldmere basin sample data.")
    parser.add_argument("--out", default=str(HERE), help="folder to write into (default: next to this script)")
    parser.add_argument("--years", type=int, default=4, help="years of daily data (default 4)")
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    ds = make_grid(args.years)
    encoding = {v: {"zlib": True, "complevel": 4} for v in ("pr", "tasmax")}
    ds.to_netcdf(out / "basin_daily.nc", encoding=encoding)
    warm = make_grid(3, seed=SEED + 2, start=WARM_START, warming=WARMING, wetter=WETTER)
    warm.attrs["title"] = "Aldmere basin sample grid, warm period (invented data: +1.5 K, +10 % wet-day amounts)"
    warm.to_netcdf(out / "basin_daily_warm.nc", encoding=encoding)
    make_stations(args.years).to_csv(out / "stations_daily.csv", index=False)
    print(f"wrote {out / 'basin_daily.nc'}, {out / 'basin_daily_warm.nc'} and {out / 'stations_daily.csv'}")


if __name__ == "__main__":
    main()
