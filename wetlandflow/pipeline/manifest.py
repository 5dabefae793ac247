"""The run's manifest: its account of itself, and the checks before a step done earlier is reused.

``manifest.json`` records the inputs with their hashes, the parameters, the library versions and, per
step, its status, seconds, cache key and the fingerprints of what it wrote and used; it is rewritten
(atomically) after every step, so an interrupted run leaves an honest account of what finished.
"""

from __future__ import annotations

import datetime as dt
import platform
import sys
import time
from collections.abc import Callable, Sequence
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import CAUTION, __version__
from ..errors import Cancelled
from ..inputs.io import disk_full_error, fingerprint, write_json
from ..inputs.project import Project, config_hash, to_dict


class Manifest:
    """The run's account of itself, rewritten after every step.

    A step done by an earlier run in the folder is reused only when its key (everything it depends on) is
    the same and its outputs and the upstream outputs it used still have the fingerprints recorded when it
    finished (:func:`~wetlandflow.inputs.io.fingerprint`); otherwise it reruns, and the reason is printed
    and kept in the step's record (``rerun_because``).
    """

    def __init__(self, run_dir: Path, project: Project, check: Callable[[], None] | None = None, *,
                 progress: bool = False):
        self.path = run_dir / "manifest.json"
        self.progress = progress  # a line on stderr when a step starts, ends (with its seconds) or is reused
        self.run_dir = run_dir
        self.check = check or (lambda: None)
        self.data: dict[str, Any] = {
            "wetlandflow": __version__,
            "started": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
            "project_file": project.file.name,
            "project": to_dict(project),
            "config_sha256": config_hash(project),
            "seed": project.project.seed,
            "versions": library_versions(),
            "inputs": {},
            "steps": {},
            "plausibility_warnings": [],  # inputs that are valid but look wrong (step, message)
            "command": f"wetlandflow run {project.file.name}",
            "caution": CAUTION,
        }
        self.previous = _previous_manifest(self.path)
        self._fingerprints: dict[str, str] = {}
        self._rerun: dict[str, list[str]] = {}

    def _rel(self, path: Path) -> str:
        return Path(path).relative_to(self.run_dir).as_posix()

    def fingerprints(self, paths: list[Path], *, fresh: bool = False) -> dict[str, str]:
        """Fingerprints of run-folder outputs by relative path (computed once per run unless ``fresh``)."""
        out = {}
        for p in paths:
            rel = self._rel(p)
            if fresh or rel not in self._fingerprints:
                self._fingerprints[rel] = fingerprint(p)
            out[rel] = self._fingerprints[rel]
        return out

    def reusable(self, name: str, key: str, outputs: list[Path], *, uses: Sequence[Path] = (),
                 verify: Callable[[], list[str]] | None = None) -> bool:
        """True, with the earlier record carried over, when the last run finished this step with the same
        key and its ``outputs`` and the upstream ``uses`` still have their recorded fingerprints (and
        ``verify()``, when given, finds nothing wrong); the step is then not recomputed.  A done step that
        fails these checks reruns: the reason is printed and recorded."""
        prev = self.previous.get("steps", {}).get(name, {})
        if prev.get("status") != "done" or prev.get("key") != key:
            return False
        reasons = [f"{self._rel(o)} is missing" for o in outputs if not Path(o).exists()]
        recorded = prev.get("fingerprints")
        if not reasons and not isinstance(recorded, dict):
            reasons.append("the earlier run recorded no fingerprints of its outputs to check them against")
        if not reasons:
            paths = [*outputs, *(u for u in uses if Path(u).exists())]
            for rel, fp in self.fingerprints(paths).items():
                if recorded.get(rel) != fp:
                    what = "output" if rel in {self._rel(o) for o in outputs} else "input"
                    reasons.append(f"its {what} {rel} changed since the step wrote or used it "
                                   f"(fingerprint {str(recorded.get(rel))[:19]}..., now {fp[:19]}...)")
        if not reasons and verify is not None:
            reasons += verify()
        if reasons:
            self._rerun[name] = reasons
            print(f"wetlandflow: rerunning step '{name}' instead of reusing it: {'; '.join(reasons)}",
                  file=sys.stderr, flush=True)
            return False
        self.data["steps"][name] = {**prev, "reused": True}
        self.save()
        from ..progress import say

        say(f"{name}: reused from the earlier run (done there in {prev.get('seconds', 0):.1f} s)",
            enabled=self.progress)
        return True

    @contextmanager
    def step(self, name: str, key: str = "", *, outputs: Sequence[Path] = (), uses: Sequence[Path] = ()):
        """Record a step: running, then done, failed or cancelled (with the error), with its seconds.

        On success the fingerprints of ``outputs`` (and of the upstream ``uses``) are recorded, for the
        check before a later run reuses the step.  A disk that fills (or a file-size limit) becomes one
        :class:`~wetlandflow.errors.OutputError` naming the file, this step and the free space.
        """
        self.check()  # a cancel point: between steps nothing is half-written
        rec: dict[str, Any] = {"status": "running", "started": time.time(), "key": key}
        if name in self._rerun:
            rec["rerun_because"] = self._rerun.pop(name)
        self.data["steps"][name] = rec
        self.save()
        from ..progress import done_text, say

        say(f"{name} ...", enabled=self.progress)
        t0 = time.perf_counter()
        try:
            yield rec
            rec["fingerprints"] = {**self.fingerprints([u for u in uses if Path(u).exists()]),
                                   **self.fingerprints(list(outputs), fresh=True)}
        except BaseException as exc:
            error = disk_full_error(exc, self.run_dir, step=name)
            rec.update(status="cancelled" if isinstance(exc, Cancelled) else "failed",
                       error=f"{type(error or exc).__name__}: {error or exc}")
            rec["seconds"] = round(time.perf_counter() - t0, 3)
            with suppress(OSError):  # a full disk may refuse the manifest too; the error still says what
                self.save()
            say(f"{name}: {rec['status']} after {rec['seconds']:.1f} s", enabled=self.progress)
            if error is not None:
                raise error from None
            raise
        rec.update(status="done", seconds=round(time.perf_counter() - t0, 3))
        self.save()
        say(f"{name}: {done_text(rec['seconds'])}", enabled=self.progress)

    def save(self) -> None:
        write_json(self.data, self.path)


