"""The command line: check, run, and one clear line with exit code 2 for each bad input."""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
import yaml

from climodes.cli import main
from conftest import archive_file, field_dataset, red_field, write_config


def test_check_prints_the_resolved_config(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 3})
    code, out, err = cli("check", config)
    assert code == 0
    assert err.splitlines() == [
        f"reads   tas from 1 file(s), first {small_field}",
        "steps   60, 1980-02-15 to 1985-01-15",
        "grid    18 x 36 points",
        "solver  exact (60 steps x 648 points (0.3 MB as float64) is small: the whole matrix fits in memory)",
        f"writes  {tmp_path / 'out'} (a new folder)",
    ]
    resolved = yaml.safe_load(out)
    assert resolved["modes"] == {"count": 3, "effective_sample_size": "auto", "method": "auto", "seed": 0,
                                 "noise_surrogates": 0, "noise_level": 0.95, "rotate": "none"}
    assert resolved["compute"] == {"memory": "4GB", "workers": "auto", "scheduler": "threads", "jobs": 2,
                                   "job_cores": 4, "job_memory": "8GB", "walltime": "auto", "queue": None,
                                   "account": None, "directives": [], "interface": None, "address": None,
                                   "worker_wait": 300}
    assert resolved["prepare"]["weighting"] == "coslat"


def test_run_writes_results_and_prints_a_table(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 3})
    code, out, err = cli("run", config)
    assert code == 0, err
    assert out.splitlines()[0].startswith("climodes: 3 modes of tas from 1 file(s), 60 time steps x 648 points")
    assert out.splitlines()[1].split() == ["mode", "variance", "explained", "effective", "N", "separated", "(North)"]
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [".climodes-results.json", "modes.nc", "report.html", "run.log"]
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no staging folder or claim left


def test_count_above_the_rank_keeps_the_non_null_modes(tmp_path, cli):
    """Three planted patterns with random amplitudes and a seasonal cycle: after the monthly climatology
    the field has rank 3 (SVD algebra), whatever modes.count asks."""
    rng = np.random.default_rng(5)
    lat, lon = np.linspace(-60, 60, 7), np.arange(0, 360, 30.0)
    patterns = rng.standard_normal((3, lat.size, lon.size))
    cycle = np.sin(2 * np.pi * np.arange(48) / 12)[:, None, None] * patterns[0]
    values = 280 + cycle + np.einsum("tk,kyx->tyx", rng.standard_normal((48, 3)) * [3, 2, 1], patterns)
    field_dataset(values, lat, lon).to_netcdf(tmp_path / "rank3.nc")
    config = write_config(tmp_path, [tmp_path / "rank3.nc"], modes={"count": 6}, output={"figures": True})
    code, out, err = cli("run", config)
    assert code == 0, err
    assert out.splitlines()[0].startswith("climodes: 3 modes (6 asked, 3 not null) of tas")
    assert sum(1 for line in out.splitlines() if line.strip()[:1].isdigit() and "%" in line) == 3
    assert "the prepared field has only 3 that are not null" in err
    ds = xr.open_dataset(tmp_path / "out" / "modes.nc")
    assert ds.sizes["mode"] == 3 and "only 3 that are not null" in ds.attrs["climodes_notes"]
    np.testing.assert_allclose(ds["pc"].std("time", ddof=1), 1.0, rtol=1e-8)
    assert sorted(p.name for p in (tmp_path / "out" / "figures").glob("mode_*.png")) == [
        "mode_01.png", "mode_02.png", "mode_03.png"]
    assert "not null" in (tmp_path / "out" / "run.log").read_text()
    code, shown, _ = cli("show", tmp_path / "out")
    assert code == 0 and sum(1 for line in shown.splitlines() if line.strip()[:1].isdigit() and "%" in line) == 3


def test_quiet_run_prints_nothing(tmp_path, small_field, cli):
    code, out, err = cli("run", "--quiet", write_config(tmp_path, [small_field], modes={"count": 2}))
    assert (code, out, err) == (0, "", "")


