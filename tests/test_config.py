"""The YAML schema: defaults, and errors as FILE:LINE: key: problem (our own contract)."""

import textwrap

import numpy as np
import pytest
import yaml

from climodes.config import load_spec
from climodes.errors import ConfigError


def _write(tmp_path, text: str):
    path = tmp_path / "c.yaml"
    path.write_text(textwrap.dedent(text))
    return path


def _problems(tmp_path, text: str) -> list[str]:
    with pytest.raises(ConfigError) as caught:
        load_spec(_write(tmp_path, text))
    return caught.value.problems


def test_defaults_are_filled_in_and_paths_resolved(tmp_path):
    spec = load_spec(_write(tmp_path, """
        input: {paths: [data/*.nc], variable: sst}
    """))
    assert spec.input.paths == [str(tmp_path / "data/*.nc")]
    assert spec.input.chunks == {"time": 120}
    assert spec.prepare.weighting == "coslat" and spec.prepare.anomalies == "climatology"
    assert spec.modes.count == 10 and spec.output.overwrite is False
    assert spec.output.dir == str(tmp_path / "results")
    resolved = yaml.safe_load(spec.to_yaml())
    assert set(resolved) == {"input", "select", "prepare", "modes", "compute", "output"}
    assert resolved["select"] == {"lat": None, "lon": None, "period": None, "months": None, "level": None,
                                  "member": None}


def test_dates_and_a_single_path_are_normalised(tmp_path):
    spec = load_spec(_write(tmp_path, """
        input: {paths: /data/x.nc, variable: sst}
        select: {period: [1979, 2020-12-31], months: [12, 1, 2]}
        prepare: {aggregate: seasonal, baseline: [1981-01, 2010]}
    """))
    assert spec.input.paths == ["/data/x.nc"]
    assert spec.select.period == ["1979", "2020-12-31"]
    assert spec.prepare.baseline == ["1981-01", "2010"]


def test_unknown_key_names_its_line_and_suggests(tmp_path):
    problems = _problems(tmp_path, """
        input:
          paths: [a.nc]
          variable: sst
        modes:
          cuont: 4
    """)
    assert problems == [f"{tmp_path / 'c.yaml'}:6: modes.cuont: unknown key; did you mean count?"]


def test_every_problem_is_reported_at_once(tmp_path):
    problems = _problems(tmp_path, """
        input:
          variable: 3
        select:
          lat: [10, -10]
        prepare:
          weighting: area
          aggregate: no
        modes: {count: -2}
        outptu: {}
    """)
    text = "\n".join(problems)
    assert ":3: input.variable: expected a non-empty text" in text
    assert ":2: input.paths: required" in text
    assert ":7: prepare.weighting: expected one of coslat, cell_area, none; got 'area'" in text
    assert ":8: prepare.aggregate:" in text and "booleans: write one of the words above" in text
    assert ":9: modes.count: expected a whole number from 1 to 100000; got -2" in text
    assert ":10: outptu: unknown section; did you mean output?" in text
    assert all(p.startswith(str(tmp_path / "c.yaml") + ":") for p in problems)


@pytest.mark.parametrize("text, expected", [
    ("input: {paths: [a], variable: v}\nselect: {lat: [10, -10]}\n", ":2: select.lat: SOUTH 10 is north of NORTH -10"),
    ("input: {paths: [a], variable: v}\nselect: {lon: [30, 30]}\n", ":2: select.lon: WEST and EAST are equal"),
    ("input: {paths: [a], variable: v}\nprepare: {aggregate: seasonal}\n", ":2: prepare.aggregate: seasonal needs"),
    ("input: {paths: [a], variable: v}\nselect: {period: [2000, 1990]}\n", ":2: select.period: START 2000 comes"),
    ("input: {paths: [a], variable: v}\nselect: {months: [1, 13]}\n", ":2: select.months: expected a list"),
    ("input: {paths: [a], variable: v}\nmodes: {count: true}\n", ":2: modes.count: expected a whole number"),
    ("input: {paths: [a], variable: v}\ninput: {paths: [b], variable: v}\n", ":2: input: given twice"),
    ("input: {paths: [a], variable: v, chunks: {depth: 3}}\n", ":1: input.chunks: chunk axis 'depth'"),
    ("input: {paths: [a], variable: v}\noutput: {figures: yes please}\n", ":2: output.figures: expected true"),
])
def test_single_problems(tmp_path, text, expected):
    problems = _problems(tmp_path, text)
    assert len(problems) == 1 and expected in problems[0], problems


