"""Soft-HIL bridge: run the same compiled controller against a plant in another process.

- :mod:`hilrig.bridge.protocol`: the wire format (msgpack frames; docs/protocol.md is the
  authority), codec, sequence tracking and handshake checks.
- :mod:`hilrig.bridge.transport`: ZeroMQ request/reply and pair transports, UDP (loopback by
  default).
- :mod:`hilrig.bridge.session`: the runtime's side: lockstep and free-running sessions.
- :mod:`hilrig.bridge.standin`: the stand-in simulator (``hilrig serve-sim``) with transport
  faults on schedule or on command.
- :mod:`hilrig.bridge.wire`: lockstep's per-tick path in compiled code (codec, C socket calls).
- :mod:`hilrig.bridge.datagram`: fixed-layout datagrams (a layout agreed out of band, no
  msgpack; docs/protocol.md section 16): layouts, their codec, the stand-in's side.
- :mod:`hilrig.bridge.keys`: CurveZMQ keys for peers on other machines.
"""

# the bounds-checked build (HILRIG_CHECKED=1 or NUMBA_BOUNDSCHECK=1 in the environment) must move
# numba's cache before any kernel of this package is defined (see hilrig.runtime.checked)
from hilrig.runtime import checked as _checked  # noqa: E402

if _checked.requested():
    _checked.enable()
