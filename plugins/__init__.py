"""Plugins: plant models, controllers and reference generators.

A plugin is one module holding ``DECLARATION`` (a :class:`hilrig.plugins.base.Declaration`) and
``@njit(cache=True)`` kernels that work on preallocated float64 arrays. See docs/plugins.md.
"""

# the bounds-checked build (HILRIG_CHECKED=1 or NUMBA_BOUNDSCHECK=1 in the environment) must move
# numba's cache before any kernel of this package is defined (see hilrig.runtime.checked)
from hilrig.runtime import checked as _checked  # noqa: E402

if _checked.requested():
    _checked.enable()
