"""The Python interface: the same results as the command line, the same messages, nothing written unasked."""

from __future__ import annotations

import ast
import json
import os
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

import climodes
from climodes.cli import main
from climodes.demo import write_demo_fields
from conftest import field_dataset, red_field, write_config

REPO = Path(__file__).resolve().parents[1]
# attributes that say when a file was made and how long it took: the only ones allowed to differ
WHEN = {"history", "date_created", "climodes_elapsed_seconds"}


def _listing(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo fields and configs (figures off: they are not part of modes.nc), run once by the command
    line (into results/cli) and once from Python with ``write=True`` (into the config's results/demo)."""
    root = tmp_path_factory.mktemp("api")
    write_demo_fields(root / "demo_fields")
    (root / "configs").mkdir()
    config = root / "configs" / "demo.yaml"
    body = yaml.safe_load((REPO / "configs" / "demo.yaml").read_text())
    body["output"]["figures"] = False
    config.write_text(yaml.safe_dump(body, sort_keys=False))
    shutil.copy(REPO / "configs" / "demo_later.yaml", root / "configs" / "demo_later.yaml")
    assert main(["run", "--quiet", str(config)]) == 0
    os.rename(root / "results" / "demo", root / "results" / "cli")
    returned = climodes.run(config, write=True)
    return root, config, body, returned


def _raw(path: Path) -> xr.Dataset:
    """A NetCDF file's variables as stored: no decoding, no masking, no scaling."""
    return xr.open_dataset(path, decode_cf=False, mask_and_scale=False, decode_times=False)


@pytest.mark.slow
def test_python_and_command_line_write_the_same_results_file(demo):
    """Every variable's stored bytes and every attribute but the dates are the same (project's contract:
    one engine behind both paths)."""
    root, _, _, _ = demo
    with _raw(root / "results" / "cli" / "modes.nc") as a, _raw(root / "results" / "demo" / "modes.nc") as b:
        assert sorted(a.variables) == sorted(b.variables)
        for name in a.variables:
            assert a[name].dtype == b[name].dtype and a[name].dims == b[name].dims, name
            assert a[name].values.tobytes() == b[name].values.tobytes(), name
            assert a[name].attrs.keys() == b[name].attrs.keys(), name
            for key in a[name].attrs:
                np.testing.assert_array_equal(a[name].attrs[key], b[name].attrs[key], err_msg=f"{name}.{key}")
        assert {k: v for k, v in a.attrs.items() if k not in WHEN} == {k: v for k, v in b.attrs.items() if k not in WHEN}
    assert _listing(root / "results" / "cli") == _listing(root / "results" / "demo")


@pytest.mark.slow
def test_the_returned_dataset_is_what_the_file_holds(demo):
    root, _, _, returned = demo
    with climodes.open_results(root / "results" / "demo") as written:
        assert set(returned.data_vars) == set(written.data_vars)
        for name in written.data_vars:
            np.testing.assert_array_equal(returned[name].values, written[name].values, err_msg=name)


@pytest.mark.slow
def test_a_dataarray_in_memory_gives_the_config_run(demo):
    """The demo's files opened by xarray and handed over as one numpy-backed DataArray, with the config's
    sections as keywords: every variable to 1e-10 of the config's run (the same arithmetic in another order
    of chunks at most)."""
    root, _, body, returned = demo
    field = xr.concat([xr.open_dataset(p)["sst"].load() for p in sorted((root / "demo_fields").glob("sst_*.nc"))],
                      dim="time")
    before = _listing(root)
    found = climodes.analyse(field, input={"chunks": body["input"]["chunks"]}, select=body["select"],
                             prepare=body["prepare"], modes=body["modes"])
    assert _listing(root) == before
    assert set(found.data_vars) == set(returned.data_vars)
    for name in returned.data_vars:
        a, b = found[name].values, returned[name].values
        if a.dtype.kind in "fi":
            np.testing.assert_allclose(a, b, rtol=0, atol=1e-10, err_msg=name)
        else:
            np.testing.assert_array_equal(a, b, err_msg=name)


@pytest.mark.slow
def test_project_reconstruct_and_table_match_the_command_line(demo, tmp_path):
    root, _, _, _ = demo
    results, later = root / "results" / "cli", root / "configs" / "demo_later.yaml"
    assert main(["project", "--quiet", str(results), str(later)]) == 0
    assert main(["reconstruct", str(results), "--modes", "1-2", "-o", str(tmp_path / "rebuilt.nc")]) == 0
    assert main(["table", str(results), "-o", str(tmp_path / "table.parquet")]) == 0

    projected = climodes.project(results, later)
    with xr.open_dataset(root / "results" / "demo_later" / "projection.nc") as written:
        assert set(projected.data_vars) == set(written.data_vars)
        for name in written.data_vars:
            np.testing.assert_array_equal(projected[name].values, written[name].values, err_msg=name)
    rebuilt = climodes.reconstruct(results, [1, 2])
    assert rebuilt.chunks is not None  # lazy until asked
    with xr.open_dataset(tmp_path / "rebuilt.nc") as written:
        np.testing.assert_array_equal(rebuilt.values, written["sst"].values)
        assert rebuilt.attrs == written["sst"].attrs
    pd.testing.assert_frame_equal(climodes.coefficient_table(results), pd.read_parquet(tmp_path / "table.parquet"))


# --- bad input: one exception type, the command line's messages


def test_a_bad_config_file_raises_the_lines_check_prints(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 0, "methd": "exact"}, prepare={"detrend": "cubic"})
    code, _, err = cli("check", config)
    assert code == 2
    with pytest.raises(climodes.UserError) as caught:
        climodes.load_config(config)
    assert caught.value.problems == err.splitlines()
    assert all(re.match(rf"{re.escape(str(config))}:\d+: ", line) for line in caught.value.problems)


def test_a_mapping_gets_the_same_messages_without_line_numbers(tmp_path, small_field):
    body = yaml.safe_load(write_config(tmp_path, [small_field], modes={"count": 0, "methd": "exact"},
                                       prepare={"detrend": "cubic"}).read_text())
    with pytest.raises(climodes.UserError) as from_file:
        climodes.load_config(tmp_path / "run.yaml")
    with pytest.raises(climodes.UserError) as from_mapping:
        climodes.load_config(body)
    assert sorted(re.sub(r"^.*?:\d+: ", "", line) for line in from_file.value.problems) == \
        sorted(line.removeprefix("config: ") for line in from_mapping.value.problems)
    assert all(line.startswith("config: ") for line in from_mapping.value.problems)


def test_a_missing_variable_raises_the_command_lines_message(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], variable="sst")
    code, _, err = cli("run", "--quiet", config)
    assert code == 2
    with pytest.raises(climodes.UserError) as caught:
        climodes.run(config)
    assert f"climodes: error: {caught.value}" == err.strip()
    assert "no variable 'sst'" in str(caught.value)


