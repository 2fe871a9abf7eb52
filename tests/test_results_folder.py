"""The results folder: climodes writes only where it may, replaces only what it made, and leaves every
other file as it was (the folder above, the inputs beside it, the user's home).

The rules are ours (README, "Running your own fields"); the atomic renames are Linux renameat2(2)
with RENAME_NOREPLACE and RENAME_EXCHANGE, and the liveness probe is POSIX kill(pid, 0).
"""

import hashlib
import json
import os
import socket
import stat
import subprocess
import sys
from pathlib import Path

import pytest

import climodes.output as output
from climodes.output import MARK, read_mark, unlisted, write_file_atomically
from climodes.results import open_results
from conftest import write_config

RESULTS = [MARK, "modes.nc", "report.html", "run.log"]


def snapshot(root: Path) -> dict[str, tuple]:
    """Every entry under ``root`` (links not followed) with what would show a change: a file's digest,
    mode and modification time, a folder's mode, a link's target."""
    found = {}
    for folder, dirs, files in os.walk(root):
        for name in dirs + files:
            path = Path(folder) / name
            info = os.lstat(path)
            if stat.S_ISLNK(info.st_mode):
                found[str(path)] = ("link", os.readlink(path))
            elif stat.S_ISDIR(info.st_mode):
                found[str(path)] = ("folder", info.st_mode)
            else:
                found[str(path)] = ("file", hashlib.sha256(path.read_bytes()).hexdigest(), info.st_mode,
                                    info.st_mtime_ns)
    return found


def leftovers(folder: Path) -> list[str]:
    """Hidden claims and staging folders climodes would leave beside its results."""
    return sorted(p.name for p in folder.iterdir() if ".climodes-" in p.name)


@pytest.fixture
def site(tmp_path, small_field, monkeypatch):
    """A user's home with a project: the config, the data in data/, a thesis beside them; run from the
    project folder."""
    home = tmp_path / "home"
    project = home / "project"
    (project / "data").mkdir(parents=True)
    source = project / "data" / "field.nc"
    small_field.rename(source)
    (project / "thesis.tex").write_text("chapter 1")
    (home / "notes.txt").write_text("do not lose")
    monkeypatch.setenv("HOME", str(home))
    monkeypatch.chdir(project)
    return project, source


def _config(project: Path, source: Path, **output_keys) -> Path:
    return write_config(project, [source], output={"overwrite": True, **output_keys})


@pytest.mark.parametrize("where, expected", [
    (".", "is the current folder"),
    ("..", "is your home folder"),
    ("~", "is your home folder"),
    ("~/..", "holds your home folder"),
    ("/", "is the root of the file system"),
    ("data", "holds the input file"),
    ("{data}", "holds the input file"),
    ("{site}", "holds your home folder"),
])
def test_folders_that_are_never_replaced(site, cli, where, expected, tmp_path):
    project, source = site
    config = _config(project, source, dir=where.format(data=source.parent, site=tmp_path))
    before = snapshot(tmp_path)
    code, out, err = cli("run", config)
    assert code == 2 and expected in err and "output.dir:" in err, err
    assert len(err.strip().splitlines()) == 1 and out == ""
    assert snapshot(tmp_path) == before  # nothing removed, changed or left behind, anywhere


def test_config_folder_is_refused_from_elsewhere(site, cli, monkeypatch, tmp_path):
    project, source = site
    monkeypatch.chdir(tmp_path)
    config = _config(project, source, dir=".")
    before = snapshot(tmp_path)
    code, _, err = cli("run", config)
    assert code == 2 and f"holds the config file {project / 'run.yaml'}" in err
    assert snapshot(tmp_path) == before


def test_a_folder_with_a_thesis_inside_is_refused(site, cli, tmp_path):
    project, source = site
    papers = project / "papers"
    papers.mkdir()
    (papers / "thesis.pdf").write_bytes(b"%PDF years of work")
    config = _config(project, source, dir="papers")
    before = snapshot(tmp_path)
    code, _, err = cli("run", config)
    assert code == 2 and "is not a climodes results folder" in err
    assert snapshot(tmp_path) == before