def test_console_script_and_module_entry_points(tmp_path, small_field):
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    for command in ([sys.executable, "-m", "climodes", "check", str(config)],
                    [str(__import__("shutil").which("climodes") or sys.executable), "--version"]):
        done = subprocess.run(command, capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr
    bad = subprocess.run([sys.executable, "-m", "climodes", "run", str(tmp_path / "none.yaml")],
                         capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1 and "Traceback" not in bad.stderr


# --- the bad-input catalogue: every case exits 2 with one line naming the culprit, and writes nothing


def _no_latlon(tmp_path, *_):
    path = tmp_path / "nolatlon.nc"
    xr.Dataset({"tas": (("time", "a", "b"), np.random.rand(20, 3, 4))},
               coords={"time": np.arange(20.0)}).to_netcdf(path)
    return [path], {}


def _constant(tmp_path, *_):
    path = tmp_path / "constant.nc"
    field_dataset(np.full((30, 4, 5), 280.0), np.linspace(-30, 30, 4), np.arange(0, 50.0, 10)).to_netcdf(path)
    return [path], {"modes": {"count": 2}}


def _ok(tmp_path):
    path = tmp_path / "ok.nc"
    field_dataset(red_field((24, 5, 6)), np.linspace(-40, 40, 5), np.arange(0, 60.0, 10)).to_netcdf(path)
    return path


def _truncated(tmp_path, *_):
    path = _ok(tmp_path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return [path], {}


def _plain_hdf5(tmp_path, *_):
    import h5py

    path = tmp_path / "plain.h5"
    with h5py.File(path, "w") as f:
        f["tas"] = np.random.rand(10, 4, 5)
    return [path], {}


def _strings(tmp_path, *_):
    path = tmp_path / "names.nc"
    xr.Dataset({"tas": (("time",), np.array(["a", "b", "c"], dtype=object))}).to_netcdf(path)
    return [path], {}


def _all_nan(tmp_path, *_):
    path = tmp_path / "nan.nc"
    field_dataset(np.full((30, 4, 5), np.nan), np.linspace(-30, 30, 4), np.arange(0, 50.0, 10)).to_netcdf(path)
    return [path], {"modes": {"count": 2}}


def _infinite(method: str):
    def make(tmp_path, *_):
        values = np.random.default_rng(3).standard_normal((40, 6, 8))
        values[7, 2, 3] = np.inf
        path = tmp_path / "inf.nc"
        field_dataset(values, np.linspace(-50, 50, 6), np.arange(0, 80.0, 10)).to_netcdf(path)
        return [path], {"modes": {"count": 2, "method": method}}

    return make


def _one_step(tmp_path, *_):
    path = tmp_path / "one.nc"
    field_dataset(np.random.rand(1, 4, 5), np.linspace(-30, 30, 4), np.arange(0, 50.0, 10)).to_netcdf(path)
    return [path], {"modes": {"count": 1}}


def _inside_a_file(tmp_path, *_):
    (tmp_path / "taken").write_text("a file")
    return [_ok(tmp_path)], {"output": {"dir": str(tmp_path / "taken" / "out")}}


def _bad_yaml(tmp_path, *_):
    config = tmp_path / "run.yaml"
    config.write_text("input:\n  paths: [a.nc\n  variable: tas\n")
    return config


def _disk_full(tmp_path, monkeypatch):
    import errno

    import climodes.pipeline

    def full_disk(ds, path, encoding):
        path.write_bytes(b"half a file")
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(climodes.pipeline, "write_netcdf", full_disk)
    return [_ok(tmp_path)], {}


def _calendar_field(calendar: str, baseline: list):
    """Three years of monthly steps on a CF calendar other than the standard one (cftime dates)."""
    def make(tmp_path, *_):
        time = xr.date_range("1980-01-01", periods=36, freq="MS", calendar=calendar, use_cftime=True)
        path = tmp_path / f"{calendar}.nc"
        lat, lon = np.linspace(-40, 40, 5), np.arange(0, 60.0, 10)
        field_dataset(red_field((36, 5, 6)), lat, lon, time=time).to_netcdf(path)
        return [path], {"prepare": {"baseline": baseline}, "modes": {"count": 2}}

    return make


def _config_text(text: str):
    """A config written as text (anchors and aliases cannot come from a dict), reading the usual ok.nc."""
    def make(tmp_path, *_):
        config = tmp_path / "run.yaml"
        config.write_text(text.format(field=_ok(tmp_path)))
        return config

    return make


_BOMB = "\n".join(['a0: &a0 ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]'] + [
    f"a{k}: &a{k} [{','.join([f'*a{k - 1}'] * 9)}]" for k in range(1, 9)]) + "\ninput: {{paths: *a8, variable: tas}}\n"


def _no_time_values(tmp_path, *_):
    path = tmp_path / "f.nc"
    xr.Dataset({"tas": (("time", "lat", "lon"), red_field((24, 5, 6)))},
               coords={"lat": ("lat", np.linspace(-40, 40, 5), {"units": "degrees_north"}),
                       "lon": ("lon", np.arange(0, 60.0, 10), {"units": "degrees_east"})}).to_netcdf(path)
    return [path], {}


def _one_level(tmp_path, *_):
    """A field at 500 hPa, stored as a CF scalar coordinate, asked for at 850."""
    import netCDF4

    path = archive_file(tmp_path / "f.nc")
    with netCDF4.Dataset(path, "r+") as nc:
        level = nc.createVariable("plev", "f8", ())
        level.units, level.positive, level[...] = "hPa", "down", 500.0
        nc["tas"].coordinates = "plev"
    return [path], {"select": {"level": 850}}


def _input_folder(tmp_path, *_):
    (tmp_path / "data").mkdir()
    path = _ok(tmp_path).rename(tmp_path / "data" / "ok.nc")
    return [path], {"output": {"dir": str(tmp_path / "data"), "overwrite": True}}


def _not_ours(tmp_path, *_):
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "thesis.tex").write_text("years of work")
    return [_ok(tmp_path)], {"output": {"dir": str(tmp_path / "mine"), "overwrite": True}}


def _linked(tmp_path, *_):
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "link").symlink_to(tmp_path / "elsewhere")
    return [_ok(tmp_path)], {"output": {"dir": str(tmp_path / "link"), "overwrite": True}}


def _home(tmp_path, monkeypatch):
    (tmp_path / "home").mkdir()
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    return [_ok(tmp_path)], {"output": {"dir": "~", "overwrite": True}}
def _daily_baseline_short(tmp_path, *_):
    """Daily steps keyed by calendar day: a baseline that ends in November has no 1 December."""
    path = tmp_path / "daily.nc"
    time = xr.date_range("2001-01-01", periods=730, freq="D")
    field_dataset(red_field((730, 4, 5)), np.linspace(-30, 30, 4), np.arange(0, 50.0, 10), time=time).to_netcdf(path)
    return [path], {"modes": {"count": 2}, "prepare": {"baseline": ["2001-01-01", "2001-11-30"]}}


def _marked(folder: Path, files: list[str]) -> Path:
    """A folder with a climodes manifest listing ``files`` (written too), as a finished run leaves it."""
    import json

    folder.mkdir()
    for name in files:
        (folder / name).write_text("results")
    (folder / ".climodes-results.json").write_text(json.dumps({"kind": "climodes results folder", "files": files}))
    return folder


def _inside_results(tmp_path, *_):
    return [_ok(tmp_path)], {"output": {"dir": str(_marked(tmp_path / "earlier", ["modes.nc"]) / "new")}}


def _a_projection(tmp_path, *_):
    return [_ok(tmp_path)], {"output": {"dir": str(_marked(tmp_path / "later", ["projection.nc"])), "overwrite": True}}


CATALOGUE = {
    "missing file": (lambda t, m: ([t / "absent.nc"], {}), "absent.nc: no such file"),
    "empty glob": (lambda t, m: ([t / "nothing_*.nc"], {}), "matches no file"),
    "variable not in file": (lambda t, m: ([_ok(t)], {"input": {"variable": "pr"}}), "no variable 'pr'; variables there: tas"),
    "no latitude or longitude": (_no_latlon, "none is the latitude axis"),
    "region without points": (lambda t, m: ([_ok(t)], {"select": {"lat": [41, 45]}}), "select.lat: [41.0, 45.0] holds no latitude"),
    "region without longitudes": (lambda t, m: ([_ok(t)], {"select": {"lon": [200, 210]}}), "select.lon: [200, 210] holds no longitude"),
    "period without steps": (lambda t, m: ([_ok(t)], {"select": {"period": [2050, 2060]}}), "select.period: ['2050', '2060'] holds no time step"),
    "fewer steps than modes + 1": (lambda t, m: ([_ok(t)], {"modes": {"count": 30}}), "modes.count: 30 modes need at least 31 time steps"),
    "constant field": (_constant, "constant in time at every point"),
    "not netcdf": (lambda t, m: ([(t / "text.nc").write_text("hello") and t / "text.nc"], {}), "text.nc: cannot be read as NetCDF"),
    "unknown key": (lambda t, m: ([_ok(t)], {"modes": {"cont": 3}}), "modes.cont: unknown key; did you mean count?"),
    "truncated netcdf": (_truncated, "ok.nc: cannot be read as NetCDF"),
    "hdf5 without netcdf structure": (_plain_hdf5, "plain.h5: variable 'tas' has dimensions"),
    "non-numeric variable": (_strings, "names.nc: variable 'tas' holds text values, not numbers"),
    "nan everywhere": (_all_nan, "select: no grid point has enough data (20 missing at every step"),
    "an infinity (exact)": (_infinite("exact"), "input.variable: the field holds infinite"),
    "an infinity (gram)": (_infinite("gram"), "input.variable: the field holds infinite"),
    "an infinity (randomized)": (_infinite("randomized"), "input.variable: the field holds infinite"),
    "a single time step": (_one_step, "modes.count: 1 modes need at least 2 time steps, but the prepared field has 1"),
    "negative mode count": (lambda t, m: ([_ok(t)], {"modes": {"count": -3}}), "modes.count: expected a whole number from 1"),
    "wrong type in config": (lambda t, m: ([_ok(t)], {"select": {"lat": "north"}}), "select.lat: expected [SOUTH, NORTH]"),
    "output inside a file": (_inside_a_file, "which is a file; choose another folder"),
    "bad yaml syntax": (_bad_yaml, "run.yaml:3: not valid YAML"),
    "disk full": (_disk_full, "output.dir: cannot write the results to"),
    # --- config schema
    "period with month 13": (lambda t, m: ([_ok(t)], {"select": {"period": ["1980-13", 1981]}}),
                             "run.yaml:9: select.period: months run from 1 to 12; got '1980-13'"),
    "period with day 32": (lambda t, m: ([_ok(t)], {"select": {"period": ["1980-01-32", 1981]}}),
                           "select.period: January has no day 32 in any calendar"),
    "period in year 0": (lambda t, m: ([_ok(t)], {"select": {"period": [0, 1981]}}),
                         "select.period: years run from 1 to 9999; got 0"),
    "baseline with February 31": (lambda t, m: ([_ok(t)], {"prepare": {"baseline": ["1980", "1981-02-31"]}}),
                                  "prepare.baseline: February has no day 31 in any calendar"),
    "February 30 on the standard calendar": (
        lambda t, m: ([_ok(t)], {"select": {"period": ["1980-02-30", 1981]}}),
        "select.period: 1980-02-30 does not exist in the input's standard (Gregorian) calendar"),
    "February 29 on a noleap calendar": (_calendar_field("noleap", ["1980-02-29", 1981]),
                                         "prepare.baseline: 1980-02-29 does not exist in the input's noleap calendar"),
    "January 31 on a 360_day calendar": (_calendar_field("360_day", [1980, "1980-01-31"]),
                                         "prepare.baseline: 1980-01-31 does not exist in the input's 360_day calendar"),
    "recursive yaml alias": (_config_text("input: &x {{paths: [{field}], variable: tas, chunks: *x}}\n"),
                             "run.yaml:1: the alias *x stands for a value that holds it (a recursive alias)"),
    "yaml alias bomb": (_config_text(_BOMB), "run.yaml:5: YAML aliases expand to more than 10000 values here"),
    "huge effective sample size": (lambda t, m: ([_ok(t)], {"modes": {"effective_sample_size": 10**400}}),
                                   "modes.effective_sample_size: expected auto or a whole number from 2 to"),
    "nan max_missing": (lambda t, m: ([_ok(t)], {"prepare": {"max_missing": float("nan")}}),
                        "prepare.max_missing: expected a fraction from 0 up to (not including) 1; got nan"),
    "infinite level": (lambda t, m: ([_ok(t)], {"select": {"level": float("inf")}}),
                       "select.level: expected one coordinate value (a finite number or a name), or null; got inf"),
    "memory of 400 digits": (lambda t, m: ([_ok(t)], {"compute": {"memory": "9" * 400 + "GB"}}),
                             "compute.memory: expected a size from 50MB to 1PB"),
    "NUL byte in output.dir": (lambda t, m: ([_ok(t)], {"output": {"dir": str(t / "o\0ut")}}),
                               "output.dir: a path cannot hold a NUL character"),
    "NUL byte in an input path": (lambda t, m: ([t / "ok\0.nc"], {}), "input.paths: a path cannot hold a NUL"),
    "output.dir name over the limit": (lambda t, m: ([_ok(t)], {"output": {"dir": str(t / ("x" * 300))}}),
                                       "output.dir: the name 'xxxxxxxx"),
    "variable name over the NetCDF limit": (lambda t, m: ([_ok(t)], {"input": {"variable": "v" * 100_000}}),
                                            "input.variable: a NetCDF variable name holds at most 256 bytes"),
    # --- archive files: what real archives hold wrong, refused before any value of the field is read
    "time without units": (lambda t, m: ([archive_file(t / "f.nc", time_units=None)], {}),
                           "f.nc: time variable 'time' has no units, so its values are not dates"),
    "time units not CF": (lambda t, m: ([archive_file(t / "f.nc", time_units="days after 2000-01-01")], {}),
                          "f.nc: time variable 'time' has units 'days after 2000-01-01', not CF time units"),
    "time units that give no dates": (lambda t, m: ([archive_file(t / "f.nc", time_units="months since 2000-01")], {}),
                                      "f.nc: time variable 'time' has units 'months since 2000-01' with calendar "
                                      "'standard', which cannot be turned into dates"),
    "file without time steps": (lambda t, m: ([archive_file(t / "f.nc", steps=0)], {}),
                                "f.nc: no time steps (its time dimension is empty)"),
    "empty file among good ones": (lambda t, m: ([archive_file(t / "a.nc"), archive_file(t / "b.nc", steps=0)], {}),
                                   "b.nc: no time steps"),
    "calendars differ": (lambda t, m: ([archive_file(t / "a.nc"),
                                        archive_file(t / "b.nc", calendar="360_day", first_day=800)], {}),
                         "b.nc: its calendar '360_day' differs from the calendar 'standard' of"),
    "units differ between files": (lambda t, m: ([archive_file(t / "a.nc"),
                                                  archive_file(t / "b.nc", units="degC", first_day=800)], {}),
                                   "b.nc: tas is in 'degC', but in 'K' in"),
    "units missing in one file": (lambda t, m: ([archive_file(t / "a.nc"),
                                                 archive_file(t / "b.nc", units=None, first_day=800)], {}),
                                  "b.nc: tas has no units, but in 'K' in"),
    "latitudes without values": (lambda t, m: ([archive_file(t / "f.nc", lat=None)], {}),
                                 "f.nc: the latitude dimension lat of variable 'tas' has no coordinate values"),
    "longitudes without values": (lambda t, m: ([archive_file(t / "f.nc", lon=None)], {}),
                                  "f.nc: the longitude dimension lon of variable 'tas' has no coordinate values"),
    "latitudes beyond the poles": (lambda t, m: ([archive_file(t / "f.nc", lat=np.linspace(-120, 120, 5))], {}),
                                   "f.nc: latitude lat holds values from -120 to 120, outside -90..90"),
    "latitudes out of order": (lambda t, m: ([archive_file(t / "f.nc", lat=np.array([20.0, -40, 0, 40, -20]))], {}),
                               "f.nc: latitudes lat are out of order (-40 then 0 at row 2)"),
    "longitudes out of order": (lambda t, m: ([archive_file(t / "f.nc", lon=np.array([0.0, 10, 30, 20, 40, 50]))],
                                              {}), "f.nc: longitudes lon are out of order (30 then 20 at column 3)"),
    "level of a field without levels": (lambda t, m: ([archive_file(t / "f.nc")], {"select": {"level": 850}}),
                                        "select.level: 850 is given, but variable 'tas' in"),
    "member of a field without members": (lambda t, m: ([archive_file(t / "f.nc")], {"select": {"member": 2}}),
                                          "select.member: 2 is given, but variable 'tas' in"),
    "time dimension without dates": (_no_time_values, "f.nc: the time dimension time of variable 'tas' has no "
                                                      "coordinate values"),
    "a latitude missing": (lambda t, m: ([archive_file(t / "f.nc", lat=np.array([0.0, 10, np.nan, 20, 30]))], {}),
                           "f.nc: lat holds missing or infinite values"),
    "dates on both sides of 1582": (lambda t, m: ([archive_file(t / "a.nc", time_units="days since 1500-01-01"),
                                                   archive_file(t / "b.nc", first_day=800)], {}),
                                    "cannot share one time axis with those of"),
    "a level the file does not hold": (_one_level, "select.level: 850 is not the level of variable 'tas' in"),
    "one point with geotiff": (lambda t, m: ([archive_file(t / "f.nc", lat=[10.0], lon=[20.0])],
                                             {"modes": {"count": 1}, "output": {"formats": ["netcdf", "geotiff"]}}),
                               "output.formats: geotiff needs the grid spacing, which a grid of 1 latitude(s) x 1"),
    "one row with geotiff": (lambda t, m: ([archive_file(t / "f.nc", lat=[10.0])],
                                           {"modes": {"count": 2}, "output": {"formats": ["netcdf", "geotiff"]}}),
                             "grid of 1 latitude(s) x 6 longitude(s) does not give"),
    "one column with geotiff": (lambda t, m: ([archive_file(t / "f.nc", lon=[20.0])],
                                              {"modes": {"count": 2}, "output": {"formats": ["netcdf", "geotiff"]}}),
                                "grid of 5 latitude(s) x 1 longitude(s) does not give"),
    # the results folder: where results may be written, and what may be replaced
    "output.dir is the config's folder": (lambda t, m: ([_ok(t)], {"output": {"dir": ".", "overwrite": True}}),
                                          "holds the config file"),
    "output.dir is the input folder": (_input_folder, "holds the input file"),
    "output.dir not made by climodes": (_not_ours, "is not a climodes results folder (it has no .climodes-results"),
    "output.dir is a symbolic link": (_linked, "is a symbolic link"),
    "output.dir is the home folder": (_home, "is your home folder, which climodes never replaces"),
    "output.dir is the root": (lambda t, m: ([_ok(t)], {"output": {"dir": "/", "overwrite": True}}),
                               "is the root of the file system"),
    # preparation
    "baseline without a calendar day": (_daily_baseline_short, "prepare.baseline: ['2001-01-01', '2001-11-30'] has no "
                                                               "data for day 12-01"),
    # running on a cluster
    "slurm without sbatch": (lambda t, m: _no_batch_commands(t, m, "slurm"),
                             "compute.scheduler: slurm starts its workers with sbatch, which is not installed here"),
    "pbs without qsub": (lambda t, m: _no_batch_commands(t, m, "pbs"),
                         "compute.scheduler: pbs starts its workers with qsub, which is not installed here"),
    "scheduler address without batch workers": (
        lambda t, m: ([_ok(t)], {"compute": {"address": "tcp://127.0.0.1:8786"}}),
        "compute.address: joins a running dask scheduler with compute.scheduler slurm or pbs"),
    "no dask scheduler at the address": (
        lambda t, m: ([_ok(t)], {"compute": {"scheduler": "slurm", "address": "tcp://127.0.0.1:9", "worker_wait": 2}}),
        "compute.address: cannot reach a dask scheduler at tcp://127.0.0.1:9"),
    "walltime not HH:MM:SS": (lambda t, m: ([_ok(t)], {"compute": {"walltime": "2h"}}),
                              "compute.walltime: expected a time limit as HH:MM:SS"),
    # figures
    "unknown figure format": (lambda t, m: ([_ok(t)], {"output": {"figures": {"format": "gif"}}}),
                              "output.figures: format: expected one of png, svg, pdf; got 'gif'"),
    "figure resolution too low": (lambda t, m: ([_ok(t)], {"output": {"figures": {"dpi": 10}}}),
                                  "output.figures: dpi: expected a whole number from 50 to 1200"),
    "unknown figure kind": (lambda t, m: ([_ok(t)], {"output": {"figures": {"draw": ["maps", "globe"]}}}),
                            "output.figures: draw: expected a list drawn from maps, series"),
    "unknown figures key": (lambda t, m: ([_ok(t)], {"output": {"figures": {"resolution": 300}}}),
                            "output.figures: unknown key resolution; expected draw, format, dpi or local_modes"),
    # defending the modes: the red-noise test's settings
    "too few surrogates for the level": (lambda t, m: ([_ok(t)], {"modes": {"noise_surrogates": 5}}),
                                         "modes.noise_surrogates: 5 surrogates cannot test at noise_level 0.95; "
                                         "give at least 19"),
    "red-noise level not a fraction": (lambda t, m: ([_ok(t)], {"modes": {"noise_level": 95}}),
                                       "modes.noise_level: expected a fraction between 0 and 1"),
    # reuse: rotation (the project, reconstruct and table commands have their own table in test_reuse.py)
    "unknown rotation": (lambda t, m: ([_ok(t)], {"modes": {"rotate": "promax"}}),
                         "modes.rotate: expected one of none, varimax; got 'promax'"),
    "output inside a results folder": (_inside_results, "lies inside the climodes results folder"),
    "output into a projection's folder": (_a_projection, "holds the projection.nc of a projection, which a run never "
                                                         "replaces"),
    "rotation written as no": (lambda t, m: ([_ok(t)], {"modes": {"rotate": False}}),
                               "modes.rotate: expected one of none, varimax; got False (YAML reads bare yes/no, "
                               "on/off and true/false as booleans: write one of the words above)"),
}

# found only once the run works: the field's values read, a dask scheduler reached, the results written;
# `climodes check` reads no values and starts no workers, so it cannot see them
FOUND_WHEN_RUNNING = {"constant field", "nan everywhere", "an infinity (exact)", "an infinity (gram)",
                      "an infinity (randomized)", "disk full", "no dask scheduler at the address"}


def _no_batch_commands(tmp_path, monkeypatch, scheduler):
    monkeypatch.setenv("PATH", str(tmp_path / "no-commands-here"))
    return [_ok(tmp_path)], {"compute": {"scheduler": scheduler}}


@pytest.mark.parametrize("case", list(CATALOGUE))
def test_bad_input_gives_one_line_and_exit_2(tmp_path, cli, monkeypatch, case):
    make, expected = CATALOGUE[case]
    made = make(tmp_path, monkeypatch)
    config = made if isinstance(made, Path) else write_config(tmp_path, made[0], **made[1])
    code, out, err = cli("run", config)
    assert code == 2
    assert len(err.strip().splitlines()) == 1, err
    assert expected in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]