def test_bad_yaml_names_the_line(tmp_path):
    problems = _problems(tmp_path, "input:\n  paths: [a\n  variable: v\n")
    assert len(problems) == 1 and "not valid YAML" in problems[0] and problems[0].startswith(str(tmp_path))


def test_not_a_mapping(tmp_path):
    assert "expected a mapping" in _problems(tmp_path, "- just\n- a list\n")[0]


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match="cannot read the config"):
        load_spec(tmp_path / "nope.yaml")


# --- dates: checked in the schema against every CF calendar at once (the CF conventions, section 4.4.1:
# 360_day gives every month 30 days, all_leap gives February 29 every year); the field's own calendar is
# applied when the run opens the files (tests/test_dates.py)


@pytest.mark.parametrize("key", ["select.period", "prepare.baseline"])
@pytest.mark.parametrize("dates, expected", [
    ('["2000-13", 2001]', "months run from 1 to 12; got '2000-13'"),
    ('[2000-00, 2001]', "months run from 1 to 12; got '2000-00'"),
    ('[1990, 2001-02-31]', "February has no day 31 in any calendar (at most 30); got '2001-02-31'"),
    ('[1990-01-32, 2001]', "January has no day 32 in any calendar (at most 31); got '1990-01-32'"),
    ('[1990-04-31, 2001]', "April has no day 31 in any calendar (at most 30)"),
    ('[1990-04-00, 2001]', "April has no day 0"),
    ('[0, 2001]', "years run from 1 to 9999; got 0"),
    ('[0000-01-01, 2001]', "years run from 1 to 9999; got '0000-01-01'"),
    ('[1990, 10000]', "expected a date as YYYY, YYYY-MM or YYYY-MM-DD; got 10000"),
    ('[-5, 2001]', "expected a date as YYYY, YYYY-MM or YYYY-MM-DD; got -5"),
    ('[1990, 2001-06-01T00:00]', "expected a date as YYYY, YYYY-MM or YYYY-MM-DD"),
    ('[2000-06, 2000-05-31]', "START 2000-06 comes after END 2000-05-31"),
])
def test_dates_that_exist_in_no_calendar_are_refused(tmp_path, key, dates, expected):
    section, name = key.split(".")
    text = f"input: {{paths: [a], variable: v}}\n{section}:\n  {name}: {dates}\n"
    problems = _problems(tmp_path, text)
    assert len(problems) == 1 and problems[0].startswith(f"{tmp_path / 'c.yaml'}:3: {key}: {expected}"), problems


def test_dates_of_some_calendar_pass_the_schema_and_are_normalised(tmp_path):
    spec = load_spec(_write(tmp_path, """
        input: {paths: [a], variable: v}
        select: {period: [2001-02-30, 2004-2-29]}
        prepare: {baseline: [850, 2000-05]}
    """))
    assert spec.select.period == ["2001-02-30", "2004-02-29"]  # 360_day and all_leap dates: checked at run time
    assert spec.prepare.baseline == ["0850", "2000-05"]


def test_a_period_may_start_inside_a_coarser_end(tmp_path):
    spec = load_spec(_write(tmp_path, "input: {paths: [a], variable: v}\nselect: {period: [2000-05, 2000]}\n"))
    assert spec.select.period == ["2000-05", "2000"]


def test_an_explicit_timestamp_tag_is_read_or_refused(tmp_path):
    head = "input: {paths: [a], variable: v}\nselect:\n"
    spec = load_spec(_write(tmp_path, head + "  period: [1990, !!timestamp 2000-01-31]\n"))
    assert spec.select.period == ["1990", "2000-01-31"]
    problems = _problems(tmp_path, head + "  period: [1990, !!timestamp 2000-02-30]\n")
    assert problems == [f"{tmp_path / 'c.yaml'}:3: cannot read '2000-02-30' as YAML timestamp"]


