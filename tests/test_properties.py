"""Property-based (hypothesis): no mutation of a valid config or input file makes climodes crash, and
no output.dir makes it remove or change a file it did not write.

Whatever the change, the run either works (exit 0) or says what is wrong in one line (exit 2); exit 1
(an internal error, with a traceback) means a bug.
"""

import contextlib
import hashlib
import io
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np
import xarray as xr
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from climodes.cli import main
from climodes.output import MARK, read_mark
from conftest import field_dataset, red_field

pytestmark = __import__("pytest").mark.slow

VALID = {
    "input": {"paths": ["field.nc"], "variable": "tas", "chunks": {"time": 12}},
    "select": {"lat": [-60, 60], "lon": [-90, 90], "period": [1980, 1983], "months": None},
    "prepare": {"aggregate": "none", "anomalies": "climatology", "baseline": None, "detrend": "linear",
                "standardize": False, "weighting": "coslat", "max_missing": 0.1},
    "modes": {"count": 3, "method": "auto", "seed": 0},
    "compute": {"memory": "1GB", "workers": 1, "scheduler": "threads"},
    "output": {"dir": "out", "figures": False, "overwrite": True},
}

ODD_VALUES = st.one_of(
    st.none(), st.booleans(), st.integers(-5, 400), st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=8), st.sampled_from(["none", "seasonal", "annual", "gram", "randomized", "exact", "1e9GB",
                                           "auto", "processes", "cell_area", "mean", "2GB", "*.nc", "tas"]),
    st.lists(st.one_of(st.integers(-400, 400), st.floats(-400, 400), st.text(max_size=4)), max_size=4),
    st.dictionaries(st.text(max_size=5), st.integers(-3, 200), max_size=2),
)


_SCRATCH = tempfile.TemporaryDirectory(prefix="climodes-properties-")  # removed at exit with what it holds


def _run(folder: Path, config: dict) -> tuple[int, str]:
    path = folder / "run.yaml"
    path.write_text(yaml.safe_dump(config))
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main(["run", str(path)])
    return code, err.getvalue()


def _folder_with_field(calendar: str = "standard") -> Path:
    """A folder with a small field in it, removed when the test session ends (hypothesis runs each example
    many times in one test, so pytest's tmp_path does not serve)."""
    folder = Path(tempfile.mkdtemp(dir=_SCRATCH.name))
    lat, lon = np.linspace(-70, 70, 8), np.arange(0, 360, 30.0)
    values = red_field((48, lat.size, lon.size), 2)
    values[:, 1, 2] = np.nan
    time = None if calendar == "standard" else xr.date_range("1980-01-16", periods=48, freq="MS", calendar=calendar,
                                                             use_cftime=True)
    field_dataset(values, lat, lon, time=time).to_netcdf(folder / "field.nc")
    return folder


def test_the_valid_config_runs():
    assert _run(_folder_with_field(), VALID)[0] == 0


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(section=st.sampled_from(sorted(VALID)), data=st.data(), value=ODD_VALUES, action=st.sampled_from(
    ["set", "delete", "add"]))
def test_config_mutations_never_crash(section, data, value, action):
    config = {k: dict(v) for k, v in VALID.items()}
    key = data.draw(st.sampled_from(sorted(config[section])))
    if action == "set":
        config[section][key] = value
    elif action == "delete":
        del config[section][key]
    else:
        config[section][f"{key}x"] = value
    code, err = _run(_folder_with_field(), config)
    assert code in (0, 2), err
    assert "Traceback" not in err
    if code == 2:
        assert err.strip(), "an error must say what is wrong"


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cut=st.floats(0, 1), flips=st.lists(st.tuples(st.floats(0, 1), st.integers(0, 255)), max_size=20),
       how=st.sampled_from(["truncate", "flip", "both"]))
def test_file_mutations_never_crash(cut, flips, how):
    folder = _folder_with_field()
    path = folder / "field.nc"
    data = bytearray(path.read_bytes())
    if how in ("flip", "both"):
        for where, byte in flips:
            data[int(where * (len(data) - 1))] = byte
    if how in ("truncate", "both"):
        data = data[: int(cut * len(data))]
    path.write_bytes(bytes(data))
    code, err = _run(folder, VALID)
    assert code in (0, 2), err
    assert "Traceback" not in err


_DATES = st.one_of(
    st.integers(-2, 10_001),
    st.tuples(st.integers(0, 10_000), st.integers(0, 13), st.integers(0, 32), st.integers(1, 3)).map(
        lambda d: "-".join([f"{d[0]:04d}", f"{d[1]:02d}", f"{d[2]:02d}"][:d[3]])),
    st.sampled_from(["1980-02-29", "1981-02-29", "1981-02-30", "1981-01-31", "1982-12-31", "1983"]),
)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(calendar=st.sampled_from(["standard", "noleap", "360_day", "all_leap"]), key=st.sampled_from(
    [("select", "period"), ("prepare", "baseline")]), dates=st.lists(_DATES, min_size=2, max_size=2))
