"""Errors of the bridge area. Each subclasses a builtin so callers can catch broadly.

A message names the frame and field, the value received, what was expected and, where there is
one, how to fix it. ``ProtocolError.reason`` is a short machine-readable code (see
docs/protocol.md, "Rejection reasons") that the session counts and logs, and maps to the code
of an ERROR frame.
"""


class ProtocolError(ValueError):
    """A frame broke the wire protocol: malformed, oversize, wrong field, or a handshake mismatch.

    Parameters
    ----------
    reason : str
        Short machine-readable code, e.g. ``"oversize"``, ``"bad-type"``, ``"arity"``,
        ``"version"``, ``"vector-length"``, ``"not-finite"``, ``"unknown-type"``,
        ``"malformed"``. The full list is in docs/protocol.md.
    message : str
        Human-readable explanation naming the field, the value and what was expected.
    """

    def __init__(self, reason: str, message: str):
        # both go into args so the exception pickles (e.g. across a process pool) intact
        super().__init__(reason, message)
        self.reason = reason
        self.message = message

    def __str__(self) -> str:
        return self.message

    def __repr__(self) -> str:
        return f"ProtocolError({self.reason!r}, {self.message!r})"


class BridgeError(RuntimeError):
    """The bridge cannot be set up or used: bad address, closed connection, failed handshake."""


class TransportError(OSError):
    """A transport could not bind, connect, send or receive."""


class TransportTimeout(TransportError, TimeoutError):
    """No frame arrived from the peer within the transport's timeout."""


class PeerError(RuntimeError):
    """The peer ended the session with an ERROR frame.

    Parameters
    ----------
    code : int
        The ERROR frame's code (1 version, 2 mode, 3 map, 4 period, 5 malformed,
        6 unexpected frame; other values are passed on as received).
    reason : str
        The peer's reason text, as received.
    """

    def __init__(self, code: int, reason: str):
        super().__init__(code, reason)
        self.code = code
        self.reason = reason

    def __str__(self) -> str:
        return f"the peer ended the session with error code {self.code}: {self.reason}"
