"""The demo scenario: an invented ocean surface temperature record with planted modes.

Fifty years (1971-2020) of monthly "sea surface temperature" on a global
5-degree grid, stored the way archives often store it: latitudes running north
to south, longitudes 0..360, split into files by decade pairs.  Land (from the
shipped Natural Earth outlines) is missing at every step; a few ocean points
have instrument gaps, and polar points freeze over in their winter.

The field is a seasonal cycle, a warming trend, three planted modes and red
noise.  Each planted mode is a pattern ``p_k`` of unit area-weighted norm
(``sum w^2 p^2 = 1`` with ``w = sqrt(cos(lat))`` over the ocean) times a
principal component of unit variance times an amplitude ``a_k``, so its
eigenvalue is ``a_k^2`` and its EOF map (our regression convention) is
``a_k p_k`` in degrees Celsius.  The PCs are red noise made exactly
orthogonal to each other, to the calendar months and to a linear trend, so the
demo config (climatology anomalies, linear detrend) leaves them intact.

A later decade (2021-2030) of the same scenario goes with it: the same
patterns, mean state, seasonal cycle and trend, with new PCs and new noise,
for projecting onto the demo's modes (``configs/demo_later.yaml``).

Run ``python -m climodes.demo FOLDER`` (or ``demo_fields/generate.py``) to
write the files; the same seed always writes the same numbers.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import shapely
import xarray as xr
from shapely.geometry import Polygon

from climodes.coastline import coastlines

SEED = 20261201
YEARS = (1971, 2020)
FILE_YEARS = [(1971, 1990), (1991, 2010), (2011, 2020)]
LATER_YEARS = (2021, 2030)  # the later decade, with its own seed (SEED + 1)
MODES = {  # name: (amplitude in weighted degC, lag-1 autocorrelation of the PC, month to month)
    "equatorial warm tongue": (6.0, 0.92),
    "northern wave train": (4.0, 0.7),
    "southern ring": (2.5, 0.4),
}
NOISE_STD = 0.3
NOISE_LAG1 = 0.5


def grid() -> tuple[np.ndarray, np.ndarray]:
    """Latitudes (north to south) and longitudes (0..360) of the 5-degree demo grid."""
    return np.arange(87.5, -90, -5.0), np.arange(2.5, 360, 5.0)


def land_mask(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    """True over land, by the even-odd rule on the shipped coastline rings."""
    lon2d, lat2d = np.meshgrid(np.where(lon > 180, lon - 360, lon), lat)
    land = np.zeros(lat2d.shape, dtype=bool)
    for ring in coastlines().geoms:
        polygon = Polygon(np.asarray(ring.coords))
        land ^= shapely.contains_xy(polygon, lon2d, lat2d)
    return land


def _red_noise(rng: np.random.Generator, n: int, shape: tuple, lag1: float) -> np.ndarray:
    out = np.empty((n, *shape))
    out[0] = rng.standard_normal(shape)
    scale = np.sqrt(1 - lag1**2)
    for t in range(1, n):
        out[t] = lag1 * out[t - 1] + scale * rng.standard_normal(shape)
    return out


def _patterns(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    lon2d, lat2d = np.meshgrid(lon, lat)
    warm_tongue = np.exp(-((lat2d / 14) ** 2) - (((lon2d - 225) / 45) ** 2))
    wave_train = np.cos(np.deg2rad(3 * (lon2d - 40))) * np.exp(-(((lat2d - 45) / 12) ** 2))
    ring = np.exp(-(((lat2d + 55) / 9) ** 2)) * (1 + 0.4 * np.cos(np.deg2rad(lon2d - 100)))
    return np.stack([warm_tongue, wave_train, ring])


def _orthonormal_pcs(rng: np.random.Generator, time: pd.DatetimeIndex) -> np.ndarray:
    """Unit-variance red-noise PCs, orthogonal to each other, to month means and to a trend."""
    n = len(time)
    raw = np.column_stack([_red_noise(rng, n, (1,), lag1)[:, 0] for _, lag1 in MODES.values()])
    design = np.column_stack([(time.month == m).astype(float) for m in range(1, 13)] + [np.arange(n, dtype=float)])
    raw -= design @ np.linalg.lstsq(design, raw, rcond=None)[0]
    q, r = np.linalg.qr(raw)
    return q * np.sign(np.diag(r)) * np.sqrt(n - 1)


def scenario(seed: int = SEED, years: tuple[int, int] = YEARS) -> tuple[xr.Dataset, xr.Dataset]:
    """The whole demo field and the planted truth, for the demo's fifty years or another period.

    Returns
    -------
    field, truth
        ``field`` has ``sst(time, lat, lon)`` in degC; ``truth`` has the
        planted ``eof(mode, lat, lon)`` (= amplitude times pattern, degC),
        ``pc(mode, time)`` and ``eigenvalue(mode)``.
    """
    rng = np.random.default_rng(seed)
    lat, lon = grid()
    time = pd.date_range(f"{years[0]}-01-01", f"{years[1]}-12-01", freq="MS") + pd.Timedelta(days=14)
    n = len(time)
    ocean = ~land_mask(lat, lon)
    w2 = np.cos(np.deg2rad(lat))[:, None] * ocean
    patterns = _patterns(lat, lon) * ocean
    # make the patterns orthonormal under the area-weighted inner product, largest first
    flat = (patterns * np.sqrt(w2)).reshape(len(MODES), -1).T
    q, r = np.linalg.qr(flat)
    q *= np.sign(np.diag(r))
    with np.errstate(divide="ignore", invalid="ignore"):
        unit_patterns = np.where(w2 > 0, q.T.reshape(patterns.shape) / np.sqrt(w2), 0.0)
    amplitude = np.array([a for a, _ in MODES.values()])
    eofs = amplitude[:, None, None] * unit_patterns
    pcs = _orthonormal_pcs(rng, time)

    years = (time.year + (time.month - 1) / 12).to_numpy() - 1995.0
    phase = np.cos(2 * np.pi * (time.month.to_numpy() - 2) / 12)
    lat_rad = np.deg2rad(lat)[:, None]
    mean_state = 27 * np.cos(lat_rad) ** 2 - 1.5 + 0 * lon[None, :]
    season = -4 * np.sin(lat_rad) + 0 * lon[None, :]
    trend = 0.018 * (1 + 0.5 * np.sin(lat_rad)) + 0 * lon[None, :]
    sst = (
        mean_state[None]
        + season[None] * phase[:, None, None]
        + trend[None] * years[:, None, None]
        + np.einsum("tk,kyx->tyx", pcs, eofs)
        + NOISE_STD * _red_noise(rng, n, (len(lat), len(lon)), NOISE_LAG1)
    )
    sst[:, ~ocean] = np.nan
    winter = np.where(lat[:, None] > 0, np.isin(time.month, [1, 2, 3])[None, :],
                      np.isin(time.month, [7, 8, 9])[None, :])  # (lat, time)
    frozen = (np.abs(lat) > 72)[:, None] & winter
    sst = np.where(frozen.T[:, :, None] & ocean[None], np.nan, sst)
    gappy = rng.choice(np.flatnonzero(ocean & (np.abs(lat) < 60)[:, None]), size=30, replace=False)
    gaps = rng.random((n, gappy.size)) < 0.03
    flat_sst = sst.reshape(n, -1)
    flat_sst[:, gappy] = np.where(gaps, np.nan, flat_sst[:, gappy])

    coords = {
        "time": ("time", time, {"standard_name": "time", "long_name": "time", "axis": "T"}),
        "lat": ("lat", lat, {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north"}),
        "lon": ("lon", lon, {"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east"}),
    }
    field = xr.Dataset(
        {"sst": (("time", "lat", "lon"), sst.astype(np.float32),
                 {"standard_name": "sea_surface_temperature", "long_name": "sea surface temperature",
                  "units": "degC"})},
        coords=coords,
        attrs={"Conventions": "CF-1.10", "title": "climodes demo: invented ocean surface temperature",
               "source": "climodes.demo (synthetic; no observations)"},
    )
    mode = np.arange(1, len(MODES) + 1)
    truth = xr.Dataset(
        {
            "eof": (("mode", "lat", "lon"), np.where(ocean, eofs, np.nan), {"units": "degC"}),
            "pc": (("mode", "time"), pcs.T, {"units": "1"}),
            "eigenvalue": ("mode", amplitude**2, {"units": "(degC)^2"}),
            "name": ("mode", np.array(list(MODES))),
        },
        coords={"mode": mode, "time": coords["time"], "lat": coords["lat"], "lon": coords["lon"]},
        attrs={"title": "climodes demo: the planted modes"},
    )
    return field, truth


def write_demo_fields(folder: str | Path, seed: int = SEED) -> list[Path]:
    """Write the demo field, split into files, and ``planted_modes.nc`` into ``folder``; and the later
    decade as ``later_sst_2021-2030.nc`` with its ``later_planted_modes.nc``."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    field, truth = scenario(seed)
    later, later_truth = scenario(seed + 1, LATER_YEARS)
    paths = []
    encoding = {"time": {"units": "days since 1970-01-01", "calendar": "standard", "_FillValue": None},
                "lat": {"_FillValue": None}, "lon": {"_FillValue": None},
                "sst": {"zlib": True, "complevel": 4, "_FillValue": np.float32(-1e20)}}
    for first, last in FILE_YEARS:
        path = folder / f"sst_{first}-{last}.nc"
        field.sel(time=slice(str(first), str(last))).to_netcdf(path, encoding=encoding)
        paths.append(path)
    paths.append(folder / f"later_sst_{LATER_YEARS[0]}-{LATER_YEARS[1]}.nc")
    later.to_netcdf(paths[-1], encoding=encoding)
    for name, planted in (("planted_modes.nc", truth), ("later_planted_modes.nc", later_truth)):
        paths.append(folder / name)
        planted.to_netcdf(paths[-1], encoding={k: v for k, v in encoding.items() if k != "sst"})
    return paths


if __name__ == "__main__":
    for written in write_demo_fields(sys.argv[1] if len(sys.argv) > 1 else "demo_fields"):
        print(f"wrote {written}")
