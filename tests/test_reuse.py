"""Reusing the modes of a run: projection of other fields, reconstruction, the coefficient table.

References: the SVD algebra of the results contract (``X = A W = U S V^T``, ``pc = sqrt(n - 1) U``,
``eof = A^T pc / (n - 1)``: the training field projected on its own EOFs gives its PCs, and an exactly
rank-K field is rebuilt exactly by its K modes); planted patterns and series (fields made here of known
maps and known PCs); numpy's ``corrcoef``; pandas reading the tables back (``read_csv``, ``read_parquet``);
the IOOS compliance-checker for CF-1.10.
"""

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

from climodes.errors import UserError
from conftest import cf_strict, field_dataset, red_field, write_config

LAT, LON = np.linspace(-60, 60, 9), np.arange(0, 360, 20.0)


def _planted(steps: int, seed: int, start: str = "1980-01-01", count: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """A field of ``count`` fixed patterns (the same whatever the seed; orthogonal under the area-weighted
    inner product, with eigenvalues 900, 400 and 100) times unit-variance series (new for each seed),
    orthogonal to the calendar months and a trend; and the series."""
    raw = np.random.default_rng(0).standard_normal((count, LAT.size, LON.size)).cumsum(axis=2)
    w = np.sqrt(np.cos(np.deg2rad(LAT)))[:, None] * np.ones(LON.size)
    q = np.linalg.qr((raw * w).reshape(count, -1).T)[0].T.reshape(raw.shape)
    patterns = q / w * np.array([30.0, 20.0, 10.0])[:count, None, None]
    time = xr.date_range(start, periods=steps, freq="MS")
    design = np.column_stack([(time.month == m) for m in range(1, 13)] + [np.arange(steps)]).astype(float)
    series = np.random.default_rng(seed).standard_normal((steps, count))
    series -= design @ np.linalg.lstsq(design, series, rcond=None)[0]
    series /= series.std(axis=0, ddof=1)
    return np.einsum("tk,kyx->tyx", series, patterns), series


def _archive(steps: int, seed: int, start: str = "1980-01-01", noise: float = 0.0, count: int = 3) -> tuple:
    """The planted field as an archive holds it: 280 K, a seasonal cycle and a trend that go on from
    1980 whatever the period, and ``noise``."""
    modes, series = _planted(steps, seed, start, count)
    time = xr.date_range(start, periods=steps, freq="MS")
    days = (time - np.datetime64("1980-01-01")) / np.timedelta64(1, "D")
    season = 6 * np.cos(2 * np.pi * (time.month.values - 1) / 12)[:, None, None] * np.sin(np.deg2rad(LAT))[:, None]
    trend = 1e-4 * days.values[:, None, None] * np.cos(np.deg2rad(LON))  # a straight line in time
    values = 280 + season + trend + modes + noise * red_field((steps, LAT.size, LON.size), seed + 100)
    return values, series, time


def _write(folder, values, time, name="field.nc", lat=LAT, lon=LON, units="K"):
    folder.mkdir(exist_ok=True)
    path = folder / name
    ds = field_dataset(values, lat, lon, time=time, units=units or "")
    if units is None:  # an archive that says nothing
        del ds["tas"].attrs["units"]
    ds.to_netcdf(path)
    return path


@pytest.fixture
def trained(tmp_path, cli):
    """Train on 1980-1999 with a baseline, a trend, a gappy point and land; return a function that runs
    with other settings."""

    def run(method="exact", count=3, noise=0.05, gaps=True, **sections):
        values, series, time = _archive(240, 1, noise=noise)
        if gaps:
            values[:, 0, :3] = np.nan  # land
            values[::17, 4, 5] = np.nan  # a gappy point, filled
        path = _write(tmp_path / "train", values.astype(np.float32), time)
        sections.setdefault("prepare", {"baseline": [1981, 1990], "detrend": "linear"})
        config = write_config(tmp_path / "train", [path], modes={"count": count, "method": method}, **sections)
        code, _, err = cli("run", config)
        assert code == 0, err
        return tmp_path / "train" / "out", path, values.astype(np.float32), series

    return run


def _project_config(folder, paths, **sections):
    folder.mkdir(exist_ok=True)
    return write_config(folder, paths, **sections)


# --- projection


@pytest.mark.parametrize("method, atol", [("exact", 1e-6), ("gram", 1e-6), ("randomized", 1e-4)])
def test_the_training_field_projects_onto_its_own_pcs(tmp_path, cli, trained, method, atol):
    """SVD algebra: sum_x A w^2 eof_k / lambda_k = pc_k for the field the modes came from (exact and gram
    to 1e-6; randomized to its own accuracy: its PCs are Ritz vectors of a converged sketch, whose residual
    the solver holds below 1e-4 of the eigenvalue, so the projection differs by about that)."""
    results, path, _, _ = trained(method)
    config = _project_config(tmp_path / "again", [path], modes={"count": 7}, prepare={"detrend": "none"})
    code, out, err = cli("project", results, config)
    assert code == 0, err
    assert "the prepare and modes sections of" in err and "are not used" in err
    only_modes = _project_config(tmp_path / "modes only", [path], modes={"count": 7})
    assert "the modes section of" in cli("project", "--check", results, only_modes)[2]
    assert out.startswith("climodes: projected tas from 1 file(s), 240 time steps, onto the 3 modes of")
    projection = xr.open_dataset(tmp_path / "again" / "out" / "projection.nc")
    modes = xr.open_dataset(results / "modes.nc")
    log = (tmp_path / "again" / "out" / "projection.log").read_text()
    for text in (projection.attrs["climodes_config"], log):  # the config as used: not the sections it ignored
        assert "detrend" not in text and "count: 7" not in text and "input:" in text
        assert "# prepare, modes: those of the run whose modes are projected onto" in text
    np.testing.assert_allclose(projection["pc"].values, modes["pc"].values, rtol=0, atol=atol)
    np.testing.assert_allclose(projection["unexplained_fraction"].values, modes["unexplained_fraction"].values,
                               rtol=0, atol=10 * atol)
    assert sorted(p.name for p in (tmp_path / "again" / "out").iterdir()) == [
        ".climodes-results.json", "projection.log", "projection.nc"]


def test_the_rerun_commands_name_absolute_paths(tmp_path, cli, trained, monkeypatch):
    """The command a projection or reconstruction stores in ``history`` (CF conventions: the commands that
    made the file) reruns from any folder, though it was given paths relative to the working folder."""
    results, path, _, _ = trained("gram")
    _project_config(tmp_path / "again", [path])
    monkeypatch.chdir(tmp_path)
    assert cli("project", "train/out", "again/run.yaml")[0] == 0
    assert cli("reconstruct", "train/out", "--modes", "1-2", "-o", "rebuilt.nc")[0] == 0
    projected = xr.open_dataset(tmp_path / "again" / "out" / "projection.nc").attrs["history"]
    rebuilt = xr.open_dataset(tmp_path / "rebuilt.nc").attrs["history"]
    assert projected.endswith(f"climodes project {results} {tmp_path / 'again' / 'run.yaml'}")
    assert rebuilt.endswith(f"climodes reconstruct {results} --modes 1-2 -o {tmp_path / 'rebuilt.nc'}")


def test_spellings_of_one_unit_are_one_unit(tmp_path, cli, trained):
    """``kelvin`` and ``K``, ``degree_Celsius`` and ``degC`` name the same values (UDUNITS-2's names and
    symbols, from memory): a projection of the training field written with ``units: kelvin`` gives its PCs;
    degrees Celsius against kelvin are still refused."""
    from climodes.fields import units_key

    assert units_key("kelvin") == units_key(" K") == units_key("degK") and units_key("degC") != units_key("K")
    assert units_key("degrees Celsius") == units_key("degree_Celsius") == "degC"
    results, _, values, _ = trained("gram")
    path = _write(tmp_path / "spelled", values, xr.date_range("1980-01-01", periods=240, freq="MS"), units="kelvin")
    config = _project_config(tmp_path / "spelled", [path])
    code, _, err = cli("project", results, config)
    assert code == 0, err
    projection = xr.open_dataset(tmp_path / "spelled" / "out" / "projection.nc")
    np.testing.assert_allclose(projection["pc"].values, xr.open_dataset(results / "modes.nc")["pc"].values,
                               rtol=0, atol=1e-6)


def test_a_later_period_gives_the_planted_series(tmp_path, cli, trained):
    """A later period made of the same patterns with new series (and the seasonal cycle and trend going
    on): the pseudo-PCs correlate with the planted series above 0.99, and each step's congruence with a
    pattern is bounded by 1.  The climatology is that of the whole training period, over which the planted
    series have no seasonal cycle or trend (a shorter baseline would hold a part of them)."""
    results, _, _, _ = trained(noise=0.05, prepare={"detrend": "linear"})
    values, series, time = _archive(120, 2, start="2000-01-01", noise=0.05)
    values[::23, 4, 5] = np.nan  # gaps, as the training had
    path = _write(tmp_path / "later", values, time)
    code, _, err = cli("project", results, _project_config(tmp_path / "later", [path]))
    assert code == 0, err
    projection = xr.open_dataset(tmp_path / "later" / "out" / "projection.nc")
    for k in range(3):
        r = np.corrcoef(projection["pc"].values[k], series[:, k])[0, 1]
        assert abs(r) > 0.99, (k, r)
    assert (np.abs(projection["congruence"].values) <= 1 + 1e-12).all()
    assert (np.diff(projection["unexplained_fraction"].values, axis=0) <= 1e-12).all()
    assert "set 6 missing values at 1 points to zero anomaly" in err


def test_seasonal_means_are_taken_as_the_training_took_them(tmp_path, cli, trained):
    """A run on DJF means: the same field projected (with the same months) gives its PCs back; the time
    axis of the projection has the means' bounds."""
    results, path, _, _ = trained(select={"months": [12, 1, 2]},
                                  prepare={"aggregate": "seasonal", "detrend": "linear"})
    config = _project_config(tmp_path / "again", [path], select={"months": [12, 1, 2]})
    code, _, err = cli("project", results, config)
    assert code == 0, err
    projection = xr.open_dataset(tmp_path / "again" / "out" / "projection.nc")
    modes = xr.open_dataset(results / "modes.nc")
    assert projection.sizes["time"] == 19  # winters 1981..1999: 1980 lacks its December
    np.testing.assert_allclose(projection["pc"].values, modes["pc"].values, rtol=0, atol=1e-6)
    np.testing.assert_array_equal(projection["time_bnds"].values, modes["time_bnds"].values)


def test_projection_and_check_follow_the_config(tmp_path, cli, trained):
    """--check reads no values and writes nothing; a second projection needs overwrite; both files are CF."""
    results, path, _, _ = trained()
    config = _project_config(tmp_path / "again", [path], compute={"scheduler": "synchronous"})
    code, out, err = cli("project", "--check", results, config)
    assert code == 0 and out == ""
    lines = err.splitlines()
    assert lines[0] == f"reads    tas from 1 file(s), first {path}"
    assert lines[3].startswith("projects onto the 3 modes of") and "(climatology, trend, offset)" in lines[3]
    assert lines[5] == f"writes   {tmp_path / 'again' / 'out'} (a new folder)"
    assert "not used" not in err  # the config has no prepare or modes section to ignore
    assert not (tmp_path / "again" / "out").exists()
    assert cli("project", "--quiet", results, config) == (0, "", "")
    code, _, err = cli("project", results, config)
    assert code == 2 and "exists already; set output.overwrite: true (or --overwrite)" in err
    code, _, err = cli("project", "--overwrite", results, config)
    assert code == 0, err
    assert cf_strict(tmp_path / "again" / "out" / "projection.nc").returncode == 0


def _foreign(tmp_path, results):
    path = tmp_path / "other.nc"
    xr.Dataset({"x": ("t", [1.0])}).to_netcdf(path)
    return path


def _old_results(tmp_path, results):
    """A results file written before the preparation was kept with it."""
    ds = xr.load_dataset(results / "modes.nc").drop_vars("fitted_offset")
    ds.to_netcdf(tmp_path / "old.nc")
    return tmp_path / "old.nc"


def _shifted(values, time, tmp):
    return _write(tmp, values, time, lat=LAT + 1.0)


PROJECT_CATALOGUE = {  # case: (make the other field and its config sections, the results to give, expected)
    "a different grid": (
        lambda t, v, time: ([_write(t, v[:, ::2], time, lat=LAT[::2])], {}),
        "the field's grid (5 x 18 points after select) is not the grid of the modes"),
    "the grid moved by a degree": (
        lambda t, v, time: ([_shifted(v, time, t)], {}),
        "the field's grid point at row 0, column 0 lies at lat -59, lon 0, but the modes in"),
    "latitudes in the other order": (
        lambda t, v, time: ([_write(t, v[:, ::-1], time, lat=LAT[::-1])], {}),
        "the field's grid point at row 0, column 0 lies at lat 60"),
    "other units": (
        lambda t, v, time: ([_write(t, v - 273.15, time, units="degC")], {}),
        "input.variable: tas is in 'degC', but the modes in"),
    "no units": (
        lambda t, v, time: ([_write(t, v, time, units=None)], {}),
        "input.variable: tas is without units, but the modes in"),
    "another calendar": (
        lambda t, v, time: ([_write(t, v[:36], xr.date_range("2000-01-01", periods=36, freq="MS", calendar="noleap",
                                                             use_cftime=True))], {}),
        "input.paths: the field's calendar is noleap, but the preparation was fitted on the proleptic_gregorian "
        "calendar"),
    "daily steps against a monthly climatology": (
        lambda t, v, time: ([_write(t, v[:60], xr.date_range("2000-01-01", periods=60, freq="D"))], {}),
        "input.paths: the field's time steps are keyed by calendar month and day, but the climatology was fitted "
        "by calendar month"),
    "a used point missing at every step": (
        lambda t, v, time: ([_write(t, np.where(np.arange(LON.size) == 7, np.nan, v), time)], {}),
        "input.paths: the grid point at lat -60, lon 140, which the modes in"),
    "a used point missing too often": (
        lambda t, v, time: ([_write(t, np.where((np.arange(v.shape[0]) % 3 == 0)[:, None, None]
                                                & (np.arange(LON.size) == 7), np.nan, v), time)], {}),
        "is missing at 33% of the steps, more than the training's prepare.max_missing (0.1)"),
    "results that are not results": (
        lambda t, v, time: ([_write(t, v, time)], {}, _foreign),
        "other.nc: not a climodes results file"),
    "results older than the kept preparation": (
        lambda t, v, time: ([_write(t, v, time)], {}, _old_results),
        "old.nc: holds no fitted preparation (fitted_offset)"),
    "a variable the files lack": (
        lambda t, v, time: ([_write(t, v, time)], {"input": {"variable": "sst"}}),
        "no variable 'sst'; variables there: tas"),
    "output into the training results folder": (
        lambda t, v, time: ([_write(t, v, time)], {"output": {"dir": str(t.parent / "train" / "out"),
                                                              "overwrite": True}}),
        "holds the modes.nc of a run, which a projection never replaces"),
    "output inside the training results folder": (
        lambda t, v, time: ([_write(t, v, time)], {"output": {"dir": str(t.parent / "train" / "out" / "p")}}),
        "lies inside the climodes results folder"),
    "a memory budget too small": (
        lambda t, v, time: ([_write(t, v, time)], {"compute": {"memory": "50MB"}}),
        "compute.memory: 50 MB is too small for projecting 120 steps x 162 points"),
}
# found only once the field's values are read: `climodes project --check` cannot see them
FOUND_WHEN_READING = {"a used point missing at every step", "a used point missing too often"}


def test_steps_made_of_the_patterns_have_known_pseudo_pcs_and_congruence(tmp_path, cli, trained):
    """Steps built from the modes' own maps, put back into values with the fitted preparation: 2 eof_1,
    -eof_2 and eof_1 + eof_2.  The weighted EOFs are orthogonal with squared length lambda_k (SVD algebra),
    so the pseudo-PCs are (2, 0, 0), (0, -1, 0), (1, 1, 0) and the congruences (1, 0, 0), (0, -1, 0) and
    (sqrt(l1 / (l1 + l2)), sqrt(l2 / (l1 + l2)), 0) (hand-computed)."""
    from climodes.prepare import fitted_preparation, keys_of, unapply

    results, _, _, _ = trained(gaps=False)
    modes = xr.open_dataset(results / "modes.nc")
    eof = modes["eof"].values
    time = xr.date_range("2003-01-01", periods=3, freq="MS")
    fitted = fitted_preparation(modes)
    values = unapply(np.stack([2 * eof[0], -eof[1], eof[0] + eof[1]]), fitted, keys_of(time, fitted))
    path = _write(tmp_path / "made", values, time)
    code, _, err = cli("project", results, _project_config(tmp_path / "made", [path]))
    assert code == 0, err
    projection = xr.open_dataset(tmp_path / "made" / "out" / "projection.nc")
    np.testing.assert_allclose(projection["pc"].values.T, [[2, 0, 0], [0, -1, 0], [1, 1, 0]], atol=1e-9)
    l1, l2 = modes["eigenvalue"].values[:2]
    np.testing.assert_allclose(projection["congruence"].values.T,
                               [[1, 0, 0], [0, -1, 0], [np.sqrt(l1 / (l1 + l2)), np.sqrt(l2 / (l1 + l2)), 0]],
                               atol=1e-9)
    np.testing.assert_allclose(projection["unexplained_fraction"].values[:, 2], [l2 / (l1 + l2), 0, 0], atol=1e-9)


@pytest.mark.parametrize("case, check", [(case, check) for case in PROJECT_CATALOGUE for check in (False, True)
                                         if not (check and case in FOUND_WHEN_READING)])
def test_a_field_the_modes_do_not_fit_exits_2(tmp_path, cli, trained, case, check):
    """Every mismatch between the field and the modes: one line naming it, exit code 2, nothing written (the
    training results untouched); --check gives the same line for what it can see without the values."""
    results, _, _, _ = trained()
    before = (results / "modes.nc").read_bytes()
    make, expected = PROJECT_CATALOGUE[case]
    values, _, time = _archive(120, 2, start="2000-01-01")
    made = make(tmp_path / "other", values, time)
    paths, sections = made[0], made[1]
    target = made[2](tmp_path, results) if len(made) > 2 else results
    config = _project_config(tmp_path / "other", paths, **sections)
    code, out, err = cli("project", *(["--check"] if check else []), target, config)
    assert code == 2 and out == "", err
    assert len(err.strip().splitlines()) == 1, err
    assert expected in err and "Traceback" not in err
    assert not (tmp_path / "other" / "out").exists()
    assert (results / "modes.nc").read_bytes() == before
    assert sorted(p.name for p in results.iterdir()) == [".climodes-results.json", "modes.nc", "report.html", "run.log"]


def test_months_of_seasonal_means_must_be_the_training_ones(tmp_path, cli, trained):
    results, path, _, _ = trained(select={"months": [12, 1, 2]}, prepare={"aggregate": "seasonal"})
    config = _project_config(tmp_path / "other", [path], select={"months": [6, 7, 8]})
    code, _, err = cli("project", results, config)
    assert code == 2
    assert ("select.months: the modes in" in err and "were computed from seasonal means of DJF ([12, 1, 2]); "
            "select the same months" in err)


def test_months_a_monthly_climatology_lacks_are_refused(tmp_path, cli, trained):
    results, path, _, _ = trained(select={"months": [12, 1, 2]})
    code, _, err = cli("project", results, _project_config(tmp_path / "other", [path]))
    assert code == 2 and "falls on month 3, which the fitted climatology does not hold" in err


# --- reconstruction


def _rank3(tmp_path):
    """Exactly three planted modes with a seasonal cycle and a trend, no noise, and land (a gap filled with
    zero anomaly would add modes of its own)."""
    values, series, time = _archive(120, 3, noise=0.0)
    values[:, 0, :3] = np.nan
    return values.astype(np.float32), time


@pytest.mark.parametrize("method", ["exact", "gram", "randomized"])
def test_all_modes_of_a_rank_k_field_rebuild_it(tmp_path, cli, method):
    """SVD algebra: a field that is exactly three modes plus a seasonal cycle and a trend is given back by
    all its modes and the fitted preparation, to float32 precision where it has values; the points the run
    did not use are NaN.  The preparation adds one mode: the trend less its baseline monthly means is a
    staircase (a step each January) that the fitted line cannot remove, a fourth mode close to the trend's
    pattern (algebra of the climatology and the least-squares line).  The anomalies of modes 1 and 3 are
    pc * eof."""
    values, time = _rank3(tmp_path)
    path = _write(tmp_path, values, time)
    config = write_config(tmp_path, [path], modes={"count": 4, "method": method},
                          prepare={"baseline": [1982, 1989], "detrend": "linear"})
    assert cli("run", config)[0] == 0
    modes = xr.open_dataset(tmp_path / "out" / "modes.nc")
    trend = np.cos(np.deg2rad(LON)) * np.ones((LAT.size, 1))
    used = modes["point_status"].values == 2
    assert abs(np.corrcoef(modes["eof"].values[3][used], trend[used])[0, 1]) > 0.99
    code, out, err = cli("reconstruct", tmp_path / "out", "--modes", "1-4", "-o", tmp_path / "all.nc")
    assert code == 0, err
    assert out.strip() == (f"climodes: wrote tas rebuilt from modes 1-4 (values, K), 120 time steps x 9 x 18 points, "
                           f"to {tmp_path / 'all.nc'}")
    rebuilt = xr.open_dataset(tmp_path / "all.nc")
    assert rebuilt["tas"].dtype == np.float32 and rebuilt["tas"].attrs["units"] == "K"
    have = ~np.isnan(values)
    tolerance = {"randomized": 1e-5}.get(method, 2e-7)  # float32, or the randomized solver's float32 products
    np.testing.assert_allclose(rebuilt["tas"].values[have], values[have], rtol=tolerance)
    assert np.isnan(rebuilt["tas"].values[:, 0, :3]).all() and not np.isnan(rebuilt["tas"].values[:, 1:]).any()
    code, _, err = cli("reconstruct", tmp_path / "out", "--modes", "1,3", "--anomalies", "-o", tmp_path / "a.nc")
    assert code == 0, err
    expected = np.einsum("kt,kyx->tyx", modes["pc"].values[[0, 2]], modes["eof"].values[[0, 2]])
    np.testing.assert_allclose(xr.open_dataset(tmp_path / "a.nc")["tas"].values, expected, rtol=1e-6,
                               atol=1e-6 * np.nanmax(np.abs(expected)))
    assert cf_strict(tmp_path / "all.nc").returncode == 0


def test_a_standardised_seasonal_run_is_rebuilt_in_its_own_units(tmp_path, cli):
    """Standardised DJF means: every mode (the field's rank) rebuilds the means to float32 precision: the
    scale, trend and mean are put back in that order (the inverse of the preparation's steps)."""
    values, time = _rank3(tmp_path)
    path = _write(tmp_path, values, time)
    config = write_config(tmp_path, [path], modes={"count": 6}, select={"months": [12, 1, 2]},
                          prepare={"aggregate": "seasonal", "detrend": "linear", "standardize": True})
    assert cli("run", config)[0] == 0
    modes = xr.open_dataset(tmp_path / "out" / "modes.nc")
    count = modes.sizes["mode"]
    code, _, err = cli("reconstruct", tmp_path / "out", "--modes", f"1-{count}", "-o", tmp_path / "r.nc")
    assert code == 0, err
    rebuilt = xr.open_dataset(tmp_path / "r.nc")
    means = xr.DataArray(values, dims=("time", "lat", "lon"), coords={"time": time}).isel(
        time=slice(11, 119)).coarsen(time=12, boundary="trim").construct(time=("year", "month")).isel(month=[0, 1, 2])
    winters = means.mean("month").values  # Dec, Jan, Feb of each winter 1981..1989
    used = modes["point_status"].values == 2
    assert rebuilt["tas"].attrs["units"] == "K" and "time_bnds" in rebuilt
    np.testing.assert_allclose(rebuilt["tas"].values[:, used], winters[:, used], rtol=2e-7)


def test_the_reconstruction_is_built_in_blocks(tmp_path, cli):
    """A budget that holds a few steps at a time: the lazy array has many blocks, and gives the same field."""
    from climodes.results import open_results
    from climodes.reuse import reconstruction
    from climodes.solvers import LIBRARY_WORK

    values, time = _rank3(tmp_path)
    config = write_config(tmp_path, [_write(tmp_path, values, time)], modes={"count": 3})
    assert cli("run", config)[0] == 0
    beside = int(3e6 + LIBRARY_WORK)  # what the process holds, and what the plan keeps for the libraries
    with open_results(tmp_path / "out") as ds:
        whole = reconstruction(ds, [1, 2, 3], False, int(4e9), 0)
        small = reconstruction(ds, [1, 2, 3], False, beside + int(1e5), int(3e6))
        assert len(whole.chunks[0]) == 4 and len(small.chunks[0]) > 10
        np.testing.assert_array_equal(small.values, whole.values)
        with pytest.raises(UserError, match="compute.memory: .* is too small for rebuilding 120 steps x 162 points"):
            reconstruction(ds, [1, 2, 3], False, beside + 5000, int(3e6))


def test_reconstruct_takes_a_memory_of_its_own(tmp_path, cli):
    """The run's compute.memory by default; --memory gives another, and a size too small or not a size is
    one line naming --memory (the reconstruction itself is checked above)."""
    values, time = _rank3(tmp_path)
    assert cli("run", write_config(tmp_path, [_write(tmp_path, values, time)], modes={"count": 3}))[0] == 0
    code, _, err = cli("reconstruct", tmp_path / "out", "--modes", "1-2", "-o", tmp_path / "a.nc", "--memory", "3XB")
    assert code == 2 and err.strip().splitlines() == [
        "climodes: error: --memory: expected a size from 50MB to 1PB such as \"4GB\" or \"1.5GiB\"; got '3XB'"]
    code, _, err = cli("reconstruct", tmp_path / "out", "--modes", "1-2", "-o", tmp_path / "a.nc", "--memory", "60MB")
    assert code == 2 and "error: --memory: 60 MB is too small for rebuilding" in err and "give at least" in err
    assert not (tmp_path / "a.nc").exists()
    code, out, err = cli("reconstruct", tmp_path / "out", "--modes", "1-2", "-o", tmp_path / "a.nc", "--memory", "2GB")
    assert code == 0 and (tmp_path / "a.nc").exists(), err


def _results_run(tmp_path, cli):
    values, time = _rank3(tmp_path)
    assert cli("run", write_config(tmp_path, [_write(tmp_path, values, time)], modes={"count": 3}))[0] == 0
    return tmp_path / "out"


def _ours(tmp_path, cli, name):
    results = _results_run(tmp_path, cli)
    command = "table" if name.endswith((".csv", ".parquet")) else "reconstruct"
    assert cli(command, results, *(["--modes", "1"] * (command == "reconstruct")), "-o", tmp_path / name)[0] == 0
    return results


def _copied(tmp_path, cli, name):
    """A copy of the results file kept outside its folder (climodes wrote it, so --overwrite alone would
    replace it), given as the results to read."""
    (tmp_path / name).write_bytes((_results_run(tmp_path, cli) / "modes.nc").read_bytes())
    return tmp_path / name


def _about_climodes(tmp_path, cli, name):
    """A NetCDF file of someone's whose source merely mentions climodes (not climodes and its version)."""
    xr.Dataset({"x": ("t", [1.0])}, attrs={"source": "climodes-style post-processing"}).to_netcdf(tmp_path / name)
    return _results_run(tmp_path, cli)


def _theirs(tmp_path, cli, name, content=b"someone's data"):
    (tmp_path / name).write_bytes(content)
    return _results_run(tmp_path, cli)


OUTPUT_CATALOGUE = {  # case: (arguments after RESULTS, set-up, expected)
    "modes out of range": (["--modes", "2-5", "-o", "r.nc"], _results_run,
                           "--modes 2-5: the results hold modes 1 to 3"),
    "modes backwards": (["--modes", "3-1", "-o", "r.nc"], _results_run, "the range 3-1 runs backwards; write 1-3"),
    "modes not numbers": (["--modes", "first", "-o", "r.nc"], _results_run, "give mode numbers such as 1-3 or 1,4"),
    "not a .nc name": (["--modes", "1", "-o", "r.txt"], _results_run,
                       "-o r.txt: give a NetCDF file name ending in .nc"),
    "a folder": (["--modes", "1", "-o", "."], _results_run, "is a folder; give a file name"),
    "a folder that does not exist": (["--modes", "1", "-o", "none/r.nc"], _results_run,
                                     "the folder none does not exist"),
    "inside the results folder": (["--modes", "1", "-o", "out/r.nc"], _results_run,
                                  "lies inside the climodes results folder"),
    "a reconstruction there already": (["--modes", "1", "-o", "r.nc"], lambda t, c: _ours(t, c, "r.nc"),
                                       "-o r.nc: exists already; give --overwrite to replace it"),
    "a file climodes did not write": (["--modes", "1", "-o", "r.nc", "--overwrite"],
                                      lambda t, c: _theirs(t, c, "r.nc"),
                                      "-o r.nc: exists and was not written by climodes"),
    "a table of someone's": (["-o", "t.csv", "--overwrite"], lambda t, c: _theirs(t, c, "t.csv", b"a,b\n1,2\n"),
                             "-o t.csv: exists and was not written by climodes"),
    "a parquet file of someone's": (["-o", "t.parquet", "--overwrite"], lambda t, c: _theirs(t, c, "t.parquet"),
                                    "-o t.parquet: exists and was not written by climodes"),
    "a table there already": (["-o", "t.csv"], lambda t, c: _ours(t, c, "t.csv"), "-o t.csv: exists already"),
    "a table of someone's about climodes": (["-o", "t.csv", "--overwrite"],
                                            lambda t, c: _theirs(t, c, "t.csv", b"# climodes runs, by date\nrun,date\n"),
                                            "-o t.csv: exists and was not written by climodes"),
    "a NetCDF file of someone's about climodes": (["--modes", "1", "-o", "r.nc", "--overwrite"],
                                                  lambda t, c: _about_climodes(t, c, "r.nc"),
                                                  "-o r.nc: exists and was not written by climodes"),
    "a table of another kind": (["-o", "t.xlsx"], _results_run,
                                "-o t.xlsx: give a file name ending in .csv or .parquet"),
    "results that are not there": (["-o", "t.csv"], lambda t, c: t / "none", "no such results file"),
    "the results file read": (["--modes", "1", "-o", "copy.nc", "--overwrite"], lambda t, c: _copied(t, c, "copy.nc"),
                              "-o copy.nc: is the results file the modes are read from"),
}


@pytest.mark.parametrize("case", list(OUTPUT_CATALOGUE))
def test_a_file_that_may_not_be_written_exits_2(tmp_path, cli, monkeypatch, case):
    """reconstruct and table: one line, exit 2, and the file that was there (if any) untouched."""
    arguments, make, expected = OUTPUT_CATALOGUE[case]
    monkeypatch.chdir(tmp_path)
    results = make(tmp_path, cli)
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir() if p.is_file()}
    command = "reconstruct" if "--modes" in arguments else "table"
    code, out, err = cli(command, results, *arguments)
    assert code == 2 and out == "", err
    assert len(err.strip().splitlines()) == 1 and expected in err and "Traceback" not in err
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir() if p.is_file()} == before
    assert not [p for p in tmp_path.iterdir() if ".climodes-" in p.name]