@pytest.mark.parametrize("case", [c for c in CATALOGUE if c not in FOUND_WHEN_RUNNING])
def test_check_refuses_what_run_refuses(tmp_path, cli, monkeypatch, case):
    """`climodes check` opens the files (metadata only) and looks at the output folder as `run` does."""
    make, expected = CATALOGUE[case]
    made = make(tmp_path, monkeypatch)
    config = made if isinstance(made, Path) else write_config(tmp_path, made[0], **made[1])
    code, out, err = cli("check", config)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1, err
    assert expected in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


def test_config_problems_are_found_before_the_data_libraries_load(tmp_path):
    """A config problem is reported without importing xarray or dask: well under a second."""
    config = write_config(tmp_path, [tmp_path / "a.nc"], modes={"count": 0})
    script = ("import sys; from climodes.cli import main; code = main(['check', sys.argv[1]]); "
              "print(code, [m for m in ('xarray', 'dask', 'numpy', 'netCDF4') if m in sys.modules])")
    done = subprocess.run([sys.executable, "-c", script, str(config)], capture_output=True, text=True, timeout=60)
    assert done.stdout.split() == ["2", "[]"] and "modes.count" in done.stderr


def test_library_warnings_become_notes(tmp_path, cli):
    """A file whose variable carries two different fill values (CF: _FillValue and missing_value): xarray warns,
    and the warning reaches the user as a note, never as a raw Python warning; --quiet prints nothing."""
    import netCDF4

    path = tmp_path / "twofills.nc"
    values = red_field((24, 5, 6))
    field_dataset(values, np.linspace(-40, 40, 5), np.arange(0, 60.0, 10)).to_netcdf(
        path, encoding={"tas": {"_FillValue": -999.0}})
    with netCDF4.Dataset(path, "a") as nc:
        nc["tas"].missing_value = -888.0
    config = write_config(tmp_path, [path], modes={"count": 2})
    code, _, err = cli("run", config)
    assert code == 0, err
    assert "note: variable 'tas' has multiple fill values" in err
    assert "Warning" not in err and ".py:" not in err
    assert "multiple fill values" in (tmp_path / "out" / "run.log").read_text()
    code, out, err = cli("run", "--quiet", "--overwrite", config)
    assert (code, out, err) == (0, "", "")


