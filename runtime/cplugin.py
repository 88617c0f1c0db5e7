"""Controller plugins written in C: compiled with the system C compiler, called from the loop.

A scenario names a ``.c`` file as its controller (``[controller] plugin = "pi.c"``). The file
follows ``runtime/data/hilrig_controller.h`` (docs/plugins.md, "Controllers in C"): a static
descriptor ``hilrig_controller`` (name, parameters with units and bounds, states, reads, context
values) and the kernels ``hilrig_init`` and ``hilrig_step``, the same contract as a Python
controller's ``init`` and ``step``.

How it runs:

1. :func:`compile_library` compiles the file with the header forced in (``-include``, so the
   compiler checks the file's definitions against the prototypes) and a small entry file of
   ours (:data:`ENTRY`) into a shared library in the cache (``HILRIG_CACHE_DIR/loops/c``),
   named by a hash of the C source, the header, the entry file, the flags and the compiler's
   path and version. The local headers the file includes (from the compiler's ``-MMD``
   output) are recorded with their hashes in an index file beside it: a change of one
   rebuilds too (into a new file, so that a process never reloads a stale library). A second
   run loads the library without compiling. Flags: :data:`FLAGS` (no fast-math, no
   floating-point contraction: the C code rounds as the C source says), plus
   ``HILRIG_CFLAGS`` from the environment (e.g. ``-g -O0`` to debug); the compiler is ``cc``
   on PATH or ``HILRIG_CC``.
2. The library is loaded with ctypes (in the standard library, and all that is needed here: one
   ``dlopen``, two function addresses, and the descriptor read as a ctypes structure; no call
   goes through ctypes per tick), and its descriptor becomes a ``Declaration``.
3. :func:`plugin` writes a Python plugin module into the loop cache (as paralleled units do,
   ``runtime/multi``) whose ``init`` and ``step`` are ``@njit(cache=True)`` kernels that call
   the library through :func:`hilrig.runtime.native.call_native`. The two function addresses
   are run-time data: ``build`` appends them to ``p`` as float64 (exact below 2**53), after the
   parameters and context values, and the kernels read them from ``p``'s last two entries. So
   the generated module's text (and the compiled loop) depends only on the descriptor, never on
   the C code: editing the C file recompiles the library (well under a second), not the loop.

The registry (``registry.load``) calls :func:`plugin` for a ``.c`` path; compile errors, a
missing compiler and a bad descriptor raise one :class:`PluginError` each.

Run ``python -m hilrig.runtime.cplugin header`` for the header's path, or
``python -m hilrig.runtime.cplugin check FILE.c`` to compile a file and print its descriptor.
"""
from __future__ import annotations

import ctypes
import hashlib
import json
import math
import os
import re
import shlex
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import PluginError

HEADER = Path(__file__).resolve().parent / "data" / "hilrig_controller.h"
ABI_VERSION = 1
#: the flags of every build: C99, optimised, position-independent shared library; no
#: fast-math (NaN must compare false for the interlocks) and no contraction of a * b + c into a
#: fused multiply-add (GCC contracts by default in its GNU modes where the target has FMA),
#: so the C code rounds operation by operation as written, like the numba kernels
FLAGS = ("-std=c99", "-O2", "-fPIC", "-shared", "-fno-fast-math", "-ffp-contract=off")
#: flags that would let the compiler break IEEE arithmetic; refused in HILRIG_CFLAGS
_UNSAFE = ("-ffast-math", "-Ofast", "-funsafe-math-optimizations", "-ffinite-math-only",
           "-fassociative-math", "-freciprocal-math", "-ffp-contract=fast")
#: the entry file compiled into every library: init as a function returning int (the call from
#: compiled code needs a return type), and a reference to every symbol of the contract, so a
#: missing one is a link error at build time rather than a failure at load
ENTRY = r"""
int hilrig_entry_init(const double *p, double *xc, const double *y, const double *r)
{
    hilrig_init(p, xc, y, r);
    return 0;
}
const struct {
    const hilrig_controller_info *info;
    int (*step)(double, const double *, double *, const double *, const double *, double *);
} hilrig_entry_refs = { &hilrig_controller, hilrig_step };
"""
#: context values a descriptor may ask for besides "plant.NAME"
CONTEXT_NAMES = ("Ts", "actuation_delay")
_IDENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