def test_a_results_folder_with_a_file_added_is_refused(site, cli, tmp_path):
    project, source = site
    config = _config(project, source, dir="results")
    assert cli("run", config)[0] == 0
    (project / "results" / "thesis.tex").write_text("draft kept with the figures")
    before = snapshot(tmp_path)
    code, _, err = cli("run", config)
    assert code == 2 and "holds thesis.tex, which climodes did not write there" in err
    assert snapshot(tmp_path) == before


def test_a_symbolic_link_is_refused(site, cli, tmp_path):
    project, source = site
    config = _config(project, source, dir="results")
    assert cli("run", config)[0] == 0
    (project / "link").symlink_to(project / "results")
    config = _config(project, source, dir="link")
    before = snapshot(tmp_path)
    code, _, err = cli("run", config)
    assert code == 2 and "is a symbolic link" in err
    assert snapshot(tmp_path) == before


def test_a_results_folder_holding_an_input_is_refused(site, cli, tmp_path):
    """A previous run's modes.nc read as an input: its folder is listed, marked, and still refused."""
    project, source = site
    assert cli("run", _config(project, source, dir="results"))[0] == 0
    config = write_config(project, [project / "results" / "modes.nc"], output={"dir": "results", "overwrite": True})
    before = snapshot(tmp_path)
    code, _, err = cli("run", config)
    assert code == 2 and "holds the input file" in err
    assert snapshot(tmp_path) == before


def test_replacing_results_leaves_the_neighbours_alone(site, cli, tmp_path):
    project, source = site
    config = _config(project, source, dir="runs/first")
    assert cli("run", config)[0] == 0
    first = read_mark(project / "runs" / "first")
    outside = {k: v for k, v in snapshot(tmp_path).items() if not k.startswith(str(project / "runs" / "first"))}
    code, _, err = cli("run", config)
    assert code == 0, err
    second = read_mark(project / "runs" / "first")
    assert second["run_id"] != first["run_id"] and sorted([MARK, *second["files"]]) == RESULTS
    assert {k: v for k, v in snapshot(tmp_path).items() if not k.startswith(str(project / "runs" / "first"))} \
        == outside  # the folder above, the inputs, the config, the thesis and the home: as they were
    assert leftovers(project / "runs") == []


def test_the_manifest_names_the_run_and_lists_every_file(site, cli):
    project, source = site
    config = _config(project, source, dir="results", figures=True)
    assert cli("run", config)[0] == 0
    folder = project / "results"
    mark = json.loads((folder / MARK).read_text())
    assert mark["kind"] == "climodes results folder" and mark["config"] == str(config)
    assert mark["pid"] == os.getpid() and mark["host"] and mark["climodes"] and mark["run_id"]
    assert mark["started"] <= mark["finished"]
    every = sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file() and p.name != MARK)
    assert "figures/mode_01.png" in every and mark["files"] == every  # the files below figures/ too
    assert unlisted(folder, mark) == []


def test_nested_new_folders_are_made_and_removed_again_on_failure(site, cli, tmp_path, monkeypatch):
    project, source = site
    import climodes.pipeline

    def broken(*args):
        raise RuntimeError("a bug while writing")

    monkeypatch.setattr(climodes.pipeline, "write_netcdf", broken)
    config = _config(project, source, dir="a/b/c")
    before = snapshot(tmp_path)
    assert cli("run", config)[0] == 1
    assert snapshot(tmp_path) == before  # a, a/b and a/b/c are gone again, with the staging folder and claim


def test_a_folder_that_appears_during_the_run_is_left_alone(site, cli, tmp_path, monkeypatch):
    project, source = site
    import climodes.pipeline

    original = climodes.pipeline.write_netcdf

    def someone_else_meanwhile(*args):
        (project / "results").mkdir()
        (project / "results" / "theirs.txt").write_text("made while climodes computed")
        original(*args)

    monkeypatch.setattr(climodes.pipeline, "write_netcdf", someone_else_meanwhile)
    code, _, err = cli("run", write_config(project, [source], output={"dir": "results"}))
    assert code == 2 and "appeared or changed while the run computed" in err and len(err.strip().splitlines()) == 1
    assert [p.name for p in (project / "results").iterdir()] == ["theirs.txt"]
    assert leftovers(project) == []