def test_a_library_warning_is_one_note_however_often_it_comes(tmp_path, cli):
    """Dates past 2262 are decoded as cftime dates, and xarray says so when the input is read and again when
    the results are read back for the report: one note (common practice: say a thing once)."""
    config = write_config(tmp_path, [archive_file(tmp_path / "f.nc", time_units="days since 9990-01-01", steps=48)],
                          modes={"count": 2})
    code, _, err = cli("run", config)
    assert code == 0, err
    notes = [line for line in err.splitlines() if "cftime" in line]
    assert len(notes) == 1, err
    assert (tmp_path / "out" / "run.log").read_text().count(notes[0]) == 1


def test_existing_output_dir_needs_overwrite(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    assert cli("run", config)[0] == 0
    code, _, err = cli("run", config)
    assert code == 2 and "output.dir:" in err and "overwrite: true" in err and len(err.strip().splitlines()) == 1
    config = write_config(tmp_path, [small_field], modes={"count": 2}, output={"overwrite": True})
    code, _, err = cli("run", config)
    assert code == 0, err
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [".climodes-results.json", "modes.nc", "report.html", "run.log"]


def test_a_folder_climodes_did_not_make_is_never_replaced(tmp_path, small_field, cli):
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "keep.txt").write_text("mine")
    for overwrite in (False, True):
        code, _, err = cli("run", write_config(tmp_path, [small_field], output={"overwrite": overwrite}))
        assert code == 2 and "is not a climodes results folder" in err and len(err.strip().splitlines()) == 1
        assert [p.name for p in (tmp_path / "out").iterdir()] == ["keep.txt"]
        assert (tmp_path / "out" / "keep.txt").read_text() == "mine"