def test_period_mutations_never_crash(calendar, key, dates):
    # Dates near the field's years (1980-1983) and at the edges of every calendar: month 0 and 13, day 0 and 32,
    # February 29 and 30, year 0 and 10000
    config = {k: dict(v) for k, v in VALID.items()}
    config[key[0]][key[1]] = dates
    code, err = _run(_folder_with_field(calendar), config)
    assert code in (0, 2), err
    assert "Traceback" not in err
    if code == 2:
        assert len(err.strip().splitlines()) == 1, err


# --- whatever output.dir says, with overwrite on, no file climodes did not write is removed or changed

OUTPUT_DIRS = [".", "./", "..", "~", "~/..", "~/project", "/", "{root}", "data", "data/", "{root}/home/project/data",
               "new/../data", "{root}/elsewhere", "link", "link/new", "datalink", "papers", "papers/new/deeper", "previous",
               "previous/sub", "new", "a/b/c", "data/field.nc", "data/field.nc/x", "thesis.tex"]


def _template() -> Path:
    """A user's home: a project with its data, a thesis, a folder of papers, links, an earlier results
    folder; and a folder elsewhere.  Built once; each example works on a copy."""
    if not hasattr(_template, "root"):
        root = Path(tempfile.mkdtemp(dir=_SCRATCH.name))
        project = root / "home" / "project"
        (project / "data").mkdir(parents=True)
        (project / "papers").mkdir()
        (root / "elsewhere").mkdir()
        lat, lon = np.linspace(-60, 60, 5), np.arange(0, 360, 60.0)
        field_dataset(red_field((30, lat.size, lon.size), 1), lat, lon).to_netcdf(project / "data" / "field.nc")
        (project / "thesis.tex").write_text("chapter 1")
        (project / "papers" / "thesis.pdf").write_bytes(b"%PDF years of work")
        (root / "home" / "notes.txt").write_text("do not lose")
        (root / "elsewhere" / "keep.txt").write_text("kept")
        (project / "link").symlink_to(root / "elsewhere")
        (project / "datalink").symlink_to(project / "data")
        _template.root = root
        assert _run_in(root, _configure(root, "previous"))[0] == 0
    return _template.root


def _configure(root: Path, output_dir: str) -> Path:
    """The project's config, writing to ``output_dir`` with overwrite on."""
    config = root / "home" / "project" / "run.yaml"
    config.write_text(yaml.safe_dump({
        "input": {"paths": ["data/field.nc"], "variable": "tas"}, "modes": {"count": 2},
        "output": {"dir": output_dir.format(root=root), "figures": False, "overwrite": True}}))
    return config


def _run_in(root: Path, config: Path) -> tuple[int, str]:
    """Run ``config`` from the project folder of ``root`` with HOME set to its home; return (code, stderr)."""
    project = root / "home" / "project"
    home, cwd = os.environ.get("HOME"), os.getcwd()
    os.environ["HOME"] = str(root / "home")
    os.chdir(project)
    try:
        err = io.StringIO()
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            code = main(["run", str(config)])
    finally:
        os.chdir(cwd)
        if home is None:
            del os.environ["HOME"]
        else:
            os.environ["HOME"] = home
    return code, err.getvalue()


def _users_files(root: Path) -> dict[str, tuple]:
    """Every file under ``root`` that no climodes manifest lists, with its digest and modification time."""
    found = {}
    for folder, _, files in os.walk(root):
        mark = read_mark(Path(folder))
        ours = set(mark["files"]) | {MARK} if mark else set()
        for name in set(files) - ours:
            path = Path(folder) / name
            if not path.is_symlink():
                found[str(path.relative_to(root))] = (hashlib.sha256(path.read_bytes()).hexdigest(),
                                                      path.stat().st_mtime_ns)
            else:
                found[str(path.relative_to(root))] = ("link", os.readlink(path))
    return found


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(output_dir=st.sampled_from(OUTPUT_DIRS), extra=st.sampled_from([None, "previous", "papers", "data"]))
def test_no_users_file_is_ever_removed_or_changed(output_dir, extra):
    """Random output.dir values (the current, parent, home and input folders, links, a folder of papers,
    nested new folders, an earlier results folder, a file), overwrite on, sometimes with a file of the
    user's added to a folder first: every file no climodes manifest lists is still there, unchanged."""
    root = Path(tempfile.mkdtemp(dir=_SCRATCH.name)) / "site"
    shutil.copytree(_template(), root, symlinks=True)
    if extra:
        (root / "home" / "project" / extra / "mine.txt").write_text("added by the user")
    config = _configure(root, output_dir)
    before = _users_files(root)
    code, err = _run_in(root, config)
    assert code in (0, 2), err
    assert len(err.strip().splitlines()) <= 1 or code == 0, err
    after = _users_files(root)
    assert {k: v for k, v in after.items() if k in before} == before
    assert not [name for name in after if ".climodes-" in name]  # no claim, staging folder or temporary left
    shutil.rmtree(root.parent)