def test_a_file_added_to_the_old_results_during_the_run_keeps_them(site, cli, tmp_path, monkeypatch):
    project, source = site
    config = _config(project, source, dir="results")
    assert cli("run", config)[0] == 0
    import climodes.pipeline

    original = climodes.pipeline.write_netcdf

    def added_meanwhile(*args):
        (project / "results" / "notes.md").write_text("written during the run")
        original(*args)

    monkeypatch.setattr(climodes.pipeline, "write_netcdf", added_meanwhile)
    code, _, err = cli("run", config)
    assert code == 2 and "appeared or changed while the run computed" in err
    assert sorted(p.name for p in (project / "results").iterdir()) == sorted(RESULTS + ["notes.md"])
    assert leftovers(project) == []


@pytest.mark.parametrize("renameat2", ["available", "missing"])
def test_new_and_replaced_results_with_and_without_renameat2(site, cli, monkeypatch, renameat2):
    """Without renameat2 (another system, or a file system without it) the careful fallback does the job."""
    project, source = site
    if renameat2 == "missing":
        monkeypatch.setattr(output, "_renameat2", lambda source, target, flag: False)
    config = _config(project, source, dir="results")
    for _ in range(2):  # a new folder, then a replace
        code, _, err = cli("run", config)
        assert code == 0, err
        assert sorted(p.name for p in (project / "results").iterdir()) == RESULTS
        assert leftovers(project) == []
    open_results(project / "results").close()


@pytest.mark.parametrize("renameat2", ["available", "missing"])
def test_a_folder_swapped_at_the_last_instant_is_not_replaced(tmp_path, monkeypatch, renameat2):
    """The folder moved out by the exchange must be the one seen at the start; if not, it goes back."""
    final, other, stage = tmp_path / "results", tmp_path / "other", tmp_path / ".stage"
    for folder, run in ((final, "old"), (other, "someone else's"), (stage, "new")):
        folder.mkdir()
        (folder / MARK).write_text(json.dumps({"kind": "climodes results folder", "run_id": run, "files": []}))
    before = output._identity(final)
    real = output._renameat2

    def swapped_first(source, target, flag):  # after the checks, just before the rename
        if other.exists():
            os.rename(final, tmp_path / "moved")
            os.rename(other, final)
        return real(source, target, flag) if renameat2 == "available" else False

    monkeypatch.setattr(output, "_renameat2", swapped_first)
    with pytest.raises(output.UserError, match="appeared or changed"):
        output._put_in_place(stage, final, before)
    assert read_mark(final)["run_id"] == "someone else's" and read_mark(stage)["run_id"] == "new"
    assert read_mark(tmp_path / "moved")["run_id"] == "old"


def test_results_folders_follow_the_umask(site, cli):
    project, source = site
    old = os.umask(0o027)
    try:
        assert cli("run", _config(project, source, dir="results", figures=True))[0] == 0
    finally:
        os.umask(old)
    folder = project / "results"
    assert stat.S_IMODE(folder.stat().st_mode) == 0o750  # not 0700: the group may read, as the umask says
    assert {stat.S_IMODE(p.stat().st_mode) for p in folder.rglob("*") if p.is_file()} == {0o640}
    assert {stat.S_IMODE(p.stat().st_mode) for p in folder.rglob("*") if p.is_dir()} == {0o750}  # figures/


def _reaped() -> int:
    """The pid of a process that has ended (and been reaped): no longer alive."""
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def _stage(parent: Path, name: str, pid: int, marked: bool = True) -> Path:
    """A staging folder as a run of ``pid`` on this host leaves it, half written."""
    stage = parent / f".{name}.climodes-stage-{output._host_tag()}-{pid}-{os.urandom(4).hex()}"
    stage.mkdir()
    (stage / "modes.nc").write_bytes(b"half written")
    if marked:
        mark = {"kind": "climodes results folder", "run_id": "x", "host": socket.gethostname(), "pid": pid,
                "files": None}
        (stage / MARK).write_text(json.dumps(mark))
    return stage


def _claim(parent: Path, name: str, pid: int, host: str) -> Path:
    """A claim on ``name`` as a run of ``pid`` on ``host`` leaves it."""
    claim = parent / f".{name}.climodes-claim"
    claim.write_text(json.dumps({"kind": "climodes results folder", "run_id": "y", "host": host, "pid": pid,
                                 "started": "2026-01-01T00:00:00+00:00"}))
    return claim