# --- YAML: aliases may not expand without bound or refer to themselves; no value is quoted whole


def _alias_bomb(levels: int = 9) -> str:
    """Each anchor holds nine aliases of the one before: 9**levels values from under 1 KB of text."""
    lines = ['a0: &a0 ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]']
    lines += [f"a{k}: &a{k} [{','.join([f'*a{k - 1}'] * 9)}]" for k in range(1, levels)]
    return "\n".join(lines) + f"\ninput: {{paths: *a{levels - 1}, variable: v}}\n"


def test_an_alias_bomb_is_refused_where_it_explodes(tmp_path):
    text = _alias_bomb()
    assert len(text) < 1024
    problems = _problems(tmp_path, text)
    # 9 + 81 + 729 + 6561 values from the aliases of lines 2-5 pass the limit of 10000 on line 5
    assert problems == [f"{tmp_path / 'c.yaml'}:5: YAML aliases expand to more than 10000 values here; write the "
                        "values out instead of nesting aliases"]


@pytest.mark.parametrize("text, line", [
    ("input: &x {paths: [a], variable: v, chunks: *x}\n", 1),
    ("input: {paths: [a], variable: v}\nselect:\n  months: &m [1, 2, [3, *m]]\n", 3),
])
def test_a_recursive_alias_is_refused(tmp_path, text, line):
    problems = _problems(tmp_path, text)
    assert len(problems) == 1 and problems[0].startswith(f"{tmp_path / 'c.yaml'}:{line}: the alias *")
    assert "recursive alias" in problems[0]


def test_ordinary_aliases_still_work(tmp_path):
    spec = load_spec(_write(tmp_path, """
        input: {paths: [a], variable: v}
        select: {period: &years [1981, 2010]}
        prepare: {baseline: *years}
    """))
    assert spec.prepare.baseline == spec.select.period == ["1981", "2010"]


def test_nesting_is_limited(tmp_path):
    deep = "[" * 2000 + "]" * 2000
    problems = _problems(tmp_path, "input: {paths: [a], variable: v}\nselect: {months: " + deep + "}\n")
    assert problems == [f"{tmp_path / 'c.yaml'}:2: lists and mappings nested more than 50 deep"]


@pytest.mark.parametrize("text", [
    "input: {paths: [a], variable: [%s]}\n" % ("'x'," * 5000),
    "input: {paths: [a], variable: v}\nmodes: {count: '%s'}\n" % ("9" * 100_000),
    "input: {paths: [a], variable: v}\nmodes: {%s: 1}\n" % ("k" * 100_000),
    "input: {paths: [a], variable: v}\n%s: {}\n" % ("s" * 100_000),
    "input: {paths: [a], variable: v}\nmodes: !!int %s\n" % ("1" * 100_000),
    "input: {paths: [a], variable: v}\nselect: {period: *%s}\n" % ("u" * 100_000),
])
def test_no_message_quotes_a_long_value_whole(tmp_path, text):
    problems = _problems(tmp_path, text)
    assert len(problems) == 1 and len(problems[0]) < len(str(tmp_path)) + 200, problems[0][:300]


# --- numbers: YAML reads .inf, .nan and 1.0e+400 as floats that are not finite, and 1e400 as text;
# no numeric key takes them, nor a whole number too large to mean anything


NUMERIC_KEYS = ["select.lat", "select.lon", "select.months", "select.level", "select.member",
                "prepare.max_missing", "modes.count", "modes.seed", "modes.effective_sample_size",
                "compute.workers", "compute.memory", "input.chunks"]


