"""``wetlandflow doctor``: the geospatial stack as actually loaded, and known conflicts.

Wheels of rasterio and pyproj each bundle their own PROJ library and PROJ data
(``proj.db``); a conda or system install may bring a third.  Reprojecting
rasters (GDAL through rasterio) and vectors (pyproj) with different PROJ
versions or databases can give different results for the same CRS, and an
environment variable pointing to a missing or foreign data folder breaks CRS
lookups outright.  :func:`stack_info` records what is loaded;
:func:`find_problems` is a pure function of that record, the environment and
the installed distribution names, so each rule is testable on its own.
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
    return {"versions": versions, "proj_data": proj_data}


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

    Each problem is one sentence saying what is wrong, what was found and how to fix it.
    """
    return (_proj_problems(info) + _env_problems(env)
            + _distribution_problems({_norm(d) for d in distributions}))


def _proj_problems(info: Mapping[str, Any]) -> list[str]:
    out = []
    data = info.get("proj_data", {})
    ras, pyp = data.get("rasterio", ""), data.get("pyproj", "")
    if ras and pyp and _real(ras.split(os.pathsep)[0]) != _real(pyp):
        out.append(f"two PROJ data directories: rasterio searches {ras}, pyproj uses {pyp}; rasters and "
                   "vectors may be reprojected with different CRS databases. Install rasterio and pyproj from "
                   "one source (both wheels of matching PROJ, or both from the same conda channel), and do not "
                   "point PROJ_DATA or PROJ_LIB at one library's folder for the other.")
    v = info.get("versions", {})
    a, b = v.get("PROJ (rasterio)"), v.get("PROJ (pyproj)")
    if a and b and a != b:
        out.append(f"two PROJ libraries are loaded: PROJ {a} by rasterio and PROJ {b} by pyproj; a CRS "
                   "transformation may differ between them. Install versions of rasterio and pyproj built "
                   "against the same PROJ.")
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
                       f"folder; unset {var} (the libraries find their own data) or point it at the folder "
                       f"that holds {'proj.db' if var.startswith('PROJ') else 'the GDAL data files'}.")
        elif var.startswith("PROJ") and not any((Path(p) / "proj.db").is_file() for p in value.split(os.pathsep)
                                                if p):
            out.append(f"{var} is set to {value!r}, which holds no proj.db; unset {var} or point it at the "
                       "folder of the proj.db that matches the loaded PROJ.")
    return out


def _distribution_problems(names: set[str]) -> list[str]:
    out = []
    for group in EXCLUSIVE_DISTRIBUTIONS:
        both = [n for n in group if n in names]
        if len(both) > 1:
            out.append(f"both {' and '.join(both)} are installed; they provide the same package and overwrite "
                       f"each other's files. Uninstall both, then install one (pip uninstall -y "
                       f"{' '.join(both)} && pip install {both[-1]}).")
    return out


def format_report(info: Mapping[str, Any], problems: list[str], env: Mapping[str, str]) -> str:
    """The printed text: versions, PROJ data folders, then the problems found (or that none were)."""
    width = max(len(k) for k in info["versions"])
    lines = ["wetlandflow doctor: the geospatial stack as loaded", ""]
    lines += [f"  {k:<{width}}  {v}" for k, v in info["versions"].items()]
    lines += ["", "PROJ data directories:"]
    lines += [f"  {k:<{width}}  {v or '(not found)'}" for k, v in info["proj_data"].items()]
    lines += ["", "Environment:"]
    lines += [f"  {k:<{width}}  {env.get(k, '(unset)')}" for k in ENV_DIRS]
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
    return format_report(info, problems, os.environ), problems
