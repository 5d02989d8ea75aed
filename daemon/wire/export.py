"""Exports of a replay for analysis elsewhere: NumPy ``.npz``, CSV, and JSON Lines.

An export holds three tables (:class:`ExportTables`), each a mapping of column name to array:

``estimates`` (one row per replayed estimate)
    ``frame``, ``time_s``, ``snr_db`` (frames x tones, dB, when the run kept it).
``decisions`` (one row per replayed estimate)
    ``frame``, ``time_s``, ``kind``, ``cause``, ``reason``, ``bits_per_symbol``, ``margin_db``,
    ``live_margin_db``, ``seq``, ``fallback``: what the controller did, the rule behind it, and
    the map in force after it.
``maps`` (one row per published map)
    ``seq``, ``frame``, ``time_s``, ``kind``, ``cause``, ``reason``, ``effective_frame``,
    ``total_bits``, ``margin_db``, ``gap_db``, ``fallback``, ``bits`` and ``power_lin``
    (maps x tones).

plus ``tone_index``, the data tones (signed FFT bins) that the per-tone columns follow.

Formats
-------
``.npz``: one array per column, named ``TABLE.COLUMN`` (``maps.bits``), and ``tone_index``;
text columns are NumPy unicode arrays, so ``np.load(path)`` needs no pickles.

CSV: three files beside the name given, ``NAME.estimates.csv``, ``NAME.decisions.csv`` and
``NAME.maps.csv``; a per-tone column becomes one CSV column per tone, headed
``COLUMN[TONE]`` (``snr_db[-100]``). Floats are written with Python's shortest round-trip
``repr`` (``nan``, ``inf`` as such), so reading back gives the same values.

JSON Lines (:func:`write_jsonl`): one JSON object per line, keys in the order given, non-finite
floats as ``null`` (strict JSON).
"""

from __future__ import annotations

import csv
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np

from brimline.daemon.errors import InputError

__all__ = ["ExportTables", "COLUMNS", "write_export", "read_export", "write_npz", "read_npz",
           "write_csv", "read_csv", "csv_paths", "write_jsonl", "json_safe"]

#: Column dtypes of each table; a 2-D column has one entry per tone.
COLUMNS: dict[str, dict[str, str]] = {
    "estimates": {"frame": "<i8", "time_s": "<f8", "snr_db": "<f4"},
    "decisions": {"frame": "<i8", "time_s": "<f8", "kind": "U", "cause": "U", "reason": "U",
                  "bits_per_symbol": "<i8", "margin_db": "<f8", "live_margin_db": "<f8",
                  "seq": "<i8", "fallback": "?"},
    "maps": {"seq": "<i8", "frame": "<i8", "time_s": "<f8", "kind": "U", "cause": "U",
             "reason": "U",
             "effective_frame": "<i8", "total_bits": "<i8", "margin_db": "<f8",
             "gap_db": "<f8", "fallback": "?", "bits": "|u1", "power_lin": "<f4"},
}
_PER_TONE = {("estimates", "snr_db"), ("maps", "bits"), ("maps", "power_lin")}
_TONE_COLUMN = re.compile(r"^(\w+)\[(-?\d+)\]$")


@dataclass(frozen=True)
class ExportTables:
    """The three tables of an export (see the module docstring) and the tone index.

    Attributes
    ----------
    tone_index : ndarray of int16
        Data tones, signed FFT bins; the per-tone columns follow this order.
    estimates, decisions, maps : dict of str to ndarray
        Column name -> array, each with the dtype of :data:`COLUMNS`. ``estimates`` may lack
        ``snr_db`` (the run did not keep it).
    """

    tone_index: np.ndarray
    estimates: dict
    decisions: dict
    maps: dict

    def __post_init__(self) -> None:
        object.__setattr__(self, "tone_index", np.asarray(self.tone_index, dtype=np.int16))
        n = self.tone_index.size
        for table in COLUMNS:
            cols = {}
            for name, arr in getattr(self, table).items():
                if name not in COLUMNS[table]:
                    raise ValueError(f"{table}.{name} is not a column of the export")
                dtype = COLUMNS[table][name]
                arr = np.asarray(arr, dtype=str if dtype == "U" else dtype)
                if (table, name) in _PER_TONE:
                    arr = arr.reshape(-1, n)
                cols[name] = arr
            object.__setattr__(self, table, cols)

    def table(self, name: str) -> dict:
        """The columns of table ``name`` (``estimates``, ``decisions`` or ``maps``)."""
        return getattr(self, name)


def write_export(path: str | Path, tables: ExportTables) -> list[Path]:
    """Write ``tables`` as ``.npz`` or CSV, chosen by the suffix of ``path``.

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    InputError
        A suffix other than ``.npz`` or ``.csv``, or a file that cannot be written.
    """
    p = Path(path)
    if p.suffix == ".npz":
        write_npz(p, tables)
        return [p]
    if p.suffix == ".csv":
        return write_csv(p, tables)
    raise InputError(f"--export {p}: name the file .npz or .csv")


def read_export(path: str | Path) -> ExportTables:
    """Read what :func:`write_export` wrote (``.npz``, or the CSV name given to it)."""
    p = Path(path)
    if p.suffix == ".npz":
        return read_npz(p)
    if p.suffix == ".csv":
        return read_csv(p)
    raise InputError(f"{p}: an export is a .npz or .csv file")


