"""Reading and writing: lazily in, atomically out.

Every final output is written to a temporary name in the same folder and then
renamed (``os.replace`` is atomic on one filesystem), so a file with a final
name is always a finished file, whatever interrupts the run.
"""

from __future__ import annotations

import contextlib
import glob
import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputFileError, OutputError


def sha256_file(path: str | Path, *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes (or of every file below a folder, in sorted order)."""
    path = Path(path)
    h = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for p in files:
        if path.is_dir():
            h.update(str(p.relative_to(path)).encode())
        with open(p, "rb") as fh:
            while block := fh.read(chunk):
                h.update(block)
    return h.hexdigest()


@contextlib.contextmanager
def atomic_path(final: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``final``; rename it to ``final`` only on success.

    Works for files and for folders (Zarr stores).  On error the temporary is removed.  After a
    successful rename, temporaries of the same final name that a killed process (SIGKILL, power loss)
    could not remove are deleted: a run folder has one writer, so they can only be stale.
    """
    final = Path(final)
    final.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".partial", dir=final.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    tmp.unlink()
    try:
        yield tmp
        if final.is_dir():
            # a folder cannot be replaced in one rename: move the old one aside first, so that a kill at
            # any moment leaves either the old or the new folder under the final name, never half of one
            os.replace(final, tmp.with_name(tmp.name.replace(".partial", ".old.partial")))
        os.replace(tmp, final)
        _remove_stale_temporaries(final)
    except BaseException:
        if tmp.is_dir():
            shutil.rmtree(tmp, ignore_errors=True)
        elif tmp.exists():
            tmp.unlink()
        raise


def _remove_stale_temporaries(final: Path) -> None:
    for stale in final.parent.glob(f".{glob.escape(final.name)}.*.partial"):
        if stale.is_dir():
            shutil.rmtree(stale, ignore_errors=True)
        else:
            stale.unlink(missing_ok=True)


def write_json(obj: Any, path: str | Path) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(obj, indent=2, sort_keys=True, default=_json_default) + "\n", encoding="utf-8")
    return Path(path)


def _json_default(o: Any) -> Any:
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    return str(o)


def write_table(df: Any, path: str | Path) -> Path:
    """Write a DataFrame as Parquet or CSV (by suffix), atomically."""
    path = Path(path)
    with atomic_path(path) as tmp:
        if path.suffix == ".parquet":
            df.to_parquet(tmp, index=False)
        elif path.suffix == ".csv":
            df.to_csv(tmp, index=False)
        else:
            raise ValueError(f"unsupported table format {path.suffix!r}; use .parquet or .csv")
    return path


def write_vector(gdf: Any, path: str | Path, *, layer: str) -> Path:
    """Write a GeoDataFrame as a GeoPackage layer, atomically."""
    path = Path(path)
    with atomic_path(path) as tmp:
        gdf.to_file(tmp.with_suffix(".gpkg"), layer=layer, driver="GPKG")
        os.replace(tmp.with_suffix(".gpkg"), tmp)
    return path


def read_vector(path: str | Path, *, layer: str | None = None, what: str = "vector file") -> Any:
    """Read a vector file with geopandas, with a clear error if it cannot be read."""
    import geopandas as gpd

    try:
        gdf = gpd.read_file(path, layer=layer or None)
    except Exception as exc:
        raise InputFileError(f"cannot read the {what} ({exc}); save it again as a vector format GDAL reads "
                             "(GeoPackage, shapefile, GeoJSON) and check the path and layer name",
                             path=str(path)) from None
    if gdf.crs is None:
        raise InputFileError(f"the {what} has no CRS; assign one (e.g. in a GIS) and save again", path=str(path))
    return gdf


def check_writable(folder: str | Path) -> Path:
    """Create ``folder`` if needed and prove it is writable, or raise :class:`OutputError`."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".write-test-"):
            pass
    except OSError as exc:
        raise OutputError(
            f"the run folder {folder} is not writable ({exc.strerror}); choose another project.output_dir"
        ) from None
    return folder


def check_disk_space(folder: str | Path, needed_bytes: int) -> None:
    """Refuse to start writing when the disk has less room than the outputs need."""
    free = shutil.disk_usage(Path(folder)).free
    if free < needed_bytes:
        raise OutputError(
            f"not enough disk space in {folder}: the outputs need about {needed_bytes / 1e9:.2f} GB, "
            f"{free / 1e9:.2f} GB free; free some space or choose another project.output_dir"
        )


def write_figure(fig: Any, path: str | Path, *, dpi: int = 110) -> Path:
    """Save a matplotlib Figure as PNG, atomically."""
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=dpi)
    return Path(path)