def test_a_file_climodes_wrote_is_replaced_with_overwrite(tmp_path, cli):
    results = _ours(tmp_path, cli, "r.nc")
    code, _, err = cli("reconstruct", results, "--modes", "2", "--anomalies", "-o", tmp_path / "r.nc", "--overwrite")
    assert code == 0, err
    assert xr.open_dataset(tmp_path / "r.nc").attrs["climodes_modes"] == "2"
    for name in ("t.csv", "t.parquet"):
        assert cli("table", results, "-o", tmp_path / name)[0] == 0
        assert cli("table", results, "-o", tmp_path / name, "--overwrite")[0] == 0


# --- the coefficient table


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_the_table_has_a_row_per_step_and_matches_modes_nc(tmp_path, cli, suffix):
    """Read back by pandas: one row per time step, its date and calendar, each PC, each unexplained
    fraction and the step's variance, as in modes.nc."""
    values, time = _rank3(tmp_path)
    config = write_config(tmp_path, [_write(tmp_path, values, time)], modes={"count": 3, "rotate": "varimax"})
    assert cli("run", config)[0] == 0
    code, out, err = cli("table", tmp_path / "out", "-o", tmp_path / f"pcs{suffix}")
    assert code == 0, err
    assert out.strip() == f"climodes: wrote 120 rows (one per time step) x 13 columns to {tmp_path / f'pcs{suffix}'}"
    frame = (pd.read_csv(tmp_path / "pcs.csv", comment="#") if suffix == ".csv"
             else pd.read_parquet(tmp_path / "pcs.parquet"))
    modes = xr.open_dataset(tmp_path / "out" / "modes.nc")
    assert list(frame.columns) == (["time", "year", "month"] + [f"pc_{k}" for k in (1, 2, 3)]
                                   + [f"unexplained_fraction_{k}" for k in (1, 2, 3)] + ["step_variance"]
                                   + [f"rotated_pc_{k}" for k in (1, 2, 3)])
    assert len(frame) == modes.sizes["time"]
    np.testing.assert_array_equal(pd.to_datetime(frame["time"]).values, modes["time"].values)
    np.testing.assert_array_equal(frame["year"], modes["time"].dt.year)
    np.testing.assert_array_equal(frame["month"], modes["time"].dt.month)
    for k in (1, 2, 3):
        np.testing.assert_allclose(frame[f"pc_{k}"], modes["pc"].sel(mode=k), rtol=1e-15)
        np.testing.assert_allclose(frame[f"unexplained_fraction_{k}"], modes["unexplained_fraction"].sel(mode=k),
                                   rtol=1e-15)
        np.testing.assert_allclose(frame[f"rotated_pc_{k}"], modes["rotated_pc"].sel(mode=k), rtol=1e-15)
    np.testing.assert_allclose(frame["step_variance"], modes["step_variance"], rtol=1e-15)