def write_npz(path: str | Path, tables: ExportTables) -> None:
    """Write ``tables`` to one ``.npz`` file (arrays ``TABLE.COLUMN`` and ``tone_index``)."""
    arrays = {"tone_index": tables.tone_index}
    for table in COLUMNS:
        for name, arr in tables.table(table).items():
            arrays[f"{table}.{name}"] = arr
    try:
        with open(path, "wb") as f:
            np.savez_compressed(f, **arrays)
    except OSError as exc:
        raise InputError(f"{path}: cannot write: {exc.strerror or exc}") from None


def read_npz(path: str | Path) -> ExportTables:
    """Read a ``.npz`` export.

    Raises
    ------
    InputError
        When the file is missing or is not an export.
    """
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: cannot read export: {exc}") from None
    if "tone_index" not in arrays:
        raise InputError(f"{path}: not a brimline export (no tone_index)")
    tables: dict[str, dict] = {t: {} for t in COLUMNS}
    for key, arr in arrays.items():
        table, _dot, name = key.partition(".")
        if table in tables:
            tables[table][name] = arr
    return ExportTables(tone_index=arrays["tone_index"], **tables)


def csv_paths(path: str | Path) -> dict[str, Path]:
    """The three CSV files of an export named ``path`` (``NAME.csv``): table -> file."""
    p = Path(path)
    return {t: p.with_name(f"{p.stem}.{t}.csv") for t in COLUMNS}


def _text(value: Any) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "1" if value else "0"
    if isinstance(value, (float, np.floating)):
        return repr(float(value))
    return str(value)


def write_csv(path: str | Path, tables: ExportTables) -> list[Path]:
    """Write ``tables`` as three CSV files (:func:`csv_paths`); returns them."""
    out = []
    tones = [int(t) for t in tables.tone_index]
    for table, file in csv_paths(path).items():
        cols = tables.table(table)
        header, blocks = [], []
        for name in COLUMNS[table]:
            if name not in cols:
                continue
            arr = cols[name]
            if arr.ndim == 2:
                header += [f"{name}[{t}]" for t in tones]
                blocks.append(arr)
            else:
                header.append(name)
                blocks.append(arr[:, None])
        rows = len(blocks[0]) if blocks else 0
        try:
            with open(file, "w", newline="", encoding="utf-8") as f:
                w = csv.writer(f)
                w.writerow(header)
                for i in range(rows):
                    w.writerow([_text(v) for block in blocks for v in block[i].tolist()])
        except OSError as exc:
            raise InputError(f"{file}: cannot write: {exc.strerror or exc}") from None
        out.append(file)
    return out


def read_csv(path: str | Path) -> ExportTables:
    """Read the three CSV files of an export named ``path``.

    Raises
    ------
    InputError
        A file is missing, or a column is not one of :data:`COLUMNS` (names file and column).
    """
    tables: dict[str, dict] = {}
    tone_index = None
    for table, file in csv_paths(path).items():
        try:
            with open(file, newline="", encoding="utf-8") as f:
                rows = list(csv.reader(f))
        except OSError as exc:
            raise InputError(f"{file}: cannot read export: {exc.strerror or exc}") from None
        header, body = (rows[0], rows[1:]) if rows else ([], [])
        groups: dict[str, list[int]] = {}
        tones: dict[str, list[int]] = {}
        for i, head in enumerate(header):
            m = _TONE_COLUMN.match(head)
            name = m.group(1) if m else head
            if name not in COLUMNS[table]:
                raise InputError(f"{file}: column {head!r} is not part of a brimline export")
            groups.setdefault(name, []).append(i)
            if m:
                tones.setdefault(name, []).append(int(m.group(2)))
        for found in tones.values():
            if tone_index is None:
                tone_index = found
            elif found != tone_index:
                raise InputError(f"{file}: per-tone columns of different tones")
        cols = {}
        for name, idx in groups.items():
            dtype = COLUMNS[table][name]
            cells = [[r[i] for i in idx] for r in body]
            if dtype == "?":
                arr = np.array([c[0] == "1" for c in cells], dtype=bool)
            elif dtype == "U":
                arr = np.array([c[0] for c in cells], dtype=str)
            else:
                kind = np.dtype(dtype).kind
                conv = int if kind in "iu" else float
                arr = np.array([[conv(v) for v in c] for c in cells], dtype=dtype)
                arr = arr.reshape(len(body), len(idx)) if name in tones else arr.reshape(-1)
            cols[name] = arr
        tables[table] = cols
    return ExportTables(tone_index=np.array(tone_index or [], dtype=np.int16), **tables)


def json_safe(value: Any) -> Any:
    """``value`` with numpy scalars and arrays made plain and non-finite floats ``None``."""
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist())
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    return value


def write_jsonl(path: str | Path, lines: Iterable[Mapping[str, Any]]) -> int:
    """Write one JSON object per line (:func:`json_safe` applied); returns the line count.

    Raises
    ------
    InputError
        When the file cannot be written.
    """
    n = 0
    try:
        with open(path, "w", encoding="utf-8") as f:
            for line in lines:
                f.write(json.dumps(json_safe(line), separators=(",", ":"), allow_nan=False))
                f.write("\n")
                n += 1
    except OSError as exc:
        raise InputError(f"{path}: cannot write: {exc.strerror or exc}") from None
    return n