def test_bad_modes_raise_the_command_lines_message(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    assert main(["run", "--quiet", str(config)]) == 0
    code, _, err = cli("reconstruct", tmp_path / "out", "--modes", "2-1", "-o", tmp_path / "r.nc")
    assert code == 2
    with pytest.raises(climodes.UserError) as caught:
        climodes.reconstruct(tmp_path / "out", "2-1")
    assert f"climodes: error: {caught.value}" == err.strip()
    with pytest.raises(climodes.UserError, match="the results hold modes 1 to 2"):
        climodes.reconstruct(tmp_path / "out", [3])
    for wrong in (1.5, [], [1, "2"], True):
        with pytest.raises(climodes.UserError, match="give mode numbers"):
            climodes.reconstruct(tmp_path / "out", wrong)


def _field(**changes) -> xr.DataArray:
    lat, lon = np.linspace(-40, 40, 5), np.arange(0.0, 360, 60)
    return field_dataset(red_field((36, lat.size, lon.size)), lat, lon)["tas"]


@pytest.mark.parametrize("bad, message", [
    (lambda f: f.rename(time="step").drop_vars("step"), "none is a time axis"),
    (lambda f: f.isel(time=0), "none is a time axis"),
    (lambda f: f.mean("lat"), "none is the latitude axis"),
    (lambda f: f.astype(str), "holds text values, not numbers"),
    (lambda f: f.assign_coords(time=("time", np.arange(f.sizes["time"], dtype=float), {"axis": "T"})),
     "has no units, so its values are not dates"),
    (lambda f: f.isel(time=slice(None, None, -1)), "goes back in time"),
    (lambda f: f.to_dataset(), "expected an xarray.DataArray"),
    (lambda f: f.values, "expected an xarray.DataArray"),
])
def test_a_field_climodes_cannot_analyse_raises_one_clear_error(bad, message):
    with pytest.raises(climodes.UserError, match=message) as caught:
        climodes.analyse(bad(_field()), modes={"count": 2})
    assert "\n" not in str(caught.value)


def test_bad_sections_of_analyse_are_config_problems():
    with pytest.raises(climodes.UserError) as caught:
        climodes.analyse(_field(), modes={"count": "many"}, prepare={"anomaly": "climatology"},
                         input={"variable": "x"})
    assert caught.value.problems == ["config: input.variable: not used with a DataArray, whose name and values are "
                                     "the input; leave it out"]
    with pytest.raises(climodes.UserError) as caught:
        climodes.analyse(_field(), modes={"count": "many"}, prepare={"anomaly": "climatology"})
    assert caught.value.problems == ["config: prepare.anomaly: unknown key; did you mean anomalies?",
                                     "config: modes.count: expected a whole number from 1 to 100000; got 'many'"]


def test_a_projection_refuses_sections_it_would_not_use():
    results = climodes.analyse(_field(), modes={"count": 2})
    with pytest.raises(climodes.UserError) as caught:
        climodes.project(results, _field(), prepare={"detrend": "linear"}, modes={"count": 1})
    assert [line.split(":")[1].strip() for line in caught.value.problems] == ["prepare", "modes"]
    with pytest.raises(climodes.UserError, match="the sections select go with a DataArray"):
        climodes.project(results, {"input": {"paths": ["x.nc"], "variable": "tas"}}, select={"lat": [0, 10]})


def test_results_that_are_not_climodes_results_are_refused(tmp_path):
    with pytest.raises(climodes.UserError, match="not a climodes results file"):
        climodes.coefficient_table(_field().to_dataset())
    with pytest.raises(climodes.UserError, match="expected climodes results"):
        climodes.reconstruct(42, "1")


# --- nothing written unless asked


def test_nothing_is_written_unless_asked(tmp_path, small_field, monkeypatch):
    """Each function in a working folder holding only the input: the folder stays as it was, and so do
    the output folder's neighbours; with ``write=True`` only the results folder appears."""
    monkeypatch.chdir(tmp_path)
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    field = xr.open_dataset(small_field)["tas"]
    before = _listing(tmp_path)
    results = climodes.run(config)
    in_memory = climodes.analyse(field, modes={"count": 2})
    climodes.project(results, field)
    climodes.project(in_memory, config)
    climodes.reconstruct(results, "1").load()
    climodes.coefficient_table(in_memory)
    assert _listing(tmp_path) == before
    climodes.run(config, write=True)
    assert {p.split("/")[0] for p in set(_listing(tmp_path)) - set(before)} == {"out"}
    assert set(before) <= set(_listing(tmp_path))
    climodes.analyse(field, modes={"count": 2}, write=True)
    assert {p.split("/")[0] for p in set(_listing(tmp_path)) - set(before)} == {"out", "results"}
    manifests = {json.loads((tmp_path / d / ".climodes-results.json").read_text())["config"] for d in ("out", "results")}
    assert manifests == {str(config), "(a config given from Python)"}  # never a file that does not exist


def test_a_lazy_dataarray_is_analysed_as_a_loaded_one(small_field):
    with xr.open_dataset(small_field, chunks={"time": 12}) as lazy, xr.open_dataset(small_field) as loaded:
        a = climodes.analyse(lazy["tas"], modes={"count": 3})
        b = climodes.analyse(loaded["tas"].load(), modes={"count": 3})
    for name in ("eof", "pc", "eigenvalue", "variance_explained"):
        np.testing.assert_allclose(a[name].values, b[name].values, rtol=0, atol=1e-12, err_msg=name)


# --- the README's "From Python" section


def _readme_blocks() -> list[str]:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    section = re.search(r"^## From Python\n(.*?)(?=^## )", text, re.S | re.M)
    assert section, "README.md has a section 'From Python'"
    return re.findall(r"```python\n(.*?)```", section.group(1), re.S)


def test_the_readme_uses_only_the_public_names():
    blocks = _readme_blocks()
    assert blocks
    for block in blocks:
        for node in ast.walk(ast.parse(block)):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] == "climodes":
                assert node.module == "climodes", node.module
                assert {a.name for a in node.names} <= set(climodes.__all__), ast.unparse(node)
            if isinstance(node, ast.Import):
                assert all(a.name == "climodes" or not a.name.startswith("climodes") for a in node.names)
            if isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) and node.value.id == "climodes":
                assert node.attr in climodes.__all__ + ["__version__"], ast.unparse(node)