class _Param(ctypes.Structure):
    _fields_ = [("name", ctypes.c_char_p), ("unit", ctypes.c_char_p),
                ("default_value", ctypes.c_double), ("min", ctypes.c_double),
                ("max", ctypes.c_double), ("lower_open", ctypes.c_int),
                ("description", ctypes.c_char_p)]


class _Signal(ctypes.Structure):
    _fields_ = [("name", ctypes.c_char_p), ("unit", ctypes.c_char_p),
                ("description", ctypes.c_char_p)]


class _Context(ctypes.Structure):
    _fields_ = [("name", ctypes.c_char_p), ("fallback", ctypes.c_double)]


class _Info(ctypes.Structure):
    _fields_ = [("abi_version", ctypes.c_int), ("name", ctypes.c_char_p),
                ("summary", ctypes.c_char_p), ("source", ctypes.c_char_p),
                ("n_params", ctypes.c_int), ("params", ctypes.POINTER(_Param)),
                ("n_states", ctypes.c_int), ("states", ctypes.POINTER(_Signal)),
                ("n_reads", ctypes.c_int), ("reads", ctypes.POINTER(ctypes.c_char_p)),
                ("n_context", ctypes.c_int), ("context", ctypes.POINTER(_Context))]


@dataclass(frozen=True)
class Library:
    """A compiled and loaded controller library."""

    source: Path
    path: Path
    #: the compile command (without input and output files), as run
    command: tuple[str, ...]
    compiler_version: str
    #: whether this call compiled it (False: taken from the cache)
    compiled: bool
    init_address: int
    step_address: int
    #: the descriptor as plain data (see :func:`_read_info`)
    info: dict


#: libraries loaded in this process, by library path: kept alive (never unloaded) so that
#: the addresses handed to compiled code stay valid
_LOADED: dict[str, ctypes.CDLL] = {}
_COMPILER: dict[str, tuple[str, str]] = {}


def cache_folder() -> Path:
    from .loop import cache_dir
    return cache_dir() / "c"


def compiler() -> tuple[str, str]:
    """(path, version line) of the C compiler: ``HILRIG_CC`` or ``cc`` on PATH."""
    name = os.environ.get("HILRIG_CC") or "cc"
    if name in _COMPILER:
        return _COMPILER[name]
    path = shutil.which(name)
    if path is None:
        how = ("HILRIG_CC names " + repr(name) + ", which is not on PATH"
               if os.environ.get("HILRIG_CC") else "no 'cc' on PATH")
        raise PluginError(f"controllers in C need a C compiler, and there is none ({how}): "
                          f"install one (e.g. the gcc package) or set HILRIG_CC to its path")
    try:
        out = subprocess.run([path, "--version"], capture_output=True, text=True, timeout=60)
        version = (out.stdout or out.stderr).strip().splitlines()[0]
    except (OSError, subprocess.SubprocessError, IndexError) as exc:
        raise PluginError(f"the C compiler {path} does not run ({exc}): install a working one "
                          f"or set HILRIG_CC") from None
    _COMPILER[name] = (path, version)
    return _COMPILER[name]


def extra_flags() -> tuple[str, ...]:
    """``HILRIG_CFLAGS`` split as a shell would; unsafe floating-point flags are refused."""
    text = os.environ.get("HILRIG_CFLAGS", "")
    try:
        flags = tuple(shlex.split(text))
    except ValueError as exc:
        raise PluginError(f"HILRIG_CFLAGS = {text!r} cannot be split into flags ({exc})") from None
    bad = [f for f in flags if f in _UNSAFE]
    if bad:
        raise PluginError(f"HILRIG_CFLAGS has {' '.join(bad)}: controllers in C are compiled "
                          f"without fast-math (the interlocks rely on NaN comparing false); "
                          f"leave the flag out")
    return flags


def _link_flags() -> tuple[str, ...]:
    # a symbol the file uses but nobody defines is a link error now, not a failure at load
    return ("-Wl,--no-undefined",) if sys.platform.startswith("linux") else ()