def test_input_files_are_left_unchanged(tmp_path, small_field, cli):
    before = small_field.read_bytes(), small_field.stat().st_mtime
    assert cli("run", write_config(tmp_path, [small_field], modes={"count": 2}))[0] == 0
    assert (small_field.read_bytes(), small_field.stat().st_mtime) == before


def test_a_file_named_with_glob_characters_is_that_file(tmp_path, cli):
    """A file called tas[1].nc is read as itself (glob would take [1] for a set of characters and match
    nothing), and a folder that holds it is protected as any input's folder is."""
    (tmp_path / "data").mkdir()
    path = archive_file(tmp_path / "data" / "tas[1].nc")
    code, _, err = cli("run", write_config(tmp_path, [path], modes={"count": 2}))
    assert code == 0, err
    config = write_config(tmp_path, [path], output={"dir": str(tmp_path / "data"), "overwrite": True})
    code, _, err = cli("run", config)
    assert code == 2 and "holds the input file" in err and path.exists()


def test_show_summarises_a_results_folder(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 3})
    assert cli("run", config)[0] == 0
    code, out, err = cli("show", tmp_path / "out")
    assert code == 0, err
    lines = out.splitlines()
    assert len(lines) <= 24  # one screen
    assert "lat -85 to 85 (18 rows), lon 5 to 355 (36 columns)" in out
    assert "648 of 648 grid points used" in out
    assert "60 steps" in out and "exact: LAPACK" in out
    assert f"rerun       climodes run {config}" in out
    assert sum(1 for line in lines if line.strip()[:1].isdigit() and "%" in line) == 3
    assert cli("show", tmp_path / "out" / "modes.nc")[1] == out.replace(str(tmp_path / "out"),
                                                                       str(tmp_path / "out" / "modes.nc"), 1)


