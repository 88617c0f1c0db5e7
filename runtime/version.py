"""hilrig's installed version, for run records, the loop cache key and ``hilrig --version``."""
from __future__ import annotations

import functools


@functools.lru_cache(maxsize=1)
def installed() -> str:
    """The installed package's version, read once per process (the metadata lookup parses the
    package's METADATA file, a few ms, and a version does not change under a running process);
    "0+unknown" when hilrig runs from sources that are not installed."""
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version("hilrig")
    except PackageNotFoundError:
        return "0+unknown"