def compile_library(source: str | os.PathLike) -> Library:
    """Compile (or take from the cache) and load the controller library of a C file."""
    src = Path(source).resolve()
    try:
        text = src.read_bytes()
    except OSError as exc:
        raise PluginError(f"controller C file {src}: cannot read it ({exc.strerror})") from None
    cc, version = compiler()
    flags = FLAGS + extra_flags()
    command = (cc, *flags, "-include", str(HEADER), "-I", str(HEADER.parent))
    link = (*_link_flags(), "-lm")
    h = hashlib.sha256()
    for part in (text, HEADER.read_bytes(), ENTRY.encode(), "\0".join(command + link).encode(),
                 version.encode()):
        h.update(hashlib.sha256(part).digest())
    key = h.hexdigest()[:24]
    folder = cache_folder()
    index = folder / f"{src.stem}_{key}.json"
    lib_path = _cached(index)
    compiled = lib_path is None
    if compiled:
        lib_path = _build(src, command, link, index)
    lib = _load(src, lib_path)
    info = _read_info(src, lib)
    from .native import function_address
    return Library(source=src, path=lib_path, command=command + link,
                   compiler_version=version, compiled=compiled,
                   init_address=function_address(lib.hilrig_entry_init),
                   step_address=function_address(lib.hilrig_step), info=info)


def _cached(index: Path) -> Path | None:
    """The library an index file names, if it exists and every file it was built from (the
    local headers the C file includes) is unchanged; else None."""
    try:
        entry = json.loads(index.read_text())
        lib_path = index.parent / entry["library"]
        deps = dict(entry["deps"])
    except (OSError, ValueError, KeyError, TypeError):
        return None
    if not lib_path.is_file():
        return None
    for name, digest in deps.items():
        try:
            if hashlib.sha256(Path(name).read_bytes()).hexdigest() != digest:
                return None
        except OSError:
            return None
    return lib_path


def _build(src: Path, command, link, index: Path) -> Path:
    """Compile into the cache: the library is named by the key and by the hashes of the files
    it was built from, so a rebuild after a header changed is a new file (a process that loaded
    the old one keeps it; loading the same path again would give the old library back)."""
    folder = index.parent
    folder.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(dir=folder, prefix=".build-") as tmp:
        entry = Path(tmp) / "hilrig_entry.c"
        entry.write_text(ENTRY)
        out = Path(tmp) / "lib.so"
        dep = Path(tmp) / "user.d"
        # the user's file alone gets -MMD: its local headers are the dependencies to watch
        obj = Path(tmp) / "user.o"
        steps = [
            [*command[:1], *[f for f in command[1:] if f != "-shared"], "-c", "-MMD", "-MF",
             str(dep), "-o", str(obj), str(src)],
            [*command, "-o", str(out), str(obj), str(entry), *link],
        ]
        for argv in steps:
            try:
                res = subprocess.run(argv, capture_output=True, text=True, timeout=300)
            except (OSError, subprocess.SubprocessError) as exc:
                raise PluginError(f"controller C file {src}: the compiler did not run: "
                                  f"{exc}") from None
            if res.returncode != 0:
                raise PluginError(compile_error_text(src, res.stderr, argv))
        deps = {}
        for name in _dep_files(dep.read_text() if dep.exists() else ""):
            p = Path(name)
            if not p.is_absolute():
                p = (Path.cwd() / p)
            p = p.resolve()
            if p != src and p != HEADER.resolve():
                deps[str(p)] = hashlib.sha256(p.read_bytes()).hexdigest()
        deps[str(src)] = hashlib.sha256(src.read_bytes()).hexdigest()
        tag = hashlib.sha256(json.dumps(deps, sort_keys=True).encode()).hexdigest()[:12]
        lib_path = folder / f"{index.stem}_{tag}.so"
        itmp = Path(tmp) / "index.json"
        itmp.write_text(json.dumps(dict(library=lib_path.name, deps=deps), indent=1))
        # rename into place: a concurrent process never loads a half-written library
        if not lib_path.exists():
            os.replace(out, lib_path)
        os.replace(itmp, index)
    return lib_path


def _dep_files(text: str) -> list[str]:
    """The prerequisites of a make rule as the compiler's -MMD writes it."""
    body = text.replace("\\\n", " ")
    if ":" not in body:
        return []
    rest = body.split(":", 1)[1]
    return [w.replace("\\ ", " ") for w in re.split(r"(?<!\\)\s+", rest) if w]


