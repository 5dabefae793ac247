"""``wetlandflow doctor``: the geospatial stack as actually loaded, and known conflicts.

Wheels of rasterio and pyproj each bundle their own PROJ library and PROJ data
(``proj.db``); a conda or system install may bring a third.  Reprojecting
rasters (GDAL through rasterio) and vectors (pyproj) with different PROJ
versions or databases can give different results for the same CRS, and an
environment variable pointing to a missing or foreign data folder breaks CRS
lookups outright.  :func:`stack_info` records what is loaded;
:func:`find_problems` is a pure function of that record, the environment and
the installed distribution names, so each rule is testable on its own.

Two PROJ builds in separate wheels are the usual pip install, not a fault:
when each library reads the ``proj.db`` of its own PROJ version, each is
consistent with itself, and :func:`find_notes` reports the pair as
information.  It is a problem only when a library reads a ``proj.db`` of
another PROJ version, or none.  Every problem ends with what a pip user can do
(``With pip: ...``).
"""

from __future__ import annotations

import os
import platform
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

ENV_DIRS = ("GDAL_DATA", "PROJ_LIB", "PROJ_DATA")
# Distributions that install the same importable package and overwrite each other's files.
EXCLUSIVE_DISTRIBUTIONS = (("xgboost", "xgboost-cpu"),)


def _norm(name: str) -> str:
    """Distribution names compare case-insensitively with '-', '_' and '.' equal (PEP 503)."""
    return name.lower().replace("_", "-").replace(".", "-")


def _real(path: str | None) -> str:
    return str(Path(path).resolve()) if path else ""


def stack_info() -> dict[str, Any]:
    """Versions and data folders of the stack as loaded in this process.

    Returns
    -------
    dict
        ``versions`` (library to version; GDAL, PROJ and GEOS as loaded by the library named in
        brackets) and ``proj_data`` (the PROJ data folder each of rasterio and pyproj searches).
    """
    import dask
    import numpy
    import pyproj
    import rasterio
    import shapely
    import xarray
    import zarr
    from rasterio._env import get_proj_data_search_paths

    versions = {
        "python": platform.python_version(), "numpy": numpy.__version__, "xarray": xarray.__version__,
        "dask": dask.__version__, "zarr": zarr.__version__, "rasterio": rasterio.__version__,
        "GDAL (rasterio)": rasterio.__gdal_version__, "PROJ (rasterio)": rasterio.__proj_version__,
        "GEOS (rasterio)": rasterio.__geos_version__, "pyproj": pyproj.__version__,
        "PROJ (pyproj)": pyproj.proj_version_str, "shapely": shapely.__version__,
        "GEOS (shapely)": shapely.geos_version_string, "xgboost": _xgboost_version(),
    }
    proj_data = {"rasterio": os.pathsep.join(get_proj_data_search_paths() or []),
                 "pyproj": pyproj.datadir.get_data_dir()}
    return {"versions": versions, "proj_data": proj_data,
            "proj_db": {lib: proj_db_version(folders) for lib, folders in proj_data.items()}}


def proj_db_version(folders: str) -> str:
    """``PROJ.VERSION`` of the first ``proj.db`` in ``folders`` (os.pathsep-separated); '' when none is found
    or it cannot be read."""
    import sqlite3

    for folder in filter(None, folders.split(os.pathsep)):
        db = Path(folder) / "proj.db"
        if not db.is_file():
            continue
        try:
            con = sqlite3.connect(f"file:{db.as_posix()}?mode=ro", uri=True)
            try:
                row = con.execute("SELECT value FROM metadata WHERE key = 'PROJ.VERSION'").fetchone()
            finally:
                con.close()
        except sqlite3.Error:
            return ""
        return str(row[0]) if row else ""
    return ""


def _xgboost_version() -> str:
    try:
        import xgboost
    except ImportError as exc:  # reported, not raised: the doctor must run on a broken install
        return f"not importable ({exc})"
    dists = [d for d in installed_distributions() if d in ("xgboost", "xgboost-cpu")]
    return f"{xgboost.__version__} ({', '.join(dists) or 'distribution not found'})"


