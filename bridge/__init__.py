"""Soft-HIL bridge: run the same compiled controller against a plant in another process.

- :mod:`hilrig.bridge.protocol`: the wire format (msgpack frames; docs/protocol.md is the
  authority), codec, sequence tracking and handshake checks.
- :mod:`hilrig.bridge.transport`: ZeroMQ request/reply transports (loopback by default).
- :mod:`hilrig.bridge.session`: the runtime's side of a lockstep session.
- :mod:`hilrig.bridge.standin`: the stand-in simulator (``hilrig serve-sim``).

Today: lockstep over ZeroMQ (tcp or ipc). Still to come: free-running mode, the datagram (UDP)
transport, transport fault injection in the stand-in simulator, CurveZMQ keys for non-loopback
peers.
"""