def _previous_manifest(path: Path) -> dict[str, Any]:
    """The manifest an earlier run left in this folder (empty when there is none or it is unreadable)."""
    import json

    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return {}


def step_key(*parts: Any) -> str:
    """The cache key of a step: SHA-256 of everything it depends on (config, upstream keys, file hashes)."""
    import hashlib
    import json

    text = json.dumps([__version__, *parts], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:20]


def library_versions() -> dict[str, str]:
    """Versions of the libraries actually loaded, including the GDAL and PROJ behind rasterio and pyproj."""
    import dask
    import geopandas
    import numba
    import pyproj
    import rasterio
    import shapely
    import sklearn
    import xarray
    import xgboost
    import zarr

    return {"python": platform.python_version(), "numpy": np.__version__, "pandas": pd.__version__,
            "xarray": xarray.__version__, "dask": dask.__version__, "zarr": zarr.__version__,
            "numba": numba.__version__, "rasterio": rasterio.__version__, "gdal": rasterio.__gdal_version__,
            "proj (rasterio)": getattr(rasterio, "__proj_version__", "unknown"), "pyproj": pyproj.__version__,
            "proj (pyproj)": pyproj.proj_version_str, "geopandas": geopandas.__version__,
            "shapely": shapely.__version__, "geos": shapely.geos_version_string,
            "scikit-learn": sklearn.__version__, "xgboost": xgboost.__version__}