@pytest.mark.slow
def test_the_readme_example_runs_on_the_demo(demo, monkeypatch, capsys):
    """The section's code, block after block in one namespace, from the repository folder's layout
    (demo_fields/, configs/, results/demo written by make demo); every line it prints is one of the
    README's comments, so the numbers shown are the demo's."""
    root, _, _, _ = demo
    monkeypatch.chdir(root)
    namespace: dict = {}
    capsys.readouterr()
    for block in _readme_blocks():
        exec(compile(block, "README.md", "exec"), namespace)  # noqa: S102  (the README's own example)
    printed = [" ".join(line.split()) for line in capsys.readouterr().out.splitlines()]
    shown = {" ".join(m.group(1).split()) for block in _readme_blocks() for m in re.finditer(r"# ?(.*)$", block, re.M)}
    assert printed and [line for line in printed if line not in shown] == []


def test_the_history_says_what_made_the_results(tmp_path, small_field, monkeypatch):
    """CF's history names the command that made a file: the command line's words for a config file, the
    Python function and what it was given otherwise (CF conventions 1.10, section 2.6.2)."""
    monkeypatch.chdir(tmp_path)
    config = write_config(tmp_path, [small_field], modes={"count": 2})
    field = xr.open_dataset(small_field)["tas"]
    assert climodes.run(config).attrs["history"].endswith(f": climodes run {config}")
    assert "climodes.run (Python) of a config given as a mapping" in \
        climodes.run(yaml.safe_load(config.read_text())).attrs["history"]
    results = climodes.analyse(field, modes={"count": 2})
    assert "climodes.analyse (Python) of DataArray 'tas'" in results.attrs["history"]
    assert "climodes.project (Python) of DataArray 'tas'" in climodes.project(results, field).attrs["history"]