def test_seasonal_means_are_labelled_by_season_and_year(tmp_path, cli):
    """DJF means: the year of the January (common practice), the season's letters, no month column."""
    values, time = _rank3(tmp_path)
    config = write_config(tmp_path, [_write(tmp_path, values, time)], modes={"count": 2},
                          select={"months": [12, 1, 2]}, prepare={"aggregate": "seasonal"})
    assert cli("run", config)[0] == 0
    assert cli("table", tmp_path / "out", "-o", tmp_path / "djf.csv")[0] == 0
    first = (tmp_path / "djf.csv").read_text().splitlines()[0]
    assert first.startswith("# climodes") and "unexplained_fraction_k" in first
    frame = pd.read_csv(tmp_path / "djf.csv", comment="#")
    assert list(frame.columns[:3]) == ["time", "year", "season"] and "month" not in frame
    assert frame["year"].tolist() == list(range(1981, 1990)) and set(frame["season"]) == {"DJF"}
    assert frame["time"].iloc[0] == "1981-01-01"  # stamped at the middle step: January


def test_modes_text_and_chosen_modes():
    from climodes.report import modes_text
    from climodes.reuse import chosen_modes

    assert chosen_modes("1-3,5", np.arange(1, 7)) == [1, 2, 3, 5]
    assert chosen_modes("2, 2,1", np.arange(1, 4)) == [2, 1]
    assert modes_text([1, 2, 3, 5]) == "1-3, 5" and modes_text([1, 2]) == "1, 2" and modes_text([4]) == "4"
    with pytest.raises(UserError, match="the results hold modes 1 to 3"):
        chosen_modes("1-1000000000", np.arange(1, 4))


