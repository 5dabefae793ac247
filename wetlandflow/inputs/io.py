"""Reading and writing: lazily in, atomically out.

Every final output is written to a temporary name in the same folder and then
renamed (``os.replace`` is atomic on one filesystem), so a file with a final
name is always a finished file, whatever interrupts the run.
"""

from __future__ import annotations

import contextlib
import errno
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


# Files up to this size are hashed in full; larger files and stores get the cheap fingerprint.
FULL_HASH_LIMIT = 64 << 20
_SAMPLE_BLOCK = 1 << 16
_SAMPLED_FILES = 32


def fingerprint(path: str | Path, *, full_limit: int = FULL_HASH_LIMIT) -> str:
    """A fingerprint of a file or a folder (Zarr store, model bundle) that changes when its content does.

    Up to ``full_limit`` bytes in total: ``"sha256:<hex>"``, the SHA-256 of every byte (of every file, with
    its relative name, for a folder; as :func:`sha256_file`).  Beyond: ``"sampled:<hex>"``, a SHA-256 over
    the name and size of every file, the whole of every metadata file (Zarr ``.z*``/``zarr.json``, JSON)
    and of up to 32 chunk files spread evenly over the sorted list, and for a single large file its first
    and last 64 KiB and 32 blocks of 64 KiB spread evenly between.  The sampled kind cannot see a change
    confined to bytes it does not read; it does see any change of size, metadata, or of the sampled parts.
    """
    path = Path(path)
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    sizes = [p.stat().st_size for p in files]
    if sum(sizes) <= full_limit:
        return "sha256:" + sha256_file(path)
    h = hashlib.sha256()
    if not path.is_dir():
        _hash_sampled(h, path, sizes[0])
        return "sampled:" + h.hexdigest()
    meta = [p for p in files if p.name.startswith(".z") or p.name == "zarr.json" or p.suffix == ".json"]
    chunks = [(p, size) for p, size in zip(files, sizes, strict=True) if p not in set(meta)]
    pick = {int(i) for i in np.linspace(0, len(chunks) - 1, min(_SAMPLED_FILES, len(chunks)))}
    for p, size in zip(files, sizes, strict=True):
        h.update(f"{p.relative_to(path)}\0{size}\0".encode())
    for i, (p, size) in enumerate(chunks):
        if i in pick:
            _hash_sampled(h, p, size)
    for p in meta:
        h.update(p.read_bytes())
    return "sampled:" + h.hexdigest()


def _hash_sampled(h: Any, path: Path, size: int) -> None:
    """Feed ``h`` a file's size and bytes: all of them for a small file, else evenly spread blocks."""
    h.update(str(size).encode())
    if size <= _SAMPLE_BLOCK * (_SAMPLED_FILES + 2):
        h.update(path.read_bytes())
        return
    offsets = np.unique(np.linspace(0, size - _SAMPLE_BLOCK, _SAMPLED_FILES + 2).astype(np.int64))
    with open(path, "rb") as fh:
        for off in offsets:
            fh.seek(int(off))
            h.update(fh.read(_SAMPLE_BLOCK))


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
        try:
            yield tmp
        except BaseException as exc:
            error = disk_full_error(exc, final.parent, path=final)
            if error is None:
                raise
            raise error from exc
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
        gpkg = tmp.with_suffix(".gpkg")  # GDAL wants the suffix; removed below if the write fails
        try:
            gdf.to_file(gpkg, layer=layer, driver="GPKG")
            os.replace(gpkg, tmp)
        finally:
            gpkg.unlink(missing_ok=True)
    return path


def vector_layers(path: str | Path) -> list[str]:
    """The layer names of a vector file ([] when they cannot be listed: the read then reports the problem)."""
    try:
        import pyogrio

        return [str(name) for name in pyogrio.list_layers(path)[:, 0]]
    except Exception:
        return []


def read_vector(path: str | Path, *, layer: str | None = None, what: str = "vector file",
                key: str | None = None) -> Any:
    """Read a vector file with geopandas, with a clear error if it cannot be read.

    A file with several layers (a GeoPackage often has) must be read with a named ``layer``: taking the
    first one silently may read the wrong data.  ``key`` is the project-file key that names the layer
    (``plots.layer``), for the message.
    """
    import geopandas as gpd

    layers = vector_layers(path)
    set_it = f"set {key} in the project file" if key else "name the layer"
    if not layer and len(layers) > 1:
        raise InputFileError(f"the {what} holds {len(layers)} layers ({', '.join(sorted(layers))}) and no "
                             "layer is named; "
                             f"{set_it} to the one to read (e.g. {key or 'layer'} = {sorted(layers)[0]!r})",
                             path=str(path))
    if layer and layers and layer not in layers:
        raise InputFileError(f"the {what} has no layer {layer!r}; its layers are {', '.join(layers)}. "
                             f"Correct {key or 'the layer name'}", path=str(path))
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


