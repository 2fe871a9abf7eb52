"""The YAML schema: defaults, and errors as FILE:LINE: key: problem (our own contract)."""

import textwrap

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
    assert ":8: prepare.aggregate:" in text and "write none" in text
    assert ":9: modes.count: expected a whole number of 1 or more; got -2" in text
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