def test_leftovers_of_killed_runs_are_removed_and_nothing_else(site, cli):
    project, source = site
    dead, alive = _reaped(), os.getppid()
    stale = _stage(project, "results", dead)
    running = _stage(project, "results", alive)
    unmarked = _stage(project, "results", dead, marked=False)
    older = project / ".results.partial-abc123"  # a hidden folder of another kind
    older.mkdir()
    (older / "keep").write_text("not ours to judge")
    _claim(project, "results", dead, socket.gethostname())
    code, _, err = cli("run", write_config(project, [source], output={"dir": "results"}))
    assert code == 0, err
    assert f"note: removed {stale}, left by a run (pid {dead}) that was killed" in err
    assert not stale.exists() and not (project / ".results.climodes-claim").exists()
    assert running.exists() and unmarked.exists() and (older / "keep").exists()
    assert sorted(p.name for p in (project / "results").iterdir()) == RESULTS


@pytest.mark.parametrize("whose", ["a live run here", "a run on another host"])
def test_a_claim_held_by_another_run_is_respected(site, cli, whose, tmp_path):
    project, source = site
    pid, host = (os.getppid(), socket.gethostname()) if whose == "a live run here" else (_reaped(), "node042")
    claim = _claim(project, "results", pid, host)
    config = write_config(project, [source], output={"dir": "results"})
    before = snapshot(tmp_path)
    code, _, err = cli("run", config)
    assert code == 2 and f"is being written by another climodes run (pid {pid} on {host}" in err
    assert f"remove {claim}" in err and len(err.strip().splitlines()) == 1
    assert snapshot(tmp_path) == before


@pytest.mark.slow
def test_two_runs_started_together_get_one_winner(site):
    project, source = site
    config = write_config(project, [source], output={"dir": "results"})
    runs = [subprocess.Popen([sys.executable, "-m", "climodes", "run", "--quiet", str(config)],
                             stderr=subprocess.PIPE, text=True) for _ in range(2)]
    finished = sorted((run.wait(timeout=300), run.stderr.read()) for run in runs)
    assert [code for code, _ in finished] == [0, 2], finished
    loser = finished[1][1]
    assert ("is being written by another climodes run" in loser or "exists already" in loser), loser
    assert len(loser.strip().splitlines()) == 1
    mark = read_mark(project / "results")
    assert sorted([MARK, *mark["files"]]) == RESULTS and unlisted(project / "results", mark) == []
    open_results(project / "results").close()
    assert leftovers(project) == []


# --- one file written atomically, for outputs outside a results folder


def test_a_file_is_written_whole_and_replaced_only_when_asked(tmp_path):
    target = tmp_path / "table.csv"
    write_file_atomically(target, lambda path: path.write_text("mode,share\n1,0.4\n"))
    assert target.read_text() == "mode,share\n1,0.4\n"
    with pytest.raises(output.UserError, match="exists already"):
        write_file_atomically(target, lambda path: path.write_text("other"))
    write_file_atomically(target, lambda path: path.write_text("new"), replace=True)
    assert target.read_text() == "new" and sorted(p.name for p in tmp_path.iterdir()) == ["table.csv"]


def test_a_folder_is_never_replaced_by_a_file(tmp_path):
    (tmp_path / "report.html").mkdir()
    (tmp_path / "report.html" / "inside").write_text("kept")
    with pytest.raises(output.UserError, match="is a folder"):
        write_file_atomically(tmp_path / "report.html", lambda path: path.write_text("<html>"), replace=True)
    assert (tmp_path / "report.html" / "inside").read_text() == "kept"


def test_a_failed_write_leaves_nothing(tmp_path):
    def half(path):
        path.write_text("half")
        raise OSError(28, "No space left on device")

    with pytest.raises(OSError):
        write_file_atomically(tmp_path / "projection.nc", half)
    assert list(tmp_path.iterdir()) == []


def test_a_file_that_appears_meanwhile_is_left_alone(tmp_path):
    target = tmp_path / "projection.nc"

    def someone_else_meanwhile(path):
        target.write_text("theirs")
        path.write_text("ours")

    with pytest.raises(output.UserError, match="appeared while it was being written"):
        write_file_atomically(target, someone_else_meanwhile)
    assert target.read_text() == "theirs" and sorted(p.name for p in tmp_path.iterdir()) == ["projection.nc"]


