"""What ran: each plugin of a run with its origin, source hashes, version and resolved parameters.

The record goes into summary.json (``provenance``), the recording's attributes (the same entry as
JSON text, attribute ``provenance``) and report.md ("What ran"), so that a lab record says
exactly which plant, controller and reference ran with which numbers.

Per plugin: its role, kind and name; its origin (the entry point's module, or the file it was
loaded from); its version (the version of the distribution that installs the entry point, or
``"file"`` for a plugin loaded from a path); the sha256 of every source file it was made from
(a generated plugin lists the files it was generated from too: the units' plugins of paralleled
units, the FMU of an FMU plant, the C file of a controller in C); and every declared parameter
with its resolved value and SI unit, marked ``given`` (the scenario or an override sets it),
``default`` (the plugin's declared default) or ``designed`` (neither: the design from the plant
chose it). A table parameter is recorded by its shape and the sha256 of its rows as
little-endian float64 in row order, not row by row. Paralleled units add a ``units`` list: each
unit's plant and controller, recorded the same way.
"""
from __future__ import annotations

import dataclasses
import hashlib
import os
from functools import lru_cache
from importlib.metadata import entry_points
from typing import Any

import numpy as np

from hilrig.plugins.base import ChoiceParam, Param, TableParam, table_array


def file_sha256(path: str | os.PathLike) -> str:
    """The sha256 of a file's bytes, in hex; "" when it cannot be read."""
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    except OSError:
        return ""
    return h.hexdigest()


def table_sha256(rows) -> str:
    """The sha256 of a table's rows as little-endian float64, row by row."""
    return hashlib.sha256(np.ascontiguousarray(table_array(rows), dtype="<f8").tobytes()).hexdigest()


@lru_cache(maxsize=None)
def _entry_point_version(kind: str, module: str) -> str:
    """The version of the distribution whose entry point names ``module``; hilrig's own when
    none does (a built-in loaded by module name)."""
    for ep in entry_points(group=f"hilrig.{kind}s"):
        if ep.value.split(":")[0] == module:
            dist = getattr(ep, "dist", None)
            if dist is not None:
                return str(dist.version)
    from .version import installed
    return installed()


def _sources(plugin) -> list[dict[str, str]]:
    """The files a plugin was made from, each with its sha256."""
    module = plugin.module
    out = []
    main = plugin.source_file
    c_file = getattr(module, "C_FILE", None)
    spec = getattr(module, "SPEC", None)
    generated = c_file is not None or isinstance(spec, dict)
    out.append({"role": "generated module" if generated else "plugin module", "file": main,
                "sha256": file_sha256(main)})
    if c_file is not None:  # a controller in C (runtime/cplugin.py)
        out.append({"role": "C source", "file": str(c_file), "sha256": file_sha256(c_file)})
    if isinstance(spec, dict) and spec.get("path") and spec.get("sha256"):  # an FMU plant
        out.append({"role": "FMU", "file": str(spec["path"]), "sha256": file_sha256(spec["path"])})
    return out


def _same(a, b) -> bool:
    try:
        if isinstance(a, str) or isinstance(b, str):
            return a == b
        return bool(np.array_equal(np.asarray(a, dtype=float), np.asarray(b, dtype=float)))
    except (TypeError, ValueError):
        return False


def parameters(choice) -> list[dict[str, Any]]:
    """Every declared parameter of a plugin choice with its resolved value, unit and origin."""
    out = []
    values = choice.values
    for q in choice.plugin.declaration.params:
        v = values.get(q.name, q.default)
        if q.name in choice.given:
            how = "given"
        elif _same(v, q.default):
            how = "default"
        else:
            how = "designed"
        if isinstance(q, TableParam):
            arr = table_array(v)
            out.append({"name": q.name, "unit": " | ".join(f"{c} [{u}]" for c, u in q.columns),
                        "shape": list(arr.shape), "sha256": table_sha256(v), "set": how})
        elif isinstance(q, ChoiceParam):
            out.append({"name": q.name, "value": str(v), "unit": "-", "set": how})
        elif isinstance(q, Param):
            out.append({"name": q.name, "value": float(v), "unit": q.unit, "set": how})
    return out


def plugin_entry(role: str, choice) -> dict[str, Any]:
    """One plugin's record (see the module docstring)."""
    pl = choice.plugin
    how, where = pl.origin
    return {
        "role": role, "kind": pl.kind, "name": pl.name,
        "origin": where, "origin_kind": "entry point" if how == "module" else "file",
        "version": _entry_point_version(pl.kind, where) if how == "module" else "file",
        "sources": _sources(pl),
        "parameters": parameters(choice),
    }


def record(sc) -> dict[str, Any]:
    """The run's provenance: its plant, controller and reference, and for paralleled units
    each unit's plant and controller."""
    out: dict[str, Any] = {"plugins": [plugin_entry(role, getattr(sc, role))
                                       for role in ("plant", "controller", "reference")]}
    units = getattr(sc, "units", None)
    if units is not None:
        # the values each unit's controller ran with are the composite controller's (a design
        # from the plant writes them there, runtime/multi/design.py), not the parsed ones
        ran = sc.controller.values.get("units") if isinstance(sc.controller.values, dict) else None
        out["units"] = []
        for k, (pch, cch) in enumerate(zip(units.plants, units.controllers), 1):
            if ran and k <= len(ran) and isinstance(ran[k - 1].get("values"), dict):
                cch = dataclasses.replace(cch, values=ran[k - 1]["values"])
            out["units"].append({"unit": k, "plant": plugin_entry("unit plant", pch),
                                 "controller": plugin_entry("unit controller", cch)})
    return out
