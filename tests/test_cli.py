"""The command line: check, run, and one clear line with exit code 2 for each bad input."""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
import yaml

from conftest import field_dataset, red_field, write_config


def test_check_prints_the_resolved_config(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 3})
    code, out, err = cli("check", config)
    assert code == 0 and err == ""
    resolved = yaml.safe_load(out)
    assert resolved["modes"] == {"count": 3, "effective_sample_size": "auto", "method": "auto", "seed": 0,
                                 "noise_surrogates": 0, "noise_level": 0.95}
    assert resolved["compute"] == {"memory": "4GB", "workers": "auto", "scheduler": "threads"}
    assert resolved["prepare"]["weighting"] == "coslat"


def test_run_writes_results_and_prints_a_table(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 3})
    code, out, err = cli("run", config)
    assert code == 0, err
    assert out.splitlines()[0].startswith("climodes: 3 modes of tas from 1 file(s), 60 time steps x 648 points")
    assert out.splitlines()[1].split() == ["mode", "variance", "explained", "effective", "N", "separated", "(North)"]
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["modes.nc", "run.log"]
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no staging folder left


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
    "negative mode count": (lambda t, m: ([_ok(t)], {"modes": {"count": -3}}), "modes.count: expected a whole number of 1"),
    "wrong type in config": (lambda t, m: ([_ok(t)], {"select": {"lat": "north"}}), "select.lat: expected [SOUTH, NORTH]"),
    "output inside a file": (_inside_a_file, "which is a file; choose another folder"),
    "bad yaml syntax": (_bad_yaml, "run.yaml:3: not valid YAML"),
    "disk full": (_disk_full, "output.dir: cannot write the results to"),
    # defending the modes: the red-noise test's settings
    "too few surrogates for the level": (lambda t, m: ([_ok(t)], {"modes": {"noise_surrogates": 5}}),
                                         "modes.noise_surrogates: 5 surrogates cannot test at noise_level 0.95; "
                                         "give at least 19"),
    "red-noise level not a fraction": (lambda t, m: ([_ok(t)], {"modes": {"noise_level": 95}}),
                                       "modes.noise_level: expected a fraction between 0 and 1"),
}


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


def test_existing_output_dir_needs_overwrite(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "keep.txt").write_text("mine")
    code, _, err = cli("run", config)
    assert code == 2 and "output.dir:" in err and "overwrite: true" in err and len(err.strip().splitlines()) == 1
    assert (tmp_path / "out" / "keep.txt").read_text() == "mine"
    config = write_config(tmp_path, [small_field], modes={"count": 2}, output={"overwrite": True})
    code, _, err = cli("run", config)
    assert code == 0, err
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["modes.nc", "run.log"]


def test_input_files_are_left_unchanged(tmp_path, small_field, cli):
    before = small_field.read_bytes(), small_field.stat().st_mtime
    assert cli("run", write_config(tmp_path, [small_field], modes={"count": 2}))[0] == 0
    assert (small_field.read_bytes(), small_field.stat().st_mtime) == before


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
    ("text.nc", "cannot be read as NetCDF"),
    ("empty.nc", "empty.nc: the file is empty"),
    ("foreign.nc", "not a climodes results file (made by 'a model post-processor')"),
    ("flat.nc", "flat.nc: eof has dimensions ('mode', 'x')"),
])
def test_show_refuses_what_is_not_results(tmp_path, small_field, cli, target, expected):
    (tmp_path / "text.nc").write_text("not netcdf")
    (tmp_path / "empty.nc").write_bytes(b"")
    _foreign_results(tmp_path)
    code, out, err = cli("show", tmp_path / target)
    assert code == 2 and expected in err and len(err.strip().splitlines()) == 1 and out == ""


def test_overwrite_flag(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    assert cli("run", config)[0] == 0
    assert cli("run", config)[0] == 2
    assert cli("run", "--overwrite", config)[0] == 0