def installed_distributions() -> list[str]:
    """Names of the installed Python distributions (normalised)."""
    from importlib.metadata import distributions

    return sorted({_norm(d.metadata["Name"]) for d in distributions() if d.metadata["Name"]})


def find_problems(info: Mapping[str, Any], env: Mapping[str, str], distributions: Iterable[str]) -> list[str]:
    """Known conflicts in a stack record (:func:`stack_info`), an environment and distribution names.

    Each problem is one sentence saying what is wrong and what was found, then what a pip user can do
    (``With pip: ...``).
    """
    return (_proj_problems(info) + _env_problems(env)
            + _distribution_problems({_norm(d) for d in distributions}))


def find_notes(info: Mapping[str, Any]) -> list[str]:
    """Information that is not a problem: rasterio and pyproj each with their own, self-consistent PROJ."""
    data, dbs, v = info.get("proj_data", {}), info.get("proj_db"), info.get("versions", {})
    ras, pyp = data.get("rasterio", ""), data.get("pyproj", "")
    if dbs is None or not ras or not pyp or _proj_problems(info) or _same_dir(ras, pyp):
        return []
    a, b = v.get("PROJ (rasterio)"), v.get("PROJ (pyproj)")
    same = "the same PROJ version" if a == b else f"PROJ {a} and PROJ {b}"
    return [f"rasterio and pyproj each bring their own PROJ build ({same}), each with the proj.db of its "
            f"own version ({ras} and {pyp}), as their pip wheels do. Each is consistent with itself, so this "
            "is not a problem; the two may hold different EPSG database releases, so for a few CRS pairs a "
            "raster (rasterio) and a vector (pyproj) reprojection can choose different transformations. "
            "Nothing to do unless two outputs that should overlay do not."]


def _same_dir(ras: str, pyp: str) -> bool:
    return _real(ras.split(os.pathsep)[0]) == _real(pyp)


def _major_minor(version: str) -> tuple[str, ...]:
    return tuple(version.split(".")[:2])


def _own_data_problems(lib: str, folder: str, loaded: str, db: str) -> list[str]:
    """A library that reads no proj.db, or the proj.db of another PROJ minor release than it loads."""
    if not folder:
        return []
    unset = "unset PROJ_DATA and PROJ_LIB if set"
    if not db:
        return [f"{lib} (PROJ {loaded}) finds no readable proj.db in {folder}, so CRS lookups fail. With "
                f"pip: {unset}, then reinstall the wheel, which ships its own data (pip install "
                f"--force-reinstall --no-deps {lib})."]
    if loaded and _major_minor(db) != _major_minor(loaded):
        return [f"{lib} loads PROJ {loaded} but reads the proj.db of PROJ {db} in {folder}; a database of "
                "another PROJ version can fail or give different CRS definitions. With pip: "
                f"{unset} (the {lib} wheel then uses the proj.db bundled with it); if that is not it, pip "
                f"install --force-reinstall --no-deps {lib}."]
    return []


def _proj_problems(info: Mapping[str, Any]) -> list[str]:
    data, v = info.get("proj_data", {}), info.get("versions", {})
    ras, pyp = data.get("rasterio", ""), data.get("pyproj", "")
    dbs = info.get("proj_db")
    if dbs is not None:  # what each library's data folder holds is known: judge each library on its own
        return [p for lib, folder in (("rasterio", ras), ("pyproj", pyp))
                for p in _own_data_problems(lib, folder, v.get(f"PROJ ({lib})", ""), dbs.get(lib, ""))]
    out = []  # a record without proj.db versions (an older record): the cautious rules
    if ras and pyp and not _same_dir(ras, pyp):
        out.append(f"two PROJ data directories: rasterio searches {ras}, pyproj uses {pyp}; rasters and "
                   "vectors may be reprojected with different CRS databases. With pip: unset PROJ_DATA and "
                   "PROJ_LIB if set, and run wetlandflow doctor again, which then checks that each wheel "
                   "reads the proj.db of its own PROJ (pip install --upgrade rasterio pyproj brings current "
                   "wheels).")
    a, b = v.get("PROJ (rasterio)"), v.get("PROJ (pyproj)")
    if a and b and a != b:
        out.append(f"two PROJ libraries are loaded: PROJ {a} by rasterio and PROJ {b} by pyproj; a CRS "
                   "transformation may differ between them. With pip: pip install --upgrade rasterio pyproj "
                   "(wheels of the same release period bundle close PROJ versions), and run wetlandflow "
                   "doctor again to see whether each reads its own data.")
    return out


