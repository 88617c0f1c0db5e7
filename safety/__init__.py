"""Safety layer: interlocks, the trip latch and high-voltage caution notices.

These are monitoring functions of a test tool, not safety-rated functions (IEC 61508,
ISO 13849-1): they never replace hardware protection, isolation and interlocking, and local codes
and licensed practice govern any connection to real equipment.
"""

# the bounds-checked build (HILRIG_CHECKED=1 or NUMBA_BOUNDSCHECK=1 in the environment) must move
# numba's cache before any kernel of this package is defined (see hilrig.runtime.checked)
from hilrig.runtime import checked as _checked  # noqa: E402

if _checked.requested():
    _checked.enable()
