"""FMU plants: a Functional Mock-up Unit (FMI 2.0 or 3.0, model exchange or co-simulation) as
the plant of a scenario (``[plant] fmu = "plant.fmu"``, docs/scenarios.md "FMU plants").

- :mod:`.spec` reads the scenario's ``[plant]`` table and the FMU's modelDescription.xml, checks
  the mapping of hilrig's signals to the FMU's variables (names, causality, units) and makes
  the plant plugin;
- :mod:`.plant` writes that plugin as a generated module into the loop cache (as the
  paralleled units' plant, runtime/multi/plant.py): its kernels call the FMU's C functions by
  address (runtime/native.py ``call_native``);
- :mod:`.instance` instantiates the FMU in Python (fmpy) when the plugin's parameters are
  packed, keeps it while the process runs, and frees it at exit (or on ``release_all``).
"""