def _foreign_results(tmp_path):
    """A file from another program that happens to hold eof and pc variables."""
    ds = xr.Dataset({"eof": (("mode", "lat", "lon"), np.ones((2, 3, 4))), "pc": (("mode", "time"), np.ones((2, 5))),
                     "eigenvalue": ("mode", [2.0, 1.0]), "variance_explained": ("mode", [0.5, 0.2]),
                     "variance_explained_error": ("mode", [0.1, 0.1])}, attrs={"source": "a model post-processor"})
    ds.to_netcdf(tmp_path / "foreign.nc")
    ds.assign(eof=(("mode", "x"), np.ones((2, 12)))).assign_attrs(source="climodes 0.1.0").to_netcdf(tmp_path / "flat.nc")


@pytest.mark.parametrize("target, expected", [
    ("missing", "no such results file"),
    ("field.nc", "not a climodes results file"),
    ("text.nc", "text.nc: cannot be read as NetCDF (not a NetCDF file); give a results folder written by climodes "
                "run or its modes.nc"),
    ("empty.nc", "empty.nc: the file is empty"),
    ("projected", "projected: holds a projection (projection.nc), not the modes of a run; give the results folder "
                  "of the run it was projected onto"),
    ("foreign.nc", "not a climodes results file (made by 'a model post-processor')"),
    ("flat.nc", "flat.nc: eof has dimensions ('mode', 'x')"),
])
def test_show_refuses_what_is_not_results(tmp_path, small_field, cli, target, expected):
    (tmp_path / "text.nc").write_text("not netcdf")
    (tmp_path / "empty.nc").write_bytes(b"")
    (tmp_path / "projected").mkdir()
    (tmp_path / "projected" / "projection.nc").write_bytes(b"")
    _foreign_results(tmp_path)
    code, out, err = cli("show", tmp_path / target)
    assert code == 2 and expected in err and len(err.strip().splitlines()) == 1 and out == ""


