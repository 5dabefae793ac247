"""Scene tables of the project file expanded into one entry per acquisition.

An ``[[optical]]`` or ``[[sar]]`` table describes its files in one of four ways:

* ``path``: one multi-band file of one date (``date`` given);
* ``files``: one file per band or polarisation of one date, ``{red = "..._B04.tif", nir = "..._B08.tif"}``;
* ``pattern``: a file-name pattern relative to the project file with ``{date}`` and optionally ``{band}``
  (band or polarisation) and ``{orbit}`` placeholders, e.g. ``"sar/S1_{date}_{band}.tif"``; the date is
  parsed with ``date_format`` (strftime codes, default ``%Y%m%d``);
* ``list``: a CSV scene list with columns ``date``, ``path`` and optionally ``band`` (or ``polarisation``)
  and ``orbit``; relative paths are taken from the CSV's folder.

Files of one date (and orbit) found by a pattern or a list are grouped into one scene: one file per band
when a band is named, else one multi-band file per row.  Every other key of the table (``units``,
``scale``, ``sensor`` ...) applies to every scene it expands to.  A ``sensor`` name fills in the keys its
description provides (:mod:`.sensors`) unless the table sets them.
"""

from __future__ import annotations

import csv
import datetime as dt
import re
from pathlib import Path
from typing import Any

from ..errors import ProjectFileError
from .sensors import BAND_NAMES, SCENE_DEFAULT_KEYS, Sensor, resolve_sensor, sensor_from_table

LAYOUT_KEYS = ("path", "files", "pattern", "list")
_PLACEHOLDER = re.compile(r"\{(date|band|orbit)\}")


def _band_name(value: str, kind: str, key: str) -> str:
    vocab = ("VV", "VH", "HH", "HV") if kind == "sar" else BAND_NAMES
    norm = value.upper() if kind == "sar" else value.lower()
    if norm not in vocab:
        raise ProjectFileError(
            f"band {value!r} is not one of {', '.join(vocab)} (the portable names); "
            "rename the files or use a CSV scene list with a band column",
            key=key,
        )
    return norm


def _parse_date(text: str, fmt: str, key: str, source: str) -> dt.date:
    for f in (fmt, "%Y-%m-%d"):
        try:
            return dt.datetime.strptime(text, f).date()
        except ValueError:
            continue
    raise ProjectFileError(
        f"cannot read a date from {text!r} in {source} with date_format = {fmt!r} "
        "(strftime codes, e.g. '%Y%m%d' for 20240514); fix date_format",
        key=key,
    )


def _pattern_rows(table: dict[str, Any], root: Path, key: str) -> list[dict[str, str]]:
    pattern = table["pattern"]
    if not isinstance(pattern, str) or "{date}" not in pattern:
        raise ProjectFileError(
            f"a pattern names the date's place in the file names with {{date}}, e.g. "
            f"'sar/S1_{{date}}_{{band}}.tif'; got {pattern!r}",
            key=f"{key}.pattern",
        )
    # the folders before the first placeholder are fixed: resolved first, so "../x/{date}.tif" and absolute
    # patterns work (Path.glob takes neither)
    pieces = pattern.split("/")
    first = next(k for k, piece in enumerate(pieces) if _PLACEHOLDER.search(piece))
    base = (root / ("/".join(pieces[:first]) or ".")).resolve()
    rest = "/".join(pieces[first:])
    glob = _PLACEHOLDER.sub("*", rest)
    parts, pos = [], 0
    for m in _PLACEHOLDER.finditer(rest):
        parts.append(re.escape(rest[pos : m.start()]))
        parts.append(
            f"(?P<{m.group(1)}>[^/]+?)" if m.group(1) not in rest[: m.start()] else f"(?P={m.group(1)})"
        )
        pos = m.end()
    regex = re.compile("".join(parts) + re.escape(rest[pos:]) + "$")
    rows = []
    for path in sorted(base.glob(glob)):
        m = regex.match(path.relative_to(base).as_posix())
        if m:
            rows.append({"path": str(path), **m.groupdict()})
    if not rows:
        raise ProjectFileError(
            f"no file matches the pattern {pattern!r} (searched {glob!r} in {base}); check the folder, the file names and the placeholders",
            key=f"{key}.pattern",
        )
    return rows


def _list_rows(table: dict[str, Any], root: Path, key: str) -> list[dict[str, str]]:
    listed = table["list"]
    if not isinstance(listed, str):
        raise ProjectFileError(f"expected the path of a CSV scene list, got {listed!r}", key=f"{key}.list")
    path = (root / listed).resolve()
    if not path.exists():
        raise ProjectFileError(
            f"scene list not found: {path}; relative paths are resolved against the project file's folder",
            key=f"{key}.list",
        )
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        cols = {c.strip().lower(): c for c in (reader.fieldnames or [])}
        rows = list(reader)
    band_col = cols.get("band") or cols.get("polarisation") or cols.get("polarization") or cols.get("pol")
    if "date" not in cols or "path" not in cols:
        raise ProjectFileError(
            f"the scene list {path.name} needs columns date and path (optionally band or "
            f"polarisation, and orbit); it has {list(cols)}",
            key=f"{key}.list",
        )
    out = []
    for r in rows:
        p = Path(r[cols["path"]].strip())
        out.append(
            {
                "path": str(p if p.is_absolute() else (path.parent / p).resolve()),
                "date": r[cols["date"]].strip(),
                "band": (r[band_col] or "").strip() if band_col else "",
                "orbit": (r[cols["orbit"]] or "").strip() if "orbit" in cols else "",
            }
        )
    if not out:
        raise ProjectFileError(f"the scene list {path.name} has no rows", key=f"{key}.list")
    return out