# --- a big field within compute.memory


@pytest.mark.slow
def test_a_big_field_projects_and_reconstructs_within_its_memory(tmp_path):
    """A field of 0.52 GB (float32) against compute.memory of 500MB: the training run, the projection and the
    reconstruction each stay within it, measured as the peak resident memory of the process (getrusage
    of a child, which counts what the operating system gave it)."""
    import subprocess
    import sys

    steps, lat, lon = 1000, np.linspace(-89.5, 89.5, 180), np.arange(0, 360, 0.5)
    rng = np.random.default_rng(0)
    for part in range(2):
        values = (280 + rng.standard_normal((steps // 2, lat.size, lon.size), dtype=np.float32)).astype(np.float32)
        time = xr.date_range(f"{1900 + 50 * part}-01-01", periods=steps // 2, freq="MS")
        field_dataset(values, lat, lon, time=time).to_netcdf(tmp_path / f"big{part}.nc")
        del values
    config = write_config(tmp_path, [tmp_path / "big0.nc", tmp_path / "big1.nc"], modes={"count": 3},
                          compute={"memory": "500MB"})
    other = tmp_path / "other"
    other.mkdir()
    (other / "run.yaml").write_text(yaml.safe_dump({**yaml.safe_load(config.read_text()),
                                                     "output": {"dir": str(other / "out"), "figures": False}}))
    peak = ("import resource, subprocess, sys; done = subprocess.run(sys.argv[1:]); "
            "print(done.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024)")
    climodes = [sys.executable, "-m", "climodes"]
    for command in (["run", "--quiet", str(config)],
                    ["project", "--quiet", str(tmp_path / "out"), str(other / "run.yaml")],
                    ["reconstruct", str(tmp_path / "out"), "--modes", "1-3", "-o", str(tmp_path / "r.nc")]):
        done = subprocess.run([sys.executable, "-c", peak, *climodes, *command], capture_output=True, text=True,
                              timeout=900)
        code, used = map(int, done.stdout.split()[-2:])
        assert code == 0, done.stderr
        assert used <= 500e6, (command[0], used / 1e6)


@pytest.mark.slow
def test_a_curvilinear_field_projects_on_a_local_cluster_and_is_rebuilt(tmp_path, cli):
    """A rotated-pole grid (2-D coordinates, cell areas) projected on a local dask cluster of 2 worker
    processes gives its own PCs (SVD algebra); its reconstruction keeps the 2-D coordinates, with the rows and
    columns as Y and X axes, and both files pass the CF-1.10 strict checks."""
    from test_figures import _curvilinear

    results, _ = _curvilinear(tmp_path, cli)
    other = tmp_path / "other"
    config = _project_config(other, [tmp_path / "rcm.nc"], compute={"scheduler": "processes", "workers": 2})
    code, _, err = cli("project", results, config)
    assert code == 0, err
    projection = xr.open_dataset(other / "out" / "projection.nc")
    np.testing.assert_allclose(projection["pc"].values, xr.open_dataset(results / "modes.nc")["pc"].values,
                               rtol=0, atol=1e-6)
    assert "local dask cluster of 2 worker processes" in projection.attrs["climodes_compute"]
    assert cli("reconstruct", results, "--modes", "1-3", "-o", tmp_path / "r.nc")[0] == 0
    rebuilt = xr.open_dataset(tmp_path / "r.nc")
    assert rebuilt["lat"].dims == ("rlat", "rlon") and rebuilt["lat"].attrs["standard_name"] == "latitude"
    assert rebuilt["rlat"].attrs["axis"] == "Y" and rebuilt["tas"].attrs["units"] == "K"
    for path in (other / "out" / "projection.nc", tmp_path / "r.nc"):
        assert cf_strict(path).returncode == 0, path