def _env_problems(env: Mapping[str, str]) -> list[str]:
    out = []
    for var in ENV_DIRS:
        value = env.get(var)
        if value is None:
            continue
        missing = [p for p in value.split(os.pathsep) if p and not Path(p).is_dir()]
        if missing or not value.strip():
            out.append(f"{var} is set to {value!r}, but {', '.join(missing) or 'that'} is not an existing "
                       f"folder; point it at the folder that holds "
                       f"{'proj.db' if var.startswith('PROJ') else 'the GDAL data files'}. {_pip_unset(var)}")
        elif var.startswith("PROJ") and not any((Path(p) / "proj.db").is_file()
                                                for p in value.split(os.pathsep) if p):
            out.append(f"{var} is set to {value!r}, which holds no proj.db; point it at the folder of the "
                       f"proj.db that matches the loaded PROJ. {_pip_unset(var)}")
    return out


def _pip_unset(var: str) -> str:
    return (f"With pip: unset {var} (unset {var} in the shell; on Windows set {var}=), as the rasterio and "
            "pyproj wheels find the data they bundle.")


def _distribution_problems(names: set[str]) -> list[str]:
    out = []
    for group in EXCLUSIVE_DISTRIBUTIONS:
        both = [n for n in group if n in names]
        if len(both) > 1:
            out.append(f"both {' and '.join(both)} are installed; they provide the same package and overwrite "
                       f"each other's files. With pip: uninstall both, then install one (pip uninstall -y "
                       f"{' '.join(both)} && pip install {both[-1]}).")
    return out


def format_report(info: Mapping[str, Any], problems: list[str], env: Mapping[str, str],
                  notes: Iterable[str] = ()) -> str:
    """The printed text: versions, PROJ data folders, information, then the problems found (or that none
    were)."""
    width = max(len(k) for k in info["versions"])
    lines = ["wetlandflow doctor: the geospatial stack as loaded", ""]
    lines += [f"  {k:<{width}}  {v}" for k, v in info["versions"].items()]
    lines += ["", "PROJ data directories:"]
    dbs = info.get("proj_db", {})
    lines += [f"  {k:<{width}}  {v or '(not found)'}"
              + (f"  (proj.db of PROJ {dbs[k] or '?'})" if k in dbs else "")
              for k, v in info["proj_data"].items()]
    lines += ["", "Environment:"]
    lines += [f"  {k:<{width}}  {env.get(k, '(unset)')}" for k in ENV_DIRS]
    notes = list(notes)
    if notes:
        lines += ["", "Information (not a problem):"] + [f"  - {n}" for n in notes]
    lines += [""] + ([f"{len(problems)} problem(s):"] + [f"  - {p}" for p in problems] if problems
                     else ["No known conflict found."])
    return "\n".join(lines)


def doctor_report() -> tuple[str, list[str]]:
    """Inspect this process's stack; return the printable report and the list of problems found.

    Examples
    --------
    >>> text, problems = doctor_report()   # doctest: +SKIP
    >>> print(text)                        # doctest: +SKIP
    """
    info = stack_info()
    problems = find_problems(info, os.environ, installed_distributions())
    return format_report(info, problems, os.environ, find_notes(info)), problems
