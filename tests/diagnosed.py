"""Results files carrying every variable the results contract lets a run add, for the figure and report tests.

The variables a run wrote are kept; those it did not (the red-noise test, a
rotation it was not asked for) are computed here, independently of climodes,
from the file's own modes: a field rebuilt from the modes plus a fixed noise stands for the
prepared field, and the diagnostics follow from their definitions (correlation
of each PC with the field, residual after modes 1..k, the eigenvalues of the
whole field, a two-mode rotation).  The red-noise threshold is a fixed
fraction of the third eigenvalue, so that the first modes pass and the rest
do not: enough to draw every mark.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr


def _flag(values: np.ndarray, meanings: str, count: int = 2) -> tuple:
    return values.astype(np.int8), {"flag_values": np.arange(count, dtype=np.int8), "flag_meanings": meanings}


def diagnosed(ds: xr.Dataset, dropped: np.ndarray | None = None, rotation: bool = True) -> xr.Dataset:
    """``ds`` with the diagnostics of the contract it lacks added (the run's own are kept).

    ``dropped`` marks the unused points that were dropped for missing data
    (``point_status`` 1, replacing the run's); the other unused points have no data (0).
    """
    kept = {name: ds[name] for name in ("correlation", "spectrum", "spectrum_explained", "effective_sample_size",
                                        "point_status", "unexplained_fraction", "explained_locally", "rotated_eof",
                                        "rotated_pc", "rotated_variance_explained") if name in ds}
    ds = ds.load().drop_vars(["spectrum", "spectrum_explained", "rank"], errors="ignore").copy()
    eof, pc = ds["eof"], ds["pc"]
    mode, rows, columns = eof.dims
    time = pc.dims[1]
    count, steps = pc.shape
    maps = np.nan_to_num(eof.values.reshape(count, -1))
    used = np.isfinite(eof.values[0]).ravel()
    noise = 0.3 * np.random.default_rng(5).standard_normal((steps, maps.shape[1])) * maps.std()
    field = pc.values.T @ maps + noise * used  # (time, point)
    field -= field.mean(axis=0)
    shape = eof.shape[1:]

    spread = field.std(axis=0, ddof=1)
    anomaly = field / np.where(spread > 0, spread, 1.0)
    corr = (pc.values @ anomaly) / (steps - 1)
    ds["correlation"] = ((mode, rows, columns), np.where(used, corr, np.nan).reshape(count, *shape),
                         {"long_name": "correlation of the PC with the prepared field", "units": "1"})

    rebuilt = np.cumsum(pc.values[:, :, None] * maps[:, None, :], axis=0)  # modes 1..k, (k, time, point)
    residual = field[None] - rebuilt
    total = (field**2).sum(axis=1)
    ds["unexplained_fraction"] = ((mode, time), (residual**2).sum(axis=2) / total,
                                  {"long_name": "fraction of the step's variance left by modes 1..k", "units": "1"})
    local = 1 - residual.var(axis=1) / field.var(axis=0).clip(1e-12)
    ds["explained_locally"] = ((mode, rows, columns), np.where(used, local, np.nan).reshape(count, *shape),
                               {"long_name": "local variance explained by modes 1..k", "units": "1"})

    eigen = np.linalg.svd(field, compute_uv=False) ** 2 / (steps - 1)
    eigen[:count] = ds["eigenvalue"].values
    share = ds["eigenvalue"].values[0] / ds["variance_explained"].values[0]
    ds["spectrum"] = ("rank", eigen, {"long_name": "every eigenvalue resolved"})
    ds["spectrum_explained"] = ("rank", eigen / share, {"units": "1", "unresolved_fraction": 0.0})
    ds = ds.assign_coords(rank=("rank", np.arange(1, eigen.size + 1)))

    threshold = np.full(count, 1.1 * ds["eigenvalue"].values[min(2, count - 1)])
    ds["noise_eigenvalue"] = (mode, threshold, {"long_name": "red-noise surrogate eigenvalue", "level": 0.95,
                                                "surrogates": 99})
    values, attrs = _flag(ds["eigenvalue"].values > threshold, "not_significant significant")
    ds["significant"] = (mode, values, attrs)
    r = np.array([np.corrcoef(p[1:], p[:-1])[0, 1] for p in pc.values]).clip(0, None)
    ds["effective_sample_size"] = (mode, steps * (1 - r**2) / (1 + r**2), {"units": "1"})

    if rotation and count >= 2:
        turn = np.eye(count)
        c, s = np.cos(np.pi / 6), np.sin(np.pi / 6)
        turn[:2, :2] = [[c, -s], [s, c]]
        ds["rotated_eof"] = ((mode, rows, columns), np.einsum("kj,kxy->jxy", turn, eof.values), eof.attrs)
        ds["rotated_pc"] = ((mode, time), turn.T @ pc.values)
        ds["rotated_variance_explained"] = (mode, (turn**2).T @ ds["variance_explained"].values, {"units": "1"})

    status = np.where(np.isfinite(eof.values[0]), 2, 0)
    if dropped is not None:
        status = np.where(dropped & (status == 0), 1, status)
    values, attrs = _flag(status, "no_data dropped_for_missing_data used", 3)
    ds["point_status"] = ((rows, columns), values, attrs)
    if dropped is not None:
        kept.pop("point_status", None)
    if "spectrum" in kept:
        ds = ds.drop_vars(["spectrum", "spectrum_explained", "rank"])
    return ds.assign(kept)


def rewrite(folder: Path, ds: xr.Dataset) -> None:
    """Replace ``folder/modes.nc`` by ``ds`` (written beside it, then renamed)."""
    target = folder / "modes.nc"
    ds.to_netcdf(folder / "modes.nc.new")
    ds.close()
    (folder / "modes.nc.new").replace(target)
