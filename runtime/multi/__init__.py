"""Paralleled units on one DC bus (a scenario's ``[units]`` table; docs/scenarios.md).

N emulator units, each with its own output stage (a plant plugin with per-unit values) and its
own controller instance (any controller plugin), feed one DC bus through their cables; the
scenario's load sits on the bus. The runtime sees one plant and one controller: this package
generates both as ordinary plugin modules for the scenario's number of units and their
plugins (:mod:`.plant`, :mod:`.control`), so that every mode, the recording, the interlocks,
the bridge and every command run them unchanged.

- :mod:`.spec` reads ``[units]`` into a :class:`~.spec.UnitsSpec` and builds the two composite
  plugins;
- :mod:`.plant` the bus plant: the units' states, each cable's current, the bus voltage;
- :mod:`.control` the units' controllers, per-unit interlocks, droop and the decentralised
  sharing controller with its message exchange (period, delay, loss).

Signal names: a unit's signal is ``unit<k>_<name>`` (k = 1 .. N, ``name`` the unit plant's
output or input); the bus keeps the single-unit names (``v_out`` the bus voltage, ``i_out``
the load current), so that the reference, the metrics and the bus interlocks read the bus.
"""
