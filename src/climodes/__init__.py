"""climodes: dominant modes of variability (EOFs and PCs) of gridded climate fields.

The names in ``__all__`` are the Python interface, for notebooks and scripts; every other module is
internal and may change.  Each function calls the code of the matching ``climodes`` subcommand, so a
config gives the same results from Python as from the command line.  Nothing is written unless asked
(``write=True``), and every problem with the input is raised as one :class:`UserError` with the
messages the command line prints.

>>> import climodes
>>> sorted(climodes.__all__)[:3]
['UserError', 'analyse', 'coefficient_table']
"""

from __future__ import annotations

import logging
import numbers
import os
from collections.abc import Mapping
from importlib.metadata import PackageNotFoundError, version
from typing import TYPE_CHECKING, Any, Sequence

from climodes.errors import UserError

try:
    __version__ = version("climodes")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0+unknown"

if TYPE_CHECKING:  # the numeric modules are imported when first used, so the command line starts fast
    import pandas as pd
    import xarray as xr

    from climodes.config import RunSpec

__all__ = ["UserError", "analyse", "coefficient_table", "load_config", "open_results", "project", "reconstruct",
           "run"]

IN_MEMORY = "(in memory)"  # the input paths recorded for a field given as a DataArray


def load_config(config: str | os.PathLike | Mapping | RunSpec, folder: str | os.PathLike | None = None) -> RunSpec:
    """Read and validate a run configuration, as ``climodes check`` does.

    Parameters
    ----------
    config
        Path of a YAML config, or its content as a mapping (``{"input": {...}, "modes": {...}}``);
        an already loaded config is returned as it is.
    folder
        For a mapping: the folder its relative paths are read from (default: the working folder).

    Returns
    -------
    RunSpec
        The validated config with every default filled in; ``to_yaml()`` gives its text.

    Raises
    ------
    UserError
        With one line per problem in ``problems``: ``FILE:LINE: key: problem`` for a file,
        ``config: key: problem`` for a mapping.

    Examples
    --------
    >>> import climodes
    >>> spec = climodes.load_config({"input": {"paths": ["sst_*.nc"], "variable": "sst"}})
    >>> spec.modes.count, spec.prepare.anomalies
    (10, 'climatology')
    >>> try:
    ...     climodes.load_config({"input": {"variable": "sst"}, "modes": {"count": 0}})
    ... except climodes.UserError as err:
    ...     print("\\n".join(err.problems))
    config: input.paths: required (NetCDF files, Zarr stores (*.zarr) or glob patterns, read from the config's folder)
    config: modes.count: expected a whole number from 1 to 100000; got 0
    """
    from climodes.config import RunSpec, load_spec, spec_from_mapping

    if isinstance(config, RunSpec):
        return config
    if isinstance(config, Mapping):
        return spec_from_mapping(dict(config), folder)
    if isinstance(config, (str, os.PathLike)):
        return load_spec(config)
    raise UserError(f"expected a config: a YAML file's path or a mapping of its sections; got {type(config).__name__}")


def run(config: str | os.PathLike | Mapping | RunSpec, write: bool = False) -> xr.Dataset:
    """Run a config, as ``climodes run`` does, and return its results.

    Parameters
    ----------
    config
        A config's path or mapping (see :func:`load_config`).
    write
        Write the results folder (``output.dir``: ``modes.nc``, figures, report) as ``climodes run``
        does; by default nothing is written.

    Returns
    -------
    xarray.Dataset
        What ``modes.nc`` holds: ``eof(mode, lat, lon)``, ``pc(mode, time)``, ``eigenvalue``,
        ``variance_explained`` and the diagnostics, with the config in ``attrs["climodes_config"]``.

    Raises
    ------
    UserError
        For a bad config, input file or output folder, with the command line's message.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> import numpy as np, pandas as pd, xarray as xr
    >>> import climodes
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> times = pd.date_range("2000-01-01", periods=48, freq="MS")
    >>> values = np.random.default_rng(0).standard_normal((48, 6, 8))
    >>> xr.Dataset({"tas": (("time", "lat", "lon"), values)}, coords={"time": times,
    ...     "lat": np.linspace(-50, 50, 6), "lon": np.arange(0, 360, 45.0)}).to_netcdf(folder / "tas.nc")
    >>> config = {"input": {"paths": [str(folder / "tas.nc")], "variable": "tas"}, "modes": {"count": 3}}
    >>> results = climodes.run(config)
    >>> results["eof"].dims, results.sizes["mode"]
    (('mode', 'lat', 'lon'), 3)
    >>> sorted(p.name for p in folder.iterdir())  # nothing written
    ['tas.nc']
    >>> import shutil; shutil.rmtree(folder)
    """
    from climodes.pipeline import run as run_spec

    spec = load_config(config)
    return run_spec(spec, say=_tell, write=write,
                    command=None if _is_path(config) else _by_python("run", spec)).results