_DIAG = re.compile(r"^(?P<file>[^:\n]+):(?P<line>\d+):(?:(?P<col>\d+):)?\s*(?:fatal )?error:\s*(?P<msg>.*)$")
_UNDEF = re.compile(r"undefined reference to [`'](?P<sym>[^'`]+)'")


def compile_error_text(src: Path, stderr: str, argv) -> str:
    """One line from the compiler's report: the first error with its file and line, or the
    missing symbol of a link error; the command to see the whole report."""
    lines = stderr.splitlines()
    for ln in lines:
        m = _DIAG.match(ln.strip())
        if m:
            where = m.group("file")
            # the line may be in a header the file includes: name that file then
            shown = src if Path(where).name == src.name else Path(where).resolve()
            col = f", column {m.group('col')}" if m.group("col") else ""
            return (f"controller C file {shown}, line {m.group('line')}{col}: "
                    f"{m.group('msg')} (compiler: {Path(argv[0]).name} {' '.join(FLAGS)}; "
                    f"fix the C file; `python -m hilrig.runtime.cplugin check {src}` shows the "
                    f"compiler's whole report)")
    for ln in lines:
        m = _UNDEF.search(ln)
        if m:
            sym = m.group("sym")
            if sym in ("hilrig_init", "hilrig_step", "hilrig_controller"):
                return (f"controller C file {src}: it does not define {sym} (every controller "
                        f"in C defines hilrig_controller, hilrig_init and hilrig_step with "
                        f"external linkage; see hilrig_controller.h, `python -m "
                        f"hilrig.runtime.cplugin header`)")
            return (f"controller C file {src}: it calls {sym}, which nothing defines (a typo, "
                    f"or a function of a library other than libc and libm); define it in the file")
    first = next((ln for ln in lines if ln.strip()), "no message")
    return (f"controller C file {src}: the compiler failed: {first.strip()} (run `python -m "
            f"hilrig.runtime.cplugin check {src}` for its whole report)")


def _load(src: Path, lib_path: Path) -> ctypes.CDLL:
    key = str(lib_path)
    if key not in _LOADED:
        try:
            _LOADED[key] = ctypes.CDLL(key)
        except OSError as exc:
            raise PluginError(f"controller C file {src}: its library {lib_path} does not load: "
                              f"{exc}") from None
    return _LOADED[key]


def _text(b, what: str, src: Path) -> str:
    if b is None:
        raise PluginError(f"controller C file {src}: hilrig_controller.{what} is NULL; give a string")
    return b.decode("utf-8", "replace")