DISK_FULL_ERRNOS = frozenset({errno.ENOSPC, errno.EFBIG, getattr(errno, "EDQUOT", errno.ENOSPC)})
_DISK_FULL_TEXT = ("no space left on device", "file too large", "disk quota exceeded",
                   "free disk space available")


_RESUME = "steps already finished are kept and a rerun resumes after them"


def _disk_full_cause(exc: BaseException) -> BaseException | None:
    """The exception in ``exc``'s chain that says the disk is full or a file outgrew its limit, if any."""
    seen: set[int] = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        if isinstance(exc, OSError) and exc.errno in DISK_FULL_ERRNOS:
            return exc
        if any(t in str(exc).lower() for t in _DISK_FULL_TEXT):  # GDAL reports it in its message only
            return exc
        exc = exc.__cause__ or exc.__context__
    return None


def _free_space(folder: Path) -> str:
    for f in (folder, *folder.parents):
        with contextlib.suppress(OSError):
            free = shutil.disk_usage(f).free
            return f"{free / 1e9:.2f} GB" if free >= 1e8 else f"{free / 1e6:.1f} MB"
    return "unknown"


def disk_full_error(exc: BaseException, folder: str | Path | None, *, path: str | Path | None = None,
                    step: str | None = None) -> OutputError | None:
    """The package's :class:`OutputError` for an error that means "the disk is full" (or that a file reached
    the file-size limit, ``ulimit -f``), naming the file, the step and the free space; ``None`` for any
    other error.  An error already converted is converted again only to add the step."""
    if isinstance(exc, OutputError) and getattr(exc, "disk_full", None) is not None:
        if step is None or exc.disk_full.get("step"):
            return None
        info = {**exc.disk_full, "step": step}
    else:
        cause = _disk_full_cause(exc)
        if cause is None:
            return None
        target = path or getattr(cause, "filename", None)
        where = Path(target).parent if target else Path(folder) if folder is not None else Path.cwd()
        reason = (cause.strerror if isinstance(cause, OSError) and cause.strerror else str(cause)).strip()
        info = {"path": str(target) if target else None, "folder": str(where), "reason": reason, "step": step,
                "free": _free_space(where)}
    what = f"could not write {info['path']}" if info["path"] else f"could not write to {info['folder']}"
    during = f" in step '{info['step']}'" if info["step"] else ""
    error = OutputError(
        f"{what}{during}: the disk is full or the file reached the file-size limit ({info['reason']}); "
        f"{info['free']} free on the disk of {info['folder']}. Free some space (or raise the file-size "
        f"limit, `ulimit -f`), or choose another [project] output_dir with more room; {_RESUME}",
        path=info["path"])
    error.disk_full = info
    return error


def file_size_limit() -> int | None:
    """This process's limit on the size of a file it writes (``ulimit -f``, RLIMIT_FSIZE), or None."""
    try:
        import resource
    except ImportError:  # pragma: no cover - not POSIX
        return None
    soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
    return None if soft == resource.RLIM_INFINITY else int(soft)


def check_file_size_limit(folder: str | Path, sizes: dict[str, int], *, step: str) -> None:
    """Refuse, before writing, a file that would outgrow the file-size limit (``ulimit -f``).

    GDAL reports a failed block write of a GeoTIFF only on standard error, not to the caller, so a map
    cut short by the limit would otherwise pass unseen: the run checks its largest rasters first.
    ``sizes`` maps each file (relative to ``folder``) to the bytes it needs.
    """
    limit = file_size_limit()
    if limit is None:
        return
    over = {name: n for name, n in sizes.items() if n > limit}
    if not over:
        return
    name, needed = max(over.items(), key=lambda kv: kv[1])
    folder = Path(folder)
    error = OutputError(
        f"could not write {folder / name} in step '{step}': it needs about {needed / 1e6:.1f} MB, above the "
        f"file-size limit of this process ({limit / 1e6:.1f} MB, `ulimit -f`); {_free_space(folder)} free on "
        f"the disk of {folder}. Raise the file-size limit (`ulimit -f unlimited` in the shell that starts "
        f"the run), or write the run folder from a process without that limit; {_RESUME}",
        path=str(folder / name))
    error.disk_full = {"path": str(folder / name), "folder": str(folder), "step": step,
                       "reason": "file-size limit", "free": _free_space(folder)}
    raise error


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
