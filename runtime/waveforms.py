"""Reference and load waveforms read from CSV or HDF5 files (measured or prepared profiles).

A scenario may give ``[reference] file = "cycle.csv"`` (the ``profile`` reference) or
``[load] file = "drive.csv"`` instead of a TOML table. The file's rows become exactly the rows
the TOML table would have held (the same SI values, bit for bit, and the same interpolation
rules downstream), so nothing after the scenario reader knows where they came from.

CSV: comma separated, ``#`` starts a comment (a whole line or the rest of one), the first
other line is the header, each name carrying its unit in brackets: ``t [s], v_ref [V]``. A cell
is read as the quantity ``"<cell> <unit>"`` (e.g. ``20`` under ``P [kW]`` reads as ``"20 kW"``),
so a file and a table with the same numbers and units give the same doubles.

HDF5: one 1-D dataset per column, named by its path in the file, each with a ``unit`` attribute.

Every refusal is one line naming the scenario key, the file, the row (CSV: the file's line
number; HDF5: the index) or column, and the fix (docs/scenarios.md, "Waveforms from files").
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from .errors import ScenarioError, UnitError
from .units import PREFIXES, UNITS, parse_quantity

#: a file larger than this is refused before it is read (a 1 kHz log of 24 hours in CSV)
MAX_FILE_BYTES = 64 * 1024 * 1024
#: at most this many samples (rows): the profile lives in the run's parameter array
MAX_ROWS = 500_000
#: default for ``max_gap``: two consecutive samples further apart than this are refused
DEFAULT_MAX_GAP = 1.0

_HEADER = re.compile(r"^\s*(.*?)\s*\[\s*(.*?)\s*\]\s*$")


def _fail(where: str, msg: str) -> ScenarioError:
    return ScenarioError(f"{where}{msg}")


def _check_unit(unit: str, dim: str, where: str) -> None:
    """Refuse a unit that is unknown or of the wrong dimension (one line, with the fix)."""
    try:
        parse_quantity(f"1 {unit}", dim, where=where)
    except UnitError:
        reads = _reads_as(unit)
        if reads is None:
            raise _fail(where, f": unit [{unit}] is not a unit hilrig reads; write [{dim}] "
                        f"with an optional SI prefix (p n u m k M G)") from None
        raise _fail(where, f": unit [{unit}] is {reads}, a quantity of another dimension; "
                    f"this column needs [{dim}] (with an optional SI prefix)") from None


def _reads_as(unit: str) -> str | None:
    for sym in sorted(UNITS, key=len, reverse=True):
        if unit.endswith(sym) and unit[: len(unit) - len(sym)] in PREFIXES:
            return UNITS[sym]
    return None


def read_columns(path: Path, names: dict[str, tuple[str, str]], key: str,
                 ) -> tuple[dict[str, np.ndarray], list[int], str]:
    """Read the named columns of a CSV or HDF5 file, in SI.

    ``names`` maps our column key (``"t"``, ``"v"``, ``"P"``, ...) to (the name in the file, the
    SI unit it must have). Returns the columns, each row's label for messages (CSV: the file's
    line numbers; HDF5: indices) and the word for a row in messages ("line" or "index").
    """
    where = f"{key}.file {str(path)!r}"
    if not path.exists():
        raise _fail(where, ": the file does not exist; check the path (relative to the "
                    "scenario file)")
    if not path.is_file():
        raise _fail(where, ": is not a file; give a CSV or HDF5 file")
    size = path.stat().st_size
    if size == 0:
        raise _fail(where, ": the file is empty; give a header row and at least one row of samples")
    if size > MAX_FILE_BYTES:
        raise _fail(where, f": the file has {size} bytes, more than the limit of "
                    f"{MAX_FILE_BYTES // (1024 * 1024)} MiB; resample or cut it to the run's span")
    import h5py
    if h5py.is_hdf5(str(path)):
        cols, labels = _read_hdf5(path, names, where)
        word = "index"
    else:
        cols, labels = _read_csv(path, names, where)
        word = "line"
    return cols, labels, word


def _read_csv(path: Path, names, where):
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise _fail(where, f": cannot read as UTF-8 text: {exc}; save it as UTF-8 CSV") from None
    header = None
    picks: dict[str, tuple[int, str, str, str]] = {}
    out: dict[str, list[float]] = {k: [] for k in names}
    labels: list[int] = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        body = line.split("#", 1)[0].strip()
        if not body:
            continue
        cells = [c.strip() for c in body.split(",")]
        if header is None:
            header = cells
            found = {}
            for j, h in enumerate(cells):
                m = _HEADER.match(h)
                found[m.group(1) if m else h] = (j, m.group(2) if m else None, h)
            for k, (name, dim) in names.items():
                if name not in found:
                    raise _fail(where, f": no column {name!r} in the header (line {lineno}: "
                                f"{', '.join(repr(c) for c in cells)}); name one of those, or "
                                f"add the column")
                j, unit, full = found[name]
                cw = f"{where}, column {full!r}"
                if unit is None:
                    raise _fail(cw, f": the header gives no unit; write it as '{name} [{dim}]'")
                _check_unit(unit, dim, cw)
                picks[k] = (j, unit, dim, full)
            continue
        if len(cells) != len(header):
            raise _fail(where, f": line {lineno} has {len(cells)} cells, the header "
                        f"{len(header)}; fix the line (commas separate cells, '#' starts a comment)")
        if len(labels) >= MAX_ROWS:
            raise _fail(where, f": more than {MAX_ROWS} rows of samples; resample or cut it to "
                        f"the run's span")
        for k, (j, unit, dim, full) in picks.items():
            cell = cells[j]
            cw = f"{where}, line {lineno}, column {full!r}"
            if k == "R" and cell.lower() in ("open", "inf"):
                out[k].append(math.inf)
                continue
            if cell.lower() in ("nan", "+nan", "-nan", ""):
                raise _fail(cw, f": {'no value' if not cell else 'NaN'}; fill in the sample "
                            f"(or drop the row)")
            try:
                out[k].append(parse_quantity(f"{cell} {unit}", dim, where="cell"))
            except UnitError:
                raise _fail(cw, f": {cell!r} is not a finite number; write a plain number "
                            f"(the unit is in the header)") from None
        labels.append(lineno)
    if header is None or not labels:
        raise _fail(where, ": no rows of samples (only comments, a header or blank lines); "
                    "give a header row and at least one row of samples")
    return {k: np.array(v, dtype=np.float64) for k, v in out.items()}, labels


def _read_hdf5(path: Path, names, where):
    import h5py
    cols = {}
    try:
        f = h5py.File(str(path), "r")
    except OSError as exc:
        raise _fail(where, f": cannot open as HDF5: {exc}") from None
    with f:
        n = None
        for k, (name, dim) in names.items():
            dw = f"{where}, dataset {name!r}"
            obj = f.get(name)
            if obj is None or not isinstance(obj, h5py.Dataset):
                have = []
                f.visititems(lambda nm, o: have.append(nm) if isinstance(o, h5py.Dataset) else None)
                raise _fail(dw, f": no such dataset (the file has: "
                            f"{', '.join(have[:8]) or 'none'}); give its path in the file")
            if obj.ndim != 1 or obj.dtype.kind not in "iuf":
                raise _fail(dw, f": shape {obj.shape} {obj.dtype}; a column is a 1-D numeric dataset")
            if obj.shape[0] > MAX_ROWS:
                raise _fail(dw, f": {obj.shape[0]} samples, more than {MAX_ROWS}; resample "
                            f"or cut it to the run's span")
            if n is not None and obj.shape[0] != n:
                raise _fail(dw, f": {obj.shape[0]} samples, the other columns {n}; give columns "
                            f"of equal length")
            n = obj.shape[0]
            unit = obj.attrs.get("unit")
            if isinstance(unit, bytes):
                unit = unit.decode("utf-8", "replace")
            if isinstance(unit, np.ndarray) and unit.shape == ():
                unit = unit.item()
            if not isinstance(unit, str):
                raise _fail(dw, f": no 'unit' attribute; set it, e.g. unit = '{dim}'")
            _check_unit(unit.strip(), dim, dw)
            # the same single rounding as a TOML quantity: shift the decimal exponent
            scale = parse_quantity(f"1 {unit.strip()}", dim)
            data = np.asarray(obj[()], dtype=np.float64)
            if scale != 1.0:
                data = np.array([parse_quantity(f"{x!r} {unit.strip()}", dim) if math.isfinite(x)
                                 else x for x in data.tolist()], dtype=np.float64)
            bad = np.flatnonzero(~np.isfinite(data))
            if bad.size and not (k == "R" and np.all(np.isposinf(data[bad]))):
                i = int(bad[0])
                raise _fail(dw, f": index {i} is {data[i]!r}; fill in the sample (or drop the row)")
            cols[k] = data
    if not n:
        raise _fail(where, ": the datasets are empty; give at least one sample")
    return cols, list(range(n))


def _check_time(t, labels, word, where, max_gap):
    if t[0] > 0.0:
        raise _fail(where, f": the time starts at {t[0]:g} s ({word} {labels[0]}); a waveform "
                    f"must start at or before 0 s: shift the time column or add a sample at 0")
    d = np.diff(t)
    bad = np.flatnonzero(d <= 0.0)
    if bad.size:
        i = int(bad[0]) + 1
        what = "repeats" if d[i - 1] == 0.0 else "goes back from"
        raise _fail(where, f": {word} {labels[i]}: time {t[i]:g} s {what} {t[i - 1]:g} s "
                    f"({word} {labels[i - 1]}); times must be strictly increasing: sort the "
                    f"rows and drop the repeated one")
    gap = np.flatnonzero(d > max_gap)
    if gap.size:
        i = int(gap[0]) + 1
        raise _fail(where, f": {word} {labels[i]}: a gap of {d[i - 1]:g} s after {t[i - 1]:g} s, "
                    f"longer than max_gap = {max_gap:g} s; fill the gap or raise max_gap")


def _check_bounds(col, lo, hi, lower_open, labels, word, where, name, unit, name_is_r=False):
    # an open resistance ("open" or inf in the file) is no value out of range
    bad = np.flatnonzero(((col <= lo if lower_open else col < lo) | (col > hi)) & ~np.isposinf(col)
                         if name_is_r else (col <= lo if lower_open else col < lo) | (col > hi))
    if bad.size:
        i = int(bad[0])
        raise _fail(where, f": {word} {labels[i]}: {name} = {col[i]:g} {unit} is outside "
                    f"{'(' if lower_open else '['}{lo:g}, {hi:g}] {unit}; fix the sample or "
                    f"the header's unit")


def _at_zero(t, cols, linear):
    """Cut the samples before t = 0: the value at 0 by the table's own rule (linear: the
    interpolation between the samples around 0; step: the last sample at or before 0)."""
    if t[0] >= 0.0:
        return t, cols
    k = int(np.searchsorted(t, 0.0, side="left"))  # first sample at or after 0
    if k < t.shape[0] and t[k] == 0.0:
        return t[k:], {c: v[k:] for c, v in cols.items()}
    out = {}
    for c, v in cols.items():
        if linear and k < t.shape[0] and np.all(np.isfinite(v[k - 1:k + 1])):
            v0 = np.interp(0.0, t[k - 1:k + 1], v[k - 1:k + 1])
        else:
            v0 = v[k - 1]
        out[c] = np.concatenate(([v0], v[k:]))
    return np.concatenate(([0.0], t[k:])), out


def _max_gap(cx, tab, key):
    if "max_gap" not in tab:
        return DEFAULT_MAX_GAP
    try:
        g = parse_quantity(tab["max_gap"], "s", where=f"{cx.name}: {key}.max_gap")
    except UnitError as exc:
        raise ScenarioError(str(exc)) from None
    if not g > 0.0:
        raise cx.fail(f"{key}.max_gap", f" = {tab['max_gap']!r} is not above 0 s")
    return g


def _name(cx, tab, key, col, default):
    v = tab.get(col, default)
    if not isinstance(v, str) or not v.strip():
        raise cx.fail(f"{key}.{col}", f" = {v!r} is not a column name (CSV) or dataset path (HDF5)")
    return v.strip()


def _path(cx, tab, key) -> Path:
    f = tab["file"]
    if not isinstance(f, str) or not f.strip():
        raise cx.fail(f"{key}.file", f" = {f!r} is not a file name")
    p = Path(f).expanduser()
    return p if p.is_absolute() else cx.base / p


REFERENCE_KEYS = ("file", "time", "value", "max_gap")
LOAD_KEYS = ("file", "time", "P", "R", "I", "max_gap", "interpolation")


def reference_from_file(cx, tab: dict, decl) -> dict:
    """``[reference] file = ...``: the table ``points`` of a profile reference, from a file.

    Returns ``tab`` with ``file``, ``time``, ``value``, ``max_gap`` replaced by ``points``
    (rows of SI floats, as the TOML table would have given them).
    """
    q = next((p for p in decl.params if p.name == "points"), None)
    if q is None or getattr(q, "columns", None) != (("t", "s"), ("v", "V")):
        raise cx.fail("reference.file", f": reference {decl.name} takes no waveform file; "
                      f"use plugin = \"profile\" (a file gives its points)")
    if "points" in tab:
        raise cx.fail("reference.file", ": give either points or file, not both")
    tab = dict(tab)
    path = _path(cx, tab, "reference")
    names = {"t": (_name(cx, tab, "reference", "time", "t"), "s"),
             "v": (_name(cx, tab, "reference", "value", "v"), "V")}
    gap = _max_gap(cx, tab, "reference")
    where = f"{cx.name}: reference.file {str(path)!r}"
    cols, labels, word = read_columns(path, names, f"{cx.name}: reference")
    t = cols["t"]
    _check_time(t, labels, word, where, gap)
    lo, hi, lo_open = q.column_bounds[1]
    _check_bounds(cols["v"], lo, hi, lo_open, labels, word, where, names["v"][0], "V")
    t, out = _at_zero(t, {"v": cols["v"]}, linear=True)
    for k in REFERENCE_KEYS:
        tab.pop(k, None)
    tab["points"] = [[float(a), float(b)] for a, b in zip(t.tolist(), out["v"].tolist())]
    return tab


def load_points(cx, tab: dict, interp: str) -> list[dict]:
    """``[load] file = ...``: the ``[[load.points]]`` rows from a file (t and the columns named
    by ``P``, ``R``, ``I``), as the TOML points would have given them."""
    if "points" in tab:
        raise cx.fail("load.file", ": give either [[load.points]] or file, not both")
    path = _path(cx, tab, "load")
    names = {"t": (_name(cx, tab, "load", "time", "t"), "s")}
    for col, unit in (("P", "W"), ("R", "ohm"), ("I", "A")):
        if col in tab:
            names[col] = (_name(cx, tab, "load", col, None), unit)
    if len(names) == 1:
        raise cx.fail("load.file", ": no column named; give at least one of P = \"<column>\" "
                      "[W], R = \"<column>\" [ohm], I = \"<column>\" [A]")
    gap = _max_gap(cx, tab, "load")
    where = f"{cx.name}: load.file {str(path)!r}"
    cols, labels, word = read_columns(path, names, f"{cx.name}: load")
    t = cols.pop("t")
    _check_time(t, labels, word, where, gap)
    bounds = {"P": (-1e8, 1e8, False, "W"), "I": (-1e6, 1e6, False, "A"),
              "R": (0.0, 1e12, True, "ohm")}
    for c, v in cols.items():
        lo, hi, lo_open, unit = bounds[c]
        _check_bounds(v, lo, hi, lo_open, labels, word, where, names[c][0], unit,
                      name_is_r=(c == "R"))
    t, cols = _at_zero(t, cols, linear=(interp == "linear"))
    rows = []
    for i, ti in enumerate(t.tolist()):
        row = {"t": ti}
        for c, v in cols.items():
            x = float(v[i])
            row[c] = "open" if (c == "R" and math.isinf(x)) else x
        rows.append(row)
    return rows