def test_what_is_not_a_field_or_results_is_named(small_field):
    """Objects of the wrong kind, as a notebook hands them over, get one line naming what was expected and what
    came (common practice, as scikit-learn's input checks do); numpy's integers count as numbers."""
    field = xr.open_dataset(small_field)
    cases = {
        "open_results of a number": (lambda: climodes.open_results(5), "a results folder, its modes.nc or the "
                                     "Dataset of a run; got int"),
        "analyse of None": (lambda: climodes.analyse(None), "expected an xarray.DataArray with time, latitude and "
                            "longitude axes; got NoneType"),
        "analyse of a Dataset": (lambda: climodes.analyse(field), "got Dataset (pick one variable: dataset[name])"),
        "project a Dataset": (lambda: climodes.project(climodes.analyse(field["tas"], modes={"count": 2}), field),
                              "got Dataset (pick one variable: dataset[name])"),
    }
    for name, (call, expected) in cases.items():
        with pytest.raises(climodes.UserError) as caught:
            call()
        assert str(caught.value).endswith(expected) and "\n" not in str(caught.value), name
    results = climodes.analyse(field["tas"], modes={"count": np.int64(2), "seed": np.int32(3)},
                               prepare={"max_missing": np.float32(0.25)})
    assert results.sizes["mode"] == 2
    xr.testing.assert_identical(climodes.reconstruct(results, np.int64(2)), climodes.reconstruct(results, 2))


def test_notes_reach_a_notebook_through_the_climodes_logger(small_field, caplog):
    """What the command line prints as notes comes as warnings of the ``climodes`` logger (a notebook shows
    them) and stays in the results' ``climodes_notes`` (common practice: library messages go to logging)."""
    field = xr.open_dataset(small_field)["tas"].load()
    field[::7, 1, 1] = np.nan  # gaps at one point: the run notes the values it set to zero anomaly
    with caplog.at_level("WARNING", logger="climodes"):
        results = climodes.analyse(field, modes={"count": 2})
    told = [record.getMessage() for record in caplog.records if record.name == "climodes"]
    assert told and told == results.attrs["climodes_notes"].splitlines()