def analyse(data: xr.DataArray, *, write: bool = False, **sections: Mapping[str, Any]) -> xr.Dataset:
    """The analysis of ``climodes run`` applied to a field in memory (numpy- or dask-backed).

    Parameters
    ----------
    data
        A numeric DataArray with a dated time axis and latitude and longitude axes (found from CF
        attributes or common names such as ``time``, ``lat``, ``lon``, as in a file).
    write
        Write the results folder of ``output.dir`` (default ``results`` in the working folder).
    **sections
        The config's sections as mappings: ``select``, ``prepare``, ``modes``, ``compute``, ``output``,
        and ``input`` with ``chunks`` or ``cell_area`` (its ``paths`` and ``variable`` are the
        DataArray's own).  They are checked as a config's are.

    Returns
    -------
    xarray.Dataset
        The results, as :func:`run` returns them.

    Raises
    ------
    UserError
        For a bad section key or a field climodes cannot analyse, with the command line's message.

    Examples
    --------
    >>> import numpy as np, pandas as pd, xarray as xr
    >>> import climodes
    >>> field = xr.DataArray(np.random.default_rng(0).standard_normal((48, 6, 8)), name="tas",
    ...     dims=("time", "lat", "lon"), coords={"time": pd.date_range("2000-01-01", periods=48, freq="MS"),
    ...     "lat": np.linspace(-50, 50, 6), "lon": np.arange(0, 360, 45.0)})
    >>> results = climodes.analyse(field, select={"lat": [-30, 50]}, modes={"count": 2})
    >>> results["pc"].shape
    (2, 48)
    >>> round(float(results["pc"].std("time", ddof=1)[0]), 6)  # standardised PCs
    1.0
    """
    from climodes.config import MAPPING_NAME
    from climodes.errors import ConfigError
    from climodes.pipeline import run as run_spec

    if not _is_array(data):
        raise UserError(f"expected an xarray.DataArray with time, latitude and longitude axes; got "
                        f"{type(data).__name__}" + (" (pick one variable: dataset[name])"
                                                    if type(data).__name__ == "Dataset" else ""))
    given = dict(sections.get("input") or {})
    taken = [key for key in ("paths", "variable") if key in given]
    if taken:
        raise ConfigError([f"{MAPPING_NAME}: input.{key}: not used with a DataArray, whose name and values are the "
                           "input; leave it out" for key in taken])
    name = getattr(data, "name", None)
    sections = {**sections, "input": {**given, "paths": [IN_MEMORY], "variable": str(name or "field")}}
    spec = load_config(sections)
    return run_spec(spec, say=_tell, data=data, write=write, command=_by_python("analyse", spec, data)).results


def open_results(path: str | os.PathLike) -> xr.Dataset:
    """Open a results folder or its ``modes.nc`` lazily, checking that climodes wrote it.

    Parameters
    ----------
    path
        A results folder written by ``climodes run`` (or :func:`run` with ``write=True``), or its
        ``modes.nc``.

    Returns
    -------
    xarray.Dataset
        The results, as :func:`run` returns them; close it (or use ``with``) when done.

    Raises
    ------
    UserError
        If the file is missing, not NetCDF, or not climodes results.

    Examples
    --------
    >>> import climodes
    >>> try:
    ...     climodes.open_results("no/such/folder")
    ... except climodes.UserError as err:
    ...     print(err)
    no/such/folder: no such results file; give a results folder or its modes.nc
    """
    from climodes.results import open_results as open_checked

    return open_checked(path)