def _group(
    rows: list[dict[str, str]], table: dict[str, Any], kind: str, key: str, source: str, user_bands: bool
) -> list[dict]:
    """One scene table per (date, orbit): per-band files grouped, multi-band files one each."""
    fmt = table.get("date_format", "%Y%m%d")
    common = {
        k: v for k, v in table.items() if k not in ("pattern", "list", "date_format", "path", "files", "date")
    }
    scenes: dict[tuple, dict] = {}
    singles = []
    for r in rows:
        date = _parse_date(r["date"], fmt, f"{key}.date_format", source)
        orbit = (r.get("orbit") or "").lower()
        extra = {"orbit": orbit} if kind == "sar" and orbit else {}
        if r.get("band"):
            band = _band_name(r["band"], kind, f"{key}.{'pattern' if 'pattern' in table else 'list'}")
            scene = scenes.setdefault(
                (date, orbit), {**common, **extra, "date": date.isoformat(), "files": {}}
            )
            if band in scene["files"]:
                raise ProjectFileError(
                    f"two files for band {band} on {date}: {scene['files'][band]} and {r['path']}; keep one",
                    key=key,
                )
            scene["files"][band] = r["path"]
        else:
            singles.append({**common, **extra, "date": date.isoformat(), "path": r["path"]})
    for scene in scenes.values():
        if not user_bands:
            order = ("VV", "VH", "HH", "HV") if kind == "sar" else BAND_NAMES
            scene["bands"] = [b for b in order if b in scene["files"]]
    return sorted([*scenes.values(), *singles], key=lambda s: s["date"])


def expand_scene_tables(tables: Any, kind: str, root: Path, sensors: dict[str, Sensor], *,
                        key: str = "") -> list[dict]:
    """Raw ``[[optical]]`` / ``[[sar]]`` tables -> one raw table per acquisition (then validated as usual).

    ``key`` is the tables' key path in messages (default ``kind``; ``monitor.optical`` for an archive).
    """
    where = key or kind
    if not isinstance(tables, list):
        raise ProjectFileError(f"expected a list of [[{where}]] tables, got {tables!r}", key=where)
    out: list[dict] = []
    for i, table in enumerate(tables):
        key = f"{where}[{i}]"
        if not isinstance(table, dict):
            raise ProjectFileError(f"expected a table, got {table!r}", key=key)
        # a table written back from a resolved project (to_dict) carries the unused keys empty
        table = {
            k: v
            for k, v in table.items()
            if not (v is None or (k == "sensor" and v == "") or (k == "files" and v == {}))
        }
        user_bands = "bands" in table
        if kind == "optical" and "sensor" in table:
            sensor = resolve_sensor(table["sensor"], sensors, key=f"{key}.sensor")
            table = {**{k: v for k, v in sensor.scene_defaults().items() if k in SCENE_DEFAULT_KEYS}, **table}
        layouts = [k for k in LAYOUT_KEYS if k in table]
        if len(layouts) != 1:
            raise ProjectFileError(
                f"give exactly one of path (one multi-band file), files (one file per band), pattern "
                f"(file-name "
                f"pattern with {{date}}) or list (CSV scene list); found {layouts or 'none'}",
                key=key,
            )
        if "date_format" in table and layouts[0] not in ("pattern", "list"):
            raise ProjectFileError(
                "date_format applies to a pattern or a list only", key=f"{key}.date_format"
            )
        if layouts[0] == "files":
            files = table["files"]
            if not isinstance(files, dict) or not files:
                raise ProjectFileError(
                    f'files maps each band to its file, e.g. {{red = "x_B04.tif"}}; got {files!r}',
                    key=f"{key}.files",
                )
            table["files"] = {_band_name(b, kind, f"{key}.files.{b}"): f for b, f in files.items()}
            if not user_bands:
                table["bands"] = list(table["files"])
            out.append(table)
        elif layouts[0] in ("pattern", "list"):
            if "date" in table:
                raise ProjectFileError(
                    "the date comes from the file names or the list; remove date", key=f"{key}.date"
                )
            rows = (
                _pattern_rows(table, root, key) if layouts[0] == "pattern" else _list_rows(table, root, key)
            )
            out += _group(rows, table, kind, key, table.get(layouts[0]), user_bands)
        else:
            out.append(table)
    return out


def inline_sensors(table: Any) -> dict[str, Sensor]:
    """The ``[sensors]`` table of a project file as :class:`Sensor` descriptions."""
    if table is None:
        return {}
    if not isinstance(table, dict):
        raise ProjectFileError(f"expected [sensors.<name>] tables, got {table!r}", key="sensors")
    return {name: sensor_from_table(name, t, key=f"sensors.{name}") for name, t in table.items()}


def sensor_of(project: Any, scene: Any) -> Sensor | None:
    """The description of an optical scene's ``sensor`` (inline or shipped), or None when it names none."""
    if not getattr(scene, "sensor", ""):
        return None
    return resolve_sensor(scene.sensor, inline_sensors(project.sensors), key="sensor")
