"""hilrig runtime: the compiled loop, scenario loading, recording, metrics and the CLI."""

# the bounds-checked build (HILRIG_CHECKED=1 or NUMBA_BOUNDSCHECK=1 in the environment) must move
# numba's cache before any kernel of this package is defined (see hilrig.runtime.checked)
from hilrig.runtime import checked as _checked  # noqa: E402

if _checked.requested():
    _checked.enable()
