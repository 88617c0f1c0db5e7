"""Soft-HIL bridge to an external plant simulator (wire protocol, transports, sessions).

Not built yet: the bridge is the subject of its own issue. Runs today use the embedded plant
(``mode = "sil"``); a scenario asking for another mode is refused with a clear message.
"""