EDITED_RESULTS = {  # a modes.nc changed by hand after the run: what was changed, and what the one line says
    "mode numbers replaced": (lambda ds: ds.assign_coords(mode=["a", "b", "c"]), "its mode numbers are a, b, c"),
    "mode numbers lost": (lambda ds: ds.drop_vars("mode"), "its mode numbers are 0, 1, 2, not 1 to 3"),
    "time axis removed": (lambda ds: ds.drop_vars("time"), "the time axis time of pc holds no dates"),
    "eigenvalues missing": (lambda ds: ds.assign(eigenvalue=ds["eigenvalue"] * np.nan),
                            "eigenvalue holds missing or infinite values"),
    "eigenvalues negative": (lambda ds: ds.assign(eigenvalue=-ds["eigenvalue"]),
                             "eigenvalue holds values that are not positive"),
    "a PC missing": (lambda ds: ds.assign(pc=ds["pc"].where(ds["mode"] != 2)), "pc holds missing or infinite"),
    "a map emptied": (lambda ds: ds.assign(eof=ds["eof"].where(ds["mode"] != 3)), "the eof map of mode 3 holds no"),
}


@pytest.mark.parametrize("case", list(EDITED_RESULTS))
@pytest.mark.parametrize("command", ["show", "table", "reconstruct", "figures"])
def test_results_changed_by_hand_are_refused(tmp_path, small_field, cli, case, command):
    """Every command that reads a results file refuses one whose values cannot be what climodes wrote
    (before, some crashed with a traceback and others used NaN eigenvalues in silence)."""
    assert cli("run", write_config(tmp_path, [small_field], modes={"count": 3}))[0] == 0
    change, expected = EDITED_RESULTS[case]
    edited = change(xr.load_dataset(tmp_path / "out" / "modes.nc"))
    (tmp_path / "out" / "modes.nc").unlink()
    edited.to_netcdf(tmp_path / "out" / "modes.nc")
    extra = {"show": [], "table": ["-o", tmp_path / "t.csv"], "figures": [],
             "reconstruct": ["--modes", "1", "-o", tmp_path / "r.nc"]}[command]
    code, out, err = cli(command, tmp_path / "out", *extra)
    assert code == 2 and out == "", err
    assert len(err.strip().splitlines()) == 1 and expected in err and "changed after climodes wrote it" in err
    assert not (tmp_path / "t.csv").exists() and not (tmp_path / "r.nc").exists()