def project(results: str | os.PathLike | xr.Dataset, other: str | os.PathLike | Mapping | RunSpec | xr.DataArray,
            *, write: bool = False, **sections: Mapping[str, Any]) -> xr.Dataset:
    """Project another field onto the modes of ``results``, as ``climodes project`` does.

    The field is prepared with the climatology, trend and scale fitted in the run (never its own),
    and averaged as the run's field was.

    Parameters
    ----------
    results
        A results folder, its ``modes.nc``, or the Dataset of :func:`run`, :func:`analyse` or
        :func:`open_results`.
    other
        The field: a config (its ``input``, ``select``, ``compute`` and ``output`` are used), or a
        DataArray on the grid of the results.
    write
        Write ``projection.nc`` into the ``output.dir`` of the config (or of ``output``).
    **sections
        With a DataArray: ``select``, ``compute``, ``output`` and ``input`` (``chunks``) as mappings
        (``prepare`` and ``modes`` are the run's).

    Returns
    -------
    xarray.Dataset
        What ``projection.nc`` holds: the projected, standardised coefficients ``pc(mode, time)`` and
        the diagnostics of the fit.

    Examples
    --------
    >>> import numpy as np, pandas as pd, xarray as xr
    >>> import climodes
    >>> def field(start, seed):
    ...     return xr.DataArray(np.random.default_rng(seed).standard_normal((48, 6, 8)), name="tas",
    ...         dims=("time", "lat", "lon"), coords={"time": pd.date_range(start, periods=48, freq="MS"),
    ...         "lat": np.linspace(-50, 50, 6), "lon": np.arange(0, 360, 45.0)})
    >>> modes = climodes.analyse(field("2000-01-01", 0), modes={"count": 2})
    >>> later = climodes.project(modes, field("2004-01-01", 1))
    >>> later["pc"].shape
    (2, 48)
    """
    from climodes.pipeline import project as project_spec

    from climodes.config import MAPPING_NAME
    from climodes.errors import ConfigError

    data = None
    if _is_array(other):
        if unused := [name for name in ("prepare", "modes") if name in sections]:
            raise ConfigError([f"{MAPPING_NAME}: {name}: not used by a projection, which applies the modes and the "
                               "preparation fitted in the run; leave it out" for name in unused])
        name = getattr(other, "name", None)
        sections = {**sections, "input": {**dict(sections.get("input") or {}), "paths": [IN_MEMORY],
                                          "variable": str(name or "field")}}
        data, spec = other, load_config(sections)
    elif type(other).__name__ == "Dataset" or not (_is_path(other) or isinstance(other, Mapping)
                                                    or type(other).__name__ == "RunSpec"):
        raise UserError(f"project: expected the other field as an xarray.DataArray, or a config (a path or a "
                        f"mapping); got {type(other).__name__}" + (" (pick one variable: dataset[name])"
                                                                   if type(other).__name__ == "Dataset" else ""))
    elif sections:
        raise UserError(f"project: the sections {', '.join(sections)} go with a DataArray; with a config, change "
                        "the config")
    else:
        spec = load_config(other)
    command = None if _is_path(other) else _by_python("project", spec, data)
    return project_spec(results, spec, say=_tell, data=data, write=write, command=command).results