@pytest.mark.parametrize("key, number", [
    (key, number) for key in NUMERIC_KEYS for number in (".inf", "-.inf", ".nan", "1.0e+400", "1e400", "1" + "0" * 400)
    if not (number == "1e400" and key in ("select.level", "select.member"))  # text: a coordinate value may be a name
])
def test_numbers_that_are_not_finite_or_absurd_are_refused(tmp_path, key, number):
    section, name = key.split(".")
    value = {"select.lat": f"[-10, {number}]", "select.lon": f"[{number}, 10]", "select.months": f"[1, {number}]",
             "input.chunks": f"{{time: {number}}}", "compute.memory": f"{number}GB"}.get(key, number)
    body = {"input": "  paths: [a]\n  variable: v\n"}
    body[section] = body.get(section, "") + f"  {name}: {value}\n"
    text = "".join(f"{s}:\n{keys}" for s, keys in body.items())
    line = text.splitlines().index(f"  {name}: {value}") + 1
    problems = _problems(tmp_path, text)
    assert len(problems) == 1 and problems[0].startswith(f"{tmp_path / 'c.yaml'}:{line}: {key}: "), problems
    assert len(problems[0]) < len(str(tmp_path)) + 200


def test_level_and_member_may_be_names_or_finite_numbers(tmp_path):
    spec = load_spec(_write(tmp_path, "input: {paths: [a], variable: v}\nselect: {level: 500.0, member: r1i1p1}\n"))
    assert (spec.select.level, spec.select.member) == (500.0, "r1i1p1")


# --- paths and names: what no file system can hold is refused before the run


@pytest.mark.parametrize("text, line, expected", [
    ('input: {paths: ["a\\0b.nc"], variable: v}\n', 1, "input.paths: a path cannot hold a NUL character; "
                                                        "got 'a\\x00b.nc'"),
    ('input: {paths: [a], variable: v}\noutput: {dir: "out\\0put"}\n', 2, "output.dir: a path cannot hold a NUL"),
    ('input: {paths: [a], variable: v, cell_area: "are\\0a"}\n', 1, "input.cell_area: a NUL character cannot be"),
    ('input: {paths: [a], variable: "t\\0as"}\n', 1, "input.variable: a NUL character cannot be"),
    # netCDF-C refuses names over NC_MAX_NAME = 256 bytes ("NetCDF: NC_MAX_NAME exceeded")
    ('input: {paths: [a], variable: %s}\n' % ("v" * 257), 1, "input.variable: a NetCDF variable name holds at most "
                                                             "256 bytes; got 'vvvvvvvvv"),
    ('input: {paths: ["\\uD800.nc"], variable: v}\n', 1, "input.paths: '\\ud800.nc' holds characters no file name"),
    ('input: {paths: [data/%s.nc], variable: v}\n' % ("x" * 300), 1,
     "input.paths: the name 'xxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxx... is 303 bytes long; this "
     "system allows 255"),
])
def test_paths_no_system_can_hold_are_refused(tmp_path, text, line, expected):
    problems = _problems(tmp_path, text)
    assert len(problems) == 1 and problems[0].startswith(f"{tmp_path / 'c.yaml'}:{line}: "), problems
    assert expected in problems[0]


def test_a_long_name_in_output_dir_is_refused_in_bytes(tmp_path):
    text = "input: {paths: [a], variable: v}\noutput:\n  dir: results/%s\n" % ("é" * 200)  # 400 bytes in UTF-8
    assert _problems(tmp_path, text) == [f"{tmp_path / 'c.yaml'}:3: output.dir: the name {('é' * 200)!r:.57}... "
                                         "is 400 bytes long; this system allows 255"]


def test_a_long_glob_pattern_is_left_to_the_glob(tmp_path):
    pattern = "[0-9]" * 80 + ".nc"  # matches 80-digit names: shorter than the pattern
    spec = load_spec(_write(tmp_path, f"input: {{paths: ['{pattern}'], variable: v}}\n"))
    assert spec.input.paths == [str(tmp_path / pattern)]


def test_an_unknown_user_in_a_path_is_kept_as_written(tmp_path):
    spec = load_spec(_write(tmp_path, "input: {paths: [a], variable: v}\noutput: {dir: ~nobody-of-this-name/out}\n"))
    assert spec.output.dir == str(tmp_path / "~nobody-of-this-name/out")


# --- provenance: the config text recorded with the results is the same in every checkout