def _read_info(src: Path, lib: ctypes.CDLL) -> dict:
    """The descriptor as plain data, checked: one message per mistake."""
    from hilrig.runtime.units import parse_quantity
    from hilrig.runtime.errors import UnitError
    try:
        raw = _Info.in_dll(lib, "hilrig_controller")
    except ValueError:
        raise PluginError(f"controller C file {src}: it does not define hilrig_controller "
                          f"(see hilrig_controller.h)") from None
    where = f"controller C file {src}: hilrig_controller"
    if raw.abi_version != ABI_VERSION:
        raise PluginError(f"{where}.abi_version = {raw.abi_version}; this hilrig reads version "
                          f"{ABI_VERSION}: write HILRIG_ABI_VERSION there")
    name = _text(raw.name, "name", src)
    if not _IDENT.match(name):
        raise PluginError(f"{where}.name = {name!r} is not an identifier (letters, digits, _)")
    for what, n, ptr in (("params", raw.n_params, raw.params), ("states", raw.n_states, raw.states),
                         ("reads", raw.n_reads, raw.reads), ("context", raw.n_context, raw.context)):
        if n < 0 or n > 1000 or (n > 0 and not ptr):
            raise PluginError(f"{where}.n_{what} = {n} with {what} "
                              f"{'NULL' if not ptr else 'given'}: give the array and "
                              f"HILRIG_COUNT(array)")
    params = []
    seen = set()
    for i in range(raw.n_params):
        q = raw.params[i]
        pn = _text(q.name, f"params[{i}].name", src)
        unit = _text(q.unit, f"params[{i}].unit", src)
        pw = f"{where}.params[{i}] ({pn})"
        if not _IDENT.match(pn) or pn in seen or pn == "plugin":
            raise PluginError(f"{pw}: the name must be a new identifier other than 'plugin'")
        seen.add(pn)
        if unit != "-":
            try:
                parse_quantity(f"1 {unit}", unit, where=pw)
            except UnitError as exc:
                raise PluginError(f"{pw}: unit {unit!r} is not one hilrig knows ({exc})") from None
        lo, hi, d = q.min, q.max, q.default_value
        if not (math.isfinite(d) and lo <= hi and not math.isnan(lo) and not math.isnan(hi)):
            raise PluginError(f"{pw}: default {d!r}, bounds [{lo!r}, {hi!r}]: needs a finite "
                              f"default and min <= max")
        ok_lo = d > lo if q.lower_open else d >= lo
        if not (ok_lo and d <= hi):
            raise PluginError(f"{pw}: default {d!r} {unit} is outside its bounds [{lo!r}, {hi!r}]")
        params.append(dict(name=pn, unit=unit, default=d, bounds=(lo, hi),
                           lower_open=bool(q.lower_open),
                           description=_text(q.description, f"params[{i}].description", src)))
    states = []
    for i in range(raw.n_states):
        s = raw.states[i]
        states.append(dict(name=_text(s.name, f"states[{i}].name", src),
                           unit=_text(s.unit, f"states[{i}].unit", src),
                           description=_text(s.description, f"states[{i}].description", src)))
    reads = [_text(raw.reads[i], f"reads[{i}]", src) for i in range(raw.n_reads)]
    if not reads:
        raise PluginError(f"{where}: reads nothing (n_reads = 0); name the signals it measures")
    context = []
    for i in range(raw.n_context):
        c = raw.context[i]
        cn = _text(c.name, f"context[{i}].name", src)
        if cn not in CONTEXT_NAMES and not (cn.startswith("plant.") and _IDENT.match(cn[6:])):
            raise PluginError(f"{where}.context[{i}] = {cn!r} is not one of "
                              f"{', '.join(CONTEXT_NAMES)} or plant.NAME")
        context.append(dict(name=cn, fallback=None if math.isnan(c.fallback) else float(c.fallback)))
    return dict(name=name, summary=_text(raw.summary, "summary", src),
                source=_text(raw.source, "source", src), params=params, states=states,
                reads=reads, context=context)


def module_text(c_file: Path, info: dict) -> str:
    """The generated plugin module for a C controller: its text depends on the C file's path,
    its descriptor and hilrig's compiled sources, never on the C code itself."""
    from .loop import source_key
    return f'''"""Generated by hilrig (runtime/cplugin.py): the controller in C {c_file.name}. Do not edit.

hilrig source key: {source_key()}
"""
import numba
import numpy as np
from numba import njit

from hilrig.runtime import cplugin as _cp
from hilrig.runtime.native import call_native

C_FILE = {str(c_file)!r}
INFO = {info!r}
DECLARATION = _cp.declaration(C_FILE, INFO)


@njit(cache=True, error_model="numpy")
def init(p, xc, y, r):
    # p: parameters, context values, then the addresses of hilrig_entry_init and hilrig_step
    n = p.shape[0]
    call_native(np.int64(p[n - 2]), np.int32(0),
                (p.ctypes.data, xc.ctypes.data, y.ctypes.data, r.ctypes.data))


@njit(cache=True, error_model="numpy")
def step(t, p, xc, y, r, u):
    n = p.shape[0]
    code = call_native(np.int64(p[n - 1]), np.int32(0),
                       (t, p.ctypes.data, xc.ctypes.data, y.ctypes.data, r.ctypes.data,
                        u.ctypes.data))
    return np.int64(code)


def build_record():
    """How the library was compiled (for the run's summary and recording)."""
    return _cp.build_record(C_FILE)


if numba.config.DISABLE_JIT:  # plain Python (debugging): the same calls through ctypes
    init = _cp.python_init
    step = _cp.python_step
'''


def build_record(c_file: str) -> str:
    """The compiler, the command and the library of a C controller, as one line."""
    lib = compile_library(c_file)
    return f"{lib.compiler_version}: {' '.join(lib.command)} {Path(c_file).name} -> {lib.path.name}"


