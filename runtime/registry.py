"""Plugin discovery: built-ins and third-party plugins through entry points, or a file path.

Entry-point groups: ``hilrig.plants``, ``hilrig.controllers``, ``hilrig.references``; each entry
names a module holding ``DECLARATION`` and the kernels of its kind (see
:mod:`hilrig.plugins.base`). A scenario may also name a ``.py`` file instead of a plugin name, or a ``.c`` file for a
controller written in C (:mod:`hilrig.runtime.cplugin`).
"""
from __future__ import annotations

import difflib
import hashlib
import importlib
import importlib.util
import os
import sys
from dataclasses import dataclass
from importlib.metadata import entry_points
from types import ModuleType

from hilrig.plugins.base import KINDS, Declaration

from .errors import PluginError

KERNELS = {"plant": ("derivs", "outputs"), "controller": ("init", "step"),
           "reference": ("init", "step")}
#: each kernel's arguments, in order, as the loop calls it (docs/plugins.md)
KERNEL_ARGS = {
    ("plant", "derivs"): ("t", "p", "x", "u", "d"),
    ("plant", "outputs"): ("t", "p", "x", "u", "d", "y"),
    ("plant", "rk4_step"): ("dt", "p", "s", "u", "d"),
    ("plant", "advance_period"): ("t", "h", "p", "s", "u", "d"),
    ("controller", "init"): ("p", "xc", "y", "r"),
    ("controller", "step"): ("t", "p", "xc", "y", "r", "u"),
    ("reference", "init"): ("p", "xr", "y"),
    ("reference", "step"): ("t", "dt", "p", "xr", "y", "w"),
}


@dataclass(frozen=True)
class Plugin:
    """A loaded plugin: its module, declaration, and how generated code imports it."""

    kind: str
    name: str
    module: ModuleType
    declaration: Declaration
    #: ("module", dotted name) or ("file", absolute path)
    origin: tuple[str, str]

    @property
    def source_file(self) -> str:
        return os.path.abspath(self.module.__file__)


def _group(kind: str) -> str:
    return f"hilrig.{kind}s"


def available(kind: str) -> dict[str, str]:
    """Names of installed plugins of a kind -> module path."""
    return {ep.name: ep.value for ep in entry_points(group=_group(kind))}


def load(kind: str, ref: str) -> Plugin:
    """Load a plugin by entry-point name or by a path to a ``.py`` file."""
    if kind not in KINDS:
        raise PluginError(f"unknown plugin kind {kind!r}; expected one of {', '.join(KINDS)}")
    if ref.endswith(".py") or ref.endswith(".c") or os.sep in ref or "/" in ref:
        path = os.path.abspath(os.path.expanduser(ref))
        if not os.path.isfile(path):
            raise PluginError(f"{kind} plugin file {ref!r} does not exist (looked at {path})")
        if path.endswith(".c"):  # a controller in C (runtime/cplugin.py)
            if kind != "controller":
                raise PluginError(f"{kind} plugin {ref!r}: only controllers can be written in C")
            from .cplugin import plugin as c_plugin
            return c_plugin(path)
        module = load_file(path)
        origin = ("file", path)
    else:
        names = available(kind)
        if ref not in names:
            close = difflib.get_close_matches(ref, list(names), n=3)
            hint = f"; did you mean {', '.join(close)}?" if close else ""
            raise PluginError(f"no {kind} plugin named {ref!r}{hint} (installed: "
                              f"{', '.join(sorted(names)) or 'none'}; or give a path to a .py file)")
        try:
            module = importlib.import_module(names[ref])
        except Exception as exc:  # a broken third-party plugin must not look like a hilrig bug
            raise PluginError(f"{kind} plugin {ref!r} ({names[ref]}) failed to import: {exc}") from exc
        origin = ("module", module.__name__)
    decl = check(kind, module)
    return Plugin(kind=kind, name=decl.name, module=module, declaration=decl, origin=origin)


def load_file(path: str) -> ModuleType:
    """Import a plugin file under a stable module name derived from its path."""
    mod_name = "hilrig_user_" + hashlib.sha1(path.encode()).hexdigest()[:12]
    if mod_name in sys.modules:
        return sys.modules[mod_name]
    spec = importlib.util.spec_from_file_location(mod_name, path)
    if spec is None or spec.loader is None:
        raise PluginError(f"cannot import plugin file {path}")
    module = importlib.util.module_from_spec(spec)
    sys.modules[mod_name] = module
    try:
        spec.loader.exec_module(module)
    except Exception as exc:
        del sys.modules[mod_name]
        raise PluginError(f"plugin file {path} failed to import: {type(exc).__name__}: {exc}") from exc
    return module


def check(kind: str, module: ModuleType) -> Declaration:
    """Check that a module follows the contract of its kind; return its declaration."""
    decl = getattr(module, "DECLARATION", None)
    where = getattr(module, "__file__", module.__name__)
    if not isinstance(decl, Declaration):
        raise PluginError(f"{where}: no DECLARATION (a hilrig.plugins.base.Declaration)")
    if decl.kind != kind:
        raise PluginError(f"{where}: declares a {decl.kind} plugin, but a {kind} is needed here")
    import numba
    for k in KERNELS[kind]:
        fn = getattr(module, k, None)
        # with NUMBA_DISABLE_JIT=1 (debugging) the kernels are plain functions
        compiled = hasattr(fn, "py_func") or (numba.config.DISABLE_JIT and callable(fn))
        if fn is None or not compiled:
            raise PluginError(f"{where}: kernel {k!r} missing or not compiled with numba's @njit")
    for (knd, k), args in KERNEL_ARGS.items():
        fn = getattr(module, k, None)
        if knd == kind and fn is not None:
            _check_arguments(where, k, getattr(fn, "py_func", fn), args)
    if kind == "plant" and decl.equilibrium is None:
        raise PluginError(f"{where}: a plant declares equilibrium(values, v_out, d)")
    return decl


def _check_arguments(where: str, name: str, fn, args: tuple[str, ...]) -> None:
    """A kernel must take exactly the loop's arguments (names are free, the count is not): a
    wrong count would otherwise surface as a long numba typing error in the generated loop."""
    import inspect
    try:
        params = list(inspect.signature(fn).parameters.values())
    except (TypeError, ValueError):
        return
    plain = [q for q in params if q.kind in (q.POSITIONAL_ONLY, q.POSITIONAL_OR_KEYWORD)]
    if len(plain) != len(params) or len(plain) != len(args):
        got = ", ".join(q.name for q in params)
        raise PluginError(f"{where}: kernel {name}({got}) takes {len(params)} argument(s); the "
                          f"loop calls {name}({', '.join(args)}) (see docs/plugins.md)")


def all_plugins() -> list[Plugin]:
    """Every installed plugin of every kind (for ``hilrig plugins``)."""
    out = []
    for kind in KINDS:
        for name in sorted(available(kind)):
            out.append(load(kind, name))
    return out