def test_the_same_config_gives_the_same_text_in_any_folder(tmp_path):
    text = """
        input: {paths: [../data/sst_*.nc, /archive/sst_2020.nc], variable: sst}
        prepare: {baseline: [1981, 2010]}
        output: {dir: ../results/run}
    """
    specs = []
    for checkout in ("one/configs", "elsewhere/two/configs"):
        (tmp_path / checkout).mkdir(parents=True)
        specs.append(load_spec(_write(tmp_path / checkout, text)))
    assert specs[0].input.paths[0] == str(tmp_path / "one/data/sst_*.nc")  # the run reads absolute paths
    assert specs[1].output.dir == str(tmp_path / "elsewhere/two/results/run")
    assert specs[0].to_yaml() == specs[1].to_yaml()
    resolved = yaml.safe_load(specs[0].to_yaml())
    assert resolved["input"]["paths"] == ["../data/sst_*.nc", "/archive/sst_2020.nc"]
    assert resolved["output"]["dir"] == "../results/run"


def test_results_record_the_same_config_and_sha256_in_any_checkout(tmp_path, cli):
    import hashlib
    import shutil

    import xarray as xr

    from conftest import field_dataset, red_field

    first = tmp_path / "one" / "project"
    (first / "data").mkdir(parents=True)
    lat, lon = np.linspace(-60, 60, 5), np.arange(0, 360, 60.0)
    field_dataset(red_field((36, lat.size, lon.size)), lat, lon).to_netcdf(first / "data" / "field.nc")
    _write(first, "input: {paths: [data/field.nc], variable: tas}\nmodes: {count: 2}\n"
                  "output: {dir: results, figures: false}\n")
    second = tmp_path / "elsewhere" / "checkout"
    shutil.copytree(first, second)
    attrs = []
    for project in (first, second):
        code, _, err = cli("run", "--quiet", project / "c.yaml")
        assert code == 0, err
        with xr.open_dataset(project / "results" / "modes.nc") as ds:
            attrs.append(dict(ds.attrs))
    assert attrs[0]["climodes_config"] == attrs[1]["climodes_config"]
    assert attrs[0]["climodes_config_sha256"] == attrs[1]["climodes_config_sha256"] == hashlib.sha256(
        attrs[0]["climodes_config"].encode()).hexdigest()
    assert "paths: [data/field.nc]" in attrs[0]["climodes_config"]
    assert str(first / "data" / "field.nc") in attrs[0]["climodes_input_files"]  # the files read, in full
    assert str(second / "data" / "field.nc") in attrs[1]["climodes_input_files"]


def test_a_path_replaced_after_loading_shows_as_it_now_is(tmp_path):
    import dataclasses

    spec = load_spec(_write(tmp_path, "input: {paths: [a.nc], variable: v}\n"))
    moved = dataclasses.replace(spec, output=dataclasses.replace(spec.output, dir="/elsewhere"))
    assert yaml.safe_load(moved.to_yaml())["output"]["dir"] == "/elsewhere"
    assert yaml.safe_load(moved.to_yaml())["input"]["paths"] == ["a.nc"]


def test_a_merge_key_may_be_overridden(tmp_path):
    # YAML 1.1 merge keys (yaml.org/type/merge.html): keys of the mapping itself override merged ones
    spec = load_spec(_write(tmp_path, """
        input: {paths: [a], variable: v}
        select: {<<: {lat: [-10, 10], months: [1, 2]}, lat: [-20, 20]}
    """))
    assert spec.select.lat == [-20.0, 20.0] and spec.select.months == [1, 2]


def test_problems_come_in_the_order_of_their_lines(tmp_path):
    config = tmp_path / "run.yaml"
    config.write_text("modes:\n  count: 0\ninput:\n  paths: [a.nc]\n  variable: tas\nprepare:\n  detrend: yes\n"
                      "select:\n  lat: north\n")
    with pytest.raises(ConfigError) as caught:
        load_spec(config)
    lines = [int(problem.split(":")[1]) for problem in caught.value.problems]
    assert lines == sorted(lines) and len(lines) == 3
    detrend = next(p for p in caught.value.problems if "prepare.detrend" in p)
    assert "YAML reads bare yes/no, on/off and true/false as booleans" in detrend  # `yes` is read as true