def test_overwrite_flag(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    assert cli("run", config)[0] == 0
    assert cli("run", config)[0] == 2
    assert cli("run", "--overwrite", config)[0] == 0


def test_more_modes_than_grid_points_is_refused_by_check_too(tmp_path, cli):
    path = tmp_path / "tiny.nc"
    field_dataset(red_field((40, 2, 4)), np.array([-10.0, 10.0]), np.arange(0, 40.0, 10)).to_netcdf(path)
    config = write_config(tmp_path, [path], modes={"count": 20})
    for command in ("check", "run"):
        code, _, err = cli(command, config)
        assert code == 2 and "modes.count: 20 modes asked for, but the selected grid has only 8 points" in err


def test_check_and_submit_take_overwrite_as_run_does(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    assert cli("run", config)[0] == 0
    code, _, err = cli("check", config)
    assert code == 2 and "(or --overwrite)" in err
    code, out, err = cli("check", "--overwrite", config)
    assert code == 0, err
    assert "overwrite: true" in out  # the run it describes replaces the folder
    code, out, err = cli("submit", "--dry-run", "--system", "slurm", "--overwrite", config)
    assert code == 0, err
    assert "--overwrite" in out


def test_without_a_command_the_help_is_shown(capsys):
    assert main([]) == 2
    err = capsys.readouterr().err
    assert err.startswith("usage: climodes") and "template" in err and len(err.splitlines()) <= 25


def test_the_template_is_a_valid_config_once_its_two_keys_are_filled(tmp_path, small_field, cli):
    code, out, _ = cli("template")
    assert code == 0
    text = out.replace("paths: REQUIRED", f"paths: [{small_field}]").replace("variable: REQUIRED", "variable: tas")
    (tmp_path / "mine.yaml").write_text(text)
    minimal = write_config(tmp_path, [small_field], output={"figures": True, "dir": "results"})
    from climodes.config import load_spec

    assert load_spec(tmp_path / "mine.yaml").to_yaml() == load_spec(minimal).to_yaml()  # every default, as it is
    assert all("#" in line for line in out.splitlines() if line.startswith("  "))  # every key says what it means
    (tmp_path / "unfilled.yaml").write_text(out)  # checked before it is filled in: both keys named, one line each
    code, _, err = cli("check", tmp_path / "unfilled.yaml")
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 2 and all("still REQUIRED, as `climodes template` left it; fill it in" in line
                                                  for line in lines), err
    assert "input.paths:" in lines[0] and "input.variable:" in lines[1] and "no such file" not in err


def test_a_reader_that_goes_away_is_no_error(monkeypatch, capsys):
    """`climodes show results | head` closes the pipe early: no traceback, no "internal error"."""
    class ClosedPipe:
        def write(self, text):
            raise BrokenPipeError(32, "Broken pipe")

        def flush(self):
            pass

    monkeypatch.setattr(sys, "stdout", ClosedPipe())
    assert main(["template"]) == 0
    assert capsys.readouterr().err == ""


def test_check_names_an_input_problem_before_the_existing_results(small_field, tmp_path, cli):
    """The loop of editing a config and running check: once results exist (overwrite off), a wrong variable
    name is still what check reports, not only the results folder it would not replace (common practice)."""
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    assert cli("run", config)[0] == 0
    assert "exists already" in cli("check", config)[2]
    wrong = write_config(tmp_path, [small_field], modes={"count": 2}, input={"variable": "tsa"})
    code, _, err = cli("check", wrong)
    assert code == 2 and "tsa" in err and "exists already" not in err and len(err.strip().splitlines()) == 1
