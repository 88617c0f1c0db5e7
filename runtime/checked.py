"""The bounds-checked build of the loop (``--checked``): for plugin authors and the smoke tests.

The normal loop is compiled without bounds checks (numba's default): an index out of range in a
plugin kernel or in the loop reads or writes memory that is not the array's, silently or with a
crash. The runtime validates every array the generated loop itself indexes once per run
(:func:`hilrig.runtime.run.bind`), but it cannot know which indices a plugin's kernel uses. The
checked build compiles the same loop text with ``boundscheck=True``: numba then tests every
index and raises ``IndexError``; the loop writes which stage it is in (the kernel of which
plugin) into the run's event array before each stage, so the runtime can name the kernel and the
tick (:func:`hilrig.runtime.loop.stage_text`).

It is switched on per process by ``--checked`` (every command), ``HILRIG_CHECKED=1`` or
``NUMBA_BOUNDSCHECK=1``, and inherited by worker and child processes through the environment.
It is cached apart from the normal build: the generated module has its own name, and numba's own
cache (which does not record whether a function was compiled with bounds checks, so a checked
process could otherwise load an unchecked helper function from it) moves to a folder of its own.
This module imports nothing heavy: the command line calls :func:`enable` before numba loads.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path


def requested() -> bool:
    """Whether this process runs the bounds-checked build."""
    return (os.environ.get("HILRIG_CHECKED", "0") not in ("", "0")
            or os.environ.get("NUMBA_BOUNDSCHECK", "0") not in ("", "0"))


def numba_cache_dir() -> Path:
    """numba's cache folder for the checked build (beside the loop cache, or inside the user's
    own NUMBA_CACHE_DIR)."""
    own = os.environ.get("HILRIG_CHECKED_NUMBA_CACHE")
    if own:
        return Path(own)
    env = os.environ.get("HILRIG_CACHE_DIR")
    base = Path(env) if env else Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "hilrig"
    return base / "checked-numba"


def enable() -> None:
    """Switch this process (and the processes it starts) to the bounds-checked build."""
    os.environ["HILRIG_CHECKED"] = "1"
    os.environ["NUMBA_BOUNDSCHECK"] = "1"
    cache = numba_cache_dir()
    os.environ["HILRIG_CHECKED_NUMBA_CACHE"] = str(cache)
    os.environ["NUMBA_CACHE_DIR"] = str(cache)
    if "numba" in sys.modules:  # imported already: read the two settings again
        from numba.core import config
        config.reload_config()