def test_temporary_files_of_killed_runs_go_and_others_stay(tmp_path):
    tag = output._host_tag()
    dead = tmp_path / f".report.html.climodes-temporary-{tag}-{_reaped()}-0badc0de.html"
    alive = tmp_path / f".report.html.climodes-temporary-{tag}-{os.getppid()}-0badc0de.html"
    theirs = tmp_path / ".report.html.swp"
    for path in (dead, alive, theirs):
        path.write_text("x")
    write_file_atomically(tmp_path / "report.html", lambda path: path.write_text("<html>"))
    assert not dead.exists() and alive.exists() and theirs.exists()


def test_figures_drawn_again_keep_the_manifest_true(site, cli):
    """`climodes figures` changes a finished results folder in place: its manifest then lists the new
    figures, so a later run may still replace the folder, and a file of the user's put into figures/
    is never removed: the redraw and the replacing run both refuse and leave it."""
    project, source = site
    config = _config(project, source, dir="results", figures=True)
    assert cli("run", config)[0] == 0
    folder = project / "results"
    code, _, err = cli("figures", folder, "--format", "svg", "--draw", "maps")
    assert code == 0, err
    mark = read_mark(folder)
    assert "figures/mode_01.svg" in mark["files"] and "figures/mode_01.png" not in mark["files"]
    assert unlisted(folder, mark) == [] and not leftovers(project)
    assert cli("run", config)[0] == 0  # replaced: everything in it was climodes' own
    (folder / "figures" / "my_notes.txt").write_text("mine")
    for command in (("figures", folder), ("run", config)):
        code, _, err = cli(*command)
        assert code == 2 and "my_notes.txt" in err and len(err.strip().splitlines()) == 1, err
        assert (folder / "figures" / "my_notes.txt").read_text() == "mine"


def test_a_file_put_in_while_figures_are_drawn_again_is_not_taken_for_climodes(site, cli, monkeypatch):
    """A file the user puts into the results folder while `climodes figures` draws is not listed in the
    manifest (listing all the folder held at the end claimed it), so a later run refuses to replace the
    folder and the file stays."""
    import climodes.pipeline

    project, source = site
    config = _config(project, source, dir="results")
    assert cli("run", config)[0] == 0
    folder = project / "results"
    drawing = climodes.pipeline.publish

    def while_drawing(where, options):
        (where / "notes.txt").write_text("mine")  # saved there by the user meanwhile
        return drawing(where, options)

    monkeypatch.setattr(climodes.pipeline, "publish", while_drawing)
    code, _, err = cli("figures", folder, "--draw", "maps")
    assert code == 0, err
    assert "notes.txt" not in read_mark(folder)["files"] and "figures/mode_01.png" in read_mark(folder)["files"]
    code, _, err = cli("run", config)
    assert code == 2 and "holds notes.txt, which climodes did not write" in err
    assert (folder / "notes.txt").read_text() == "mine"


def test_a_file_saved_into_figures_while_they_are_drawn_again_stays(site, cli, monkeypatch):
    """The figures folder is checked when the new figures are ready, not only before drawing: a file the
    user saved into it meanwhile stops the redraw (exit 2, one line) and stays, with the old figures."""
    import climodes.figures

    project, source = site
    config = _config(project, source, dir="results", figures={"draw": ["maps"]})
    assert cli("run", config)[0] == 0
    figures = project / "results" / "figures"
    before = snapshot(figures)
    drawing = climodes.figures.draw_all

    def while_drawing(ds, options, folder):
        (figures / "caption.txt").write_text("mine")  # saved there by the user meanwhile
        return drawing(ds, options, folder)

    monkeypatch.setattr(climodes.figures, "draw_all", while_drawing)
    code, out, err = cli("figures", project / "results")
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1, err
    assert "holds caption.txt, which climodes did not write while the figures were drawn" in err
    assert (figures / "caption.txt").read_text() == "mine"
    assert {k: v for k, v in snapshot(figures).items() if not k.endswith("caption.txt")} == before
    assert not [p for p in (project / "results").iterdir() if p.name.startswith(".figures")]