def declaration(c_file: str, info: dict):
    """The generated module's DECLARATION."""
    from hilrig.plugins.base import Declaration, Param, Signal
    params = tuple(Param(q["name"], q["unit"], q["default"], tuple(q["bounds"]), q["description"],
                         lower_open=q["lower_open"]) for q in info["params"])
    states = tuple(Signal(s["name"], s["unit"], s["description"]) for s in info["states"])
    names = [q["name"] for q in info["params"]]
    context = info["context"]

    def build(values, ctx):
        return pack(c_file, names, context, values, ctx)

    return Declaration(
        kind="controller", name=info["name"], summary=info["summary"] + f" (C: {Path(c_file).name})",
        params=params, states=states, reads=tuple(info["reads"]),
        outputs=(Signal("u", "V", "converter voltage command"),),
        source=info["source"], build=build)


def pack(c_file: str, names, context, values, ctx) -> np.ndarray:
    """p for a C controller: its parameters, its context values, and the two addresses (the
    library is compiled or taken from the cache here, in the process that runs the loop)."""
    lib = compile_library(c_file)
    p = [float(values[n]) for n in names]
    for c in context:
        cn = c["name"]
        if cn == "Ts":
            p.append(float(ctx.Ts))
        elif cn == "actuation_delay":
            p.append(float(ctx.actuation_delay))
        else:
            v = ctx.plant.get(cn[6:]) if ctx.plant else None
            if isinstance(v, (int, float)) and not isinstance(v, bool):
                p.append(float(v))
            elif c["fallback"] is not None:
                p.append(float(c["fallback"]))
            else:
                raise ValueError(f"controller {Path(c_file).name} needs the plant's parameter "
                                 f"{cn[6:]!r} (context {cn!r}), which the plant does not have")
    for a in (lib.init_address, lib.step_address):
        if not a < 2 ** 53:
            raise PluginError(f"controller C file {c_file}: function address {a:#x} does not "
                              f"fit a float64 exactly")
        p.append(float(a))
    return np.array(p, dtype=np.float64)


_PTR = ctypes.POINTER(ctypes.c_double)
_INIT_T = ctypes.CFUNCTYPE(ctypes.c_int, _PTR, _PTR, _PTR, _PTR)
_STEP_T = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.c_double, _PTR, _PTR, _PTR, _PTR, _PTR)


def _ptr(a):
    return np.ascontiguousarray(a).ctypes.data_as(_PTR)


def python_init(p, xc, y, r):
    """``init`` without numba (``NUMBA_DISABLE_JIT=1``): the same call through ctypes."""
    _INIT_T(int(p[-2]))(_ptr(p), xc.ctypes.data_as(_PTR), _ptr(y), _ptr(r))


def python_step(t, p, xc, y, r, u):
    """``step`` without numba: the same call through ctypes."""
    return int(_STEP_T(int(p[-1]))(float(t), _ptr(p), xc.ctypes.data_as(_PTR), _ptr(y), _ptr(r),
                                   u.ctypes.data_as(_PTR)))


def plugin(path: str | os.PathLike):
    """The controller plugin of a C file (compiled now: a compile error stops before any run)."""
    from . import registry
    from .multi.plant import write_module
    src = Path(path).resolve()
    lib = compile_library(src)
    gen = write_module(cache_folder().parent, f"cctl_{src.stem}", module_text(src, lib.info))
    module = registry.load_file(str(gen))
    decl = registry.check("controller", module)
    return registry.Plugin(kind="controller", name=decl.name, module=module, declaration=decl,
                           origin=("file", str(gen)))


def _main(argv: list[str]) -> int:
    if argv[:1] == ["header"]:
        print(HEADER)
        return 0
    if len(argv) == 2 and argv[0] == "check":
        src = Path(argv[1]).resolve()
        try:
            lib = compile_library(src)
        except PluginError as exc:
            print(f"error: {exc}", file=sys.stderr)
            cc = os.environ.get("HILRIG_CC") or "cc"
            try:
                flags = extra_flags()
            except PluginError:
                return 2
            if shutil.which(cc) and src.is_file():  # the whole report, after the first error
                subprocess.run([cc, *FLAGS, *flags, "-include", str(HEADER), "-I",
                                str(HEADER.parent), "-fsyntax-only", str(src)])
            return 2
        print(f"{src}: {'compiled' if lib.compiled else 'from the cache'} -> {lib.path}")
        print(f"command: {' '.join(lib.command)}")
        print(f"compiler: {lib.compiler_version}")
        print(json.dumps(lib.info, indent=1))
        return 0
    print("usage: python -m hilrig.runtime.cplugin header | check FILE.c", file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
