"""Run folders: ``recording.h5`` written chunk by chunk, ``summary.json`` and ``scenario.toml``.

Contract (other tools rely on it):

- ``recording.h5``: dataset ``time`` [s] and group ``signals/`` with one 1-D float64 dataset per
  signal, each with a ``unit`` attribute (and a ``description``); file attributes
  ``scenario_text`` (the exact scenario that ran: the file's text, or with overrides the
  file with them applied, see ``scenario.parse_scenario``), ``versions`` (JSON), ``seed``, ``Ts`` [s],
  ``hilrig_format`` (this contract's version) and, once the run ends, ``events`` (JSON) and
  ``complete`` (true).
- ``summary.json``: metrics and timing of the run. The tracking metrics leave out the ticks
  whose error is not finite and count them (``nonfinite_samples``).
- ``scenario.toml``: the same text as ``scenario_text``; running it repeats the run.

A run written over a folder (``--overwrite``) removes the files derived from the old recording
(:data:`DERIVED_FILES`) and leaves other files.

Every JSON text hilrig writes for a run or a suite (``summary.json``, the ``events`` and
``bridge`` attributes, ``comparison.json``, ``results.json``, the ``--json`` outputs) is strict
JSON (RFC 8259, which has no NaN or Infinity): a number that has no finite value (a metric
over no finite sample, the value of a non-finite measurement that tripped) is ``null``. Write
such text with :func:`dumps_json`.

Every chunk is written and flushed before the loop goes on, so a killed run leaves a file
readable up to its last flushed chunk. Compression: none (default) or gzip level 1 with shuffle,
which any HDF5 reader can open.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from .errors import RecordingError

#: the run-folder contract's version: 2 made every JSON text strict (null for a non-finite
#: number, where 1 wrote NaN/Infinity), added the metrics' ``nonfinite_samples`` and made
#: ``scenario_text`` the scenario with its overrides applied
FORMAT_VERSION = 2
RECORDING = "recording.h5"
SUMMARY = "summary.json"
SCENARIO = "scenario.toml"


# files hilrig derives from a run folder's recording (the overview plot, 'hilrig report',
# 'hilrig export' at its default paths): a run written over the folder removes them, so that
# none describes the recording it replaced
DERIVED_FILES = ("overview.png", "units.png", "report.md", "report", "recording.csv",
                 "recording.mf4")


def clear_derived(folder: Path) -> list[str]:
    """Before a run is written over ``folder`` (``--overwrite``): remove the files derived from
    its old recording; other files stay. Returns the names removed."""
    import shutil
    folder = Path(folder)
    if not (folder / RECORDING).exists():
        return []
    gone = []
    for name in DERIVED_FILES:
        path = folder / name
        if path.is_dir() and name == "report":
            shutil.rmtree(path)
        elif path.is_file():
            path.unlink()
        else:
            continue
        gone.append(name)
    return gone


def finite_or_none(obj: Any) -> Any:
    """``obj`` with every non-finite float (NaN, +-inf) replaced by None, through dicts, lists
    and tuples (tuples become lists, as JSON has them)."""
    if isinstance(obj, float):  # numpy's float64 too (a subclass)
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: finite_or_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [finite_or_none(v) for v in obj]
    return obj


def dumps_json(obj: Any, **kw: Any) -> str:
    """Strict JSON text of ``obj``: non-finite floats as null (see the module docstring).
    ``allow_nan=False`` is the guard: should a non-finite number ever get past the conversion,
    writing fails instead of leaving a NaN token that strict readers refuse."""
    return json.dumps(finite_or_none(obj), allow_nan=False, **kw)


def projected_bytes(n_rows: int, n_signals: int) -> int:
    """The size of an uncompressed recording: time and every signal as 8-byte floats per row
    (HDF5's own metadata is small beside it and not counted)."""
    return int(n_rows) * (int(n_signals) + 1) * 8


def _existing(folder: Path) -> Path:
    """``folder`` or its nearest existing parent (where the run folder will be created)."""
    folder = Path(folder).absolute()
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    return folder


def check_free_space(folder: Path, n_rows: int, n_signals: int, compression: str = "none",
                     free: int | None = None) -> str | None:
    """Refuse a run whose uncompressed recording would not fit on the disk of ``folder``
    (a RecordingError with both figures). With gzip compression the projection is an upper
    bound: a notice is returned instead of a refusal. ``free``: bytes free (default: the
    disk's, ``shutil.disk_usage``)."""
    import shutil
    need = projected_bytes(n_rows, n_signals)
    where = _existing(folder)
    if free is None:
        free = shutil.disk_usage(where).free
    if need <= free:
        return None
    what = (f"the recording of this run would take {_size(need)} ({n_rows} rows x "
            f"{n_signals + 1} columns x 8 bytes) and {where} has {_size(free)} free")
    if compression == "gzip":
        return (f"{what}; gzip compression may make it fit, or the disk may fill and the run "
                f"end with a write error")
    raise RecordingError(f"{what}: shorten timing.duration, lengthen timing.Ts, free disk "
                         f"space or choose --out on a larger disk (nothing was written)")


def _size(n: int) -> str:
    for f, unit in ((1e12, "TB"), (1e9, "GB"), (1e6, "MB"), (1e3, "kB")):
        if n >= f:
            return f"{n / f:.1f} {unit}"
    return f"{n} bytes"


@dataclass(frozen=True)
class SignalSpec:
    name: str
    unit: str
    description: str = ""


class RunWriter:
    """Append-only writer of one run's recording, flushed per chunk."""

    def __init__(self, folder: Path, signals: list[SignalSpec], attrs: dict[str, Any],
                 chunk_rows: int, compression: str = "none"):
        self.folder = Path(folder)
        self.signals = signals
        self.path = self.folder / RECORDING
        self.n = 0
        kw: dict[str, Any] = dict(maxshape=(None,), dtype="f8", chunks=(max(1, min(chunk_rows, 1 << 16)),))
        if compression == "gzip":
            kw.update(compression="gzip", compression_opts=1, shuffle=True)
        self.f = h5py.File(self.path, "w")
        for k, v in attrs.items():
            self.f.attrs[k] = v
        self.f.attrs["hilrig_format"] = FORMAT_VERSION
        self.f.attrs["complete"] = False
        self.time = self.f.create_dataset("time", shape=(0,), **kw)
        self.time.attrs["unit"] = "s"
        g = self.f.create_group("signals")
        self.ds = []
        for s in signals:
            d = g.create_dataset(s.name, shape=(0,), **kw)
            d.attrs["unit"] = s.unit
            d.attrs["description"] = s.description
            self.ds.append(d)
        self.f.flush()

    def append(self, time: np.ndarray, rows: np.ndarray) -> None:
        """Write one chunk (rows: n x len(signals)) and flush it to disk."""
        n = time.shape[0]
        if n == 0:
            return
        end = self.n + n
        self.time.resize((end,))
        self.time[self.n:end] = time
        cols = np.ascontiguousarray(rows[:n].T)  # one transpose instead of a strided copy per signal
        for j, d in enumerate(self.ds):
            d.resize((end,))
            d[self.n:end] = cols[j]
        self.n = end
        self.f.flush()

    def close(self, attrs: dict[str, Any] | None = None, complete: bool = True) -> None:
        """Write the attributes and close; ``complete`` False marks a run that was cut short
        (interrupted): its recording holds every tick up to the last chunk written."""
        for k, v in (attrs or {}).items():
            self.f.attrs[k] = v
        self.f.attrs["complete"] = complete
        self.f.flush()
        self.f.close()


@dataclass
class Run:
    """A run folder read back: time, signals (name -> array), units, attributes, summary."""

    folder: Path
    time: np.ndarray
    signals: dict[str, np.ndarray]
    units: dict[str, str]
    attrs: dict[str, Any]
    summary: dict[str, Any]

    @property
    def scenario_text(self) -> str:
        return self.attrs.get("scenario_text", "")


def open_run(path: str | Path) -> Run:
    """Read a run folder (or a ``recording.h5`` path) fully into memory."""
    path = Path(path)
    folder = path.parent if path.suffix == ".h5" else path
    h5 = path if path.suffix == ".h5" else path / RECORDING
    if not h5.exists():
        raise RecordingError(f"no recording at {h5}: give a run folder written by 'hilrig run' or 'hilrig demo'")
    try:
        with h5py.File(h5, "r") as f:
            time = f["time"][()]
            signals = {k: d[()] for k, d in f["signals"].items()}
            units = {k: str(d.attrs.get("unit", "")) for k, d in f["signals"].items()}
            attrs = {k: (v.item() if isinstance(v, np.generic) else v) for k, v in f.attrs.items()}
    except (OSError, KeyError) as exc:
        raise RecordingError(f"{h5} is not a readable hilrig recording: {exc}") from None
    summary = {}
    sp = folder / SUMMARY
    if sp.exists():
        summary = json.loads(sp.read_text())
    return Run(folder=folder, time=time, signals=signals, units=units, attrs=attrs, summary=summary)


def export_csv(run: Run, dest: Path) -> Path:
    """Write time and every signal as CSV (header ``name [unit]``); return the path."""
    names = list(run.signals)
    header = ",".join(["time [s]"] + [f"{n} [{run.units.get(n, '')}]" for n in names])
    data = np.column_stack([run.time] + [run.signals[n] for n in names]) if names else run.time[:, None]
    # repr-exact floats: 17 significant digits round-trip float64
    np.savetxt(dest, data, delimiter=",", header=header, comments="", fmt="%.17g")
    return dest