def reconstruct(results: str | os.PathLike | xr.Dataset, modes: str | int | Sequence[int],
                anomalies: bool = False) -> xr.DataArray:
    """The field rebuilt from chosen modes, lazily, as ``climodes reconstruct`` writes it.

    Parameters
    ----------
    results
        A results folder, its ``modes.nc``, or the Dataset of a run.
    modes
        The modes to sum: ``"1-3"``, ``"1,4"``, ``2`` or ``[1, 2]``.
    anomalies
        Return the anomalies (the sum of ``pc * eof``); by default the fitted climatology, trend and
        scale are put back, giving values in the input's units.

    Returns
    -------
    xarray.DataArray
        A dask-backed ``(time, lat, lon)`` array named as the input's variable; NaN where the run did
        not use the point.  Nothing is computed until asked.

    Examples
    --------
    >>> import numpy as np, pandas as pd, xarray as xr
    >>> import climodes
    >>> field = xr.DataArray(np.random.default_rng(0).standard_normal((48, 6, 8)), name="tas",
    ...     dims=("time", "lat", "lon"), coords={"time": pd.date_range("2000-01-01", periods=48, freq="MS"),
    ...     "lat": np.linspace(-50, 50, 6), "lon": np.arange(0, 360, 45.0)})
    >>> results = climodes.analyse(field, modes={"count": 3})
    >>> rebuilt = climodes.reconstruct(results, "1-2", anomalies=True)
    >>> rebuilt.name, rebuilt.dims, rebuilt.chunks is not None
    ('tas', ('time', 'lat', 'lon'), True)
    """
    from climodes.pipeline import given_results, rebuilt
    from climodes.reuse import history

    source, trained, _ = given_results(results)
    text = _modes_text(modes)
    command = history("reconstruct", source, "--modes", text, *(["--anomalies"] * anomalies))
    ds, _ = rebuilt(trained, source, text, anomalies, command)
    return ds[next(iter(ds.data_vars))]


def coefficient_table(results: str | os.PathLike | xr.Dataset) -> pd.DataFrame:
    """The PCs and residual fractions, one row per time step, as ``climodes table`` writes them.

    Parameters
    ----------
    results
        A results folder, its ``modes.nc``, or the Dataset of a run.

    Returns
    -------
    pandas.DataFrame
        Columns ``time``, ``year`` (and ``month``, ``day`` or ``season`` as the steps go), ``pc_K``,
        ``unexplained_fraction_K``, ``step_variance`` and, after a rotation, ``rotated_pc_K``.

    Examples
    --------
    >>> import numpy as np, pandas as pd, xarray as xr
    >>> import climodes
    >>> field = xr.DataArray(np.random.default_rng(0).standard_normal((48, 6, 8)), name="tas",
    ...     dims=("time", "lat", "lon"), coords={"time": pd.date_range("2000-01-01", periods=48, freq="MS"),
    ...     "lat": np.linspace(-50, 50, 6), "lon": np.arange(0, 360, 45.0)})
    >>> table = climodes.coefficient_table(climodes.analyse(field, modes={"count": 2}))
    >>> list(table.columns[:5])
    ['time', 'year', 'month', 'pc_1', 'pc_2']
    >>> len(table)
    48
    """
    from climodes.pipeline import given_results
    from climodes.reuse import coefficient_table as table_of

    _, trained, mine = given_results(results)
    try:
        return table_of(trained)
    finally:
        if mine:
            trained.close()


def _tell(line: str) -> None:
    """A note about the data (what the command line prints as ``note: ...``), as a warning of the
    ``climodes`` logger, which a notebook shows; the results keep every note in ``attrs["climodes_notes"]``."""
    logging.getLogger("climodes").warning(line.removeprefix("note: "))


def _modes_text(modes: object) -> str:
    """Mode numbers as the command line's ``--modes`` takes them: ``"1-3"`` as it is, ``2`` or ``[1, 2]``."""
    if isinstance(modes, str):
        return modes
    whole = lambda n: isinstance(n, numbers.Integral) and not isinstance(n, bool)  # numpy's integers too
    listed = [modes] if whole(modes) else list(modes) if isinstance(modes, (list, tuple, range)) else None
    if not listed or not all(whole(n) for n in listed):
        raise UserError(f"modes {modes!r}: give mode numbers such as \"1-3\", 2 or [1, 4]")
    return ",".join(str(int(n)) for n in listed)


def _is_path(config: object) -> bool:
    return isinstance(config, (str, os.PathLike))


def _by_python(function: str, spec: RunSpec, data: xr.DataArray | None = None) -> str:
    """What made results from Python, for their history, where the command line's words would be."""
    from climodes.fields import array_name

    given = array_name(data) if data is not None else "a config given as a mapping"
    return f"climodes.{function} (Python) of {given}, relative paths read from {spec.source.parent}"


def _is_array(value: object) -> bool:
    """Whether ``value`` is a DataArray, without importing xarray for a config."""
    return type(value).__name__ == "DataArray" and type(value).__module__.startswith("xarray")
