"""``[plant] fmu = ...``: read the scenario's FMU plant table and the FMU's model description
(FMI 2.0 or 3.0),
check the mapping, make the plant plugin (runtime/fmu/plant.py).

The table (docs/scenarios.md "FMU plants")::

    [plant]
    fmu = "plant.fmu"               # relative to the scenario file
    interface = "model_exchange"    # or "co_simulation"; default: model exchange if offered
    L1 = "150 uH"                   # any other key: a real parameter of the FMU, by its name
    [plant.inputs]                  # hilrig's plant input / load signal = FMU input variable
    u = "u_conv"
    P_load = "load_P"
    [plant.outputs]                 # hilrig's measured signal = FMU output variable
    v_out = "y_vout"
    [plant.states]                  # hilrig's state name = FMU state variable
    v_out = "filter.vC2"

and optionally ``gate_block_currents = ["i_L1"]`` in ``[plant]``: the states that are currents
through the converter's switches (the gate-block safe state).

Every mismatch is one ScenarioError naming the scenario, the key, the FMU file and variable
and the fix (the CLI exits with status 2).
"""
from __future__ import annotations

import difflib
import hashlib
import re
import zipfile
from pathlib import Path
from xml.etree import ElementTree

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.units import UNITS

RESERVED = ("fmu", "interface", "inputs", "outputs", "states", "gate_block_currents")
INTERFACES = {"model_exchange": "me", "co_simulation": "cs"}
#: hilrig's plant inputs and load signals an FMU input may take, with their units
INPUT_SIGNALS = {"u": "V", "P_load": "W", "G_load": "S", "I_load": "A"}
#: the units of the signals hilrig's controllers, interlocks and analysis know by name
KNOWN_SIGNALS = {"v_out": "V", "i_out": "A", "i_L1": "A", "v_C1": "V", "i_L2": "A", "v_dc": "V",
                 "i_L": "A", "v_C": "V"}
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


def _canonical(unit: str | None) -> str | None:
    if not unit:
        return None
    return UNITS.get(unit, unit)


def _close(name, known) -> str:
    close = difflib.get_close_matches(str(name), list(known), n=3)
    return f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""


def build(cx, raw: dict, folder: Path, quantity):
    """The plant choice for the scenario ``raw`` whose ``[plant]`` table has an ``fmu`` key."""
    from fmpy import read_model_description

    from hilrig.runtime import registry
    from hilrig.runtime.errors import PluginError
    from hilrig.runtime.scenario import PluginChoice

    tab = raw["plant"]
    ref = tab["fmu"]
    import numba
    if numba.config.DISABLE_JIT:
        raise cx.fail("plant.fmu", f" = {ref!r}: an FMU plant's kernels call the FMU's C functions "
                      f"from compiled code, which NUMBA_DISABLE_JIT=1 switches off; run without it")
    if "units" in raw:
        raise cx.fail("plant.fmu", f" = {ref!r} with [units]: an FMU plant does not run as "
                      f"paralleled units yet; give [plant] a plugin, or leave [units] out")
    if "plugin" in tab:
        raise cx.fail("plant.plugin", f" = {tab['plugin']!r} and plant.fmu = {ref!r} are both given; "
                      f"a plant is a plugin or an FMU: remove one of the two keys")
    if not isinstance(ref, str) or not ref:
        raise cx.fail("plant.fmu", f" = {ref!r} is not a path to an .fmu file")
    path = Path(ref).expanduser()
    if not path.is_absolute():
        path = cx.base / path
    path = path.resolve()
    fname = path.name
    if not path.is_file():
        raise cx.fail("plant.fmu", f" = {ref!r}: the FMU file does not exist (looked at {path}); "
                      f"give its path, relative to the scenario file")
    if not zipfile.is_zipfile(path):
        raise cx.fail("plant.fmu", f" = {ref!r}: {fname} is not an FMU (not a zip archive)")
    try:
        with zipfile.ZipFile(path) as z:
            root = ElementTree.fromstring(z.read("modelDescription.xml"))
    except KeyError:
        raise cx.fail("plant.fmu", f" = {ref!r}: {fname} has no modelDescription.xml; export the "
                      f"FMU again") from None
    except ElementTree.ParseError as exc:
        raise cx.fail("plant.fmu", f" = {ref!r}: the modelDescription.xml of {fname} is not valid "
                      f"XML ({exc}); export the FMU again") from None
    version = root.get("fmiVersion")
    if version != "2.0" and not (version or "").startswith("3."):
        raise cx.fail("plant.fmu", f" = {ref!r}: {fname} is an FMI {version} FMU; hilrig runs FMI "
                      f"2.0 and 3.0 FMUs: export it as FMI 2.0 or 3.0")
    fmi = 2 if version == "2.0" else 3
    real = "Real" if fmi == 2 else "Float64"
    try:
        md = read_model_description(str(path), validate=False)
    except Exception as exc:
        raise cx.fail("plant.fmu", f" = {ref!r}: the model description of {fname} cannot be read "
                      f"({type(exc).__name__}: {exc}); export the FMU again") from None
    # which interface
    iface = tab.get("interface")
    offered = [k for k, v in (("model_exchange", md.modelExchange), ("co_simulation", md.coSimulation)) if v]
    if iface is None:
        iface = offered[0] if offered else "model_exchange"
    if iface not in INTERFACES:
        raise cx.fail("plant.interface", f" = {iface!r} is not an interface{_close(iface, INTERFACES)} "
                      f"(write \"model_exchange\" or \"co_simulation\")")
    if iface not in offered:
        raise cx.fail("plant.interface", f" = {iface!r}: {fname} does not offer {iface.replace('_', ' ')} "
                      f"(it offers: {', '.join(offered) or 'none'}); choose one it offers")
    me, cs = md.modelExchange, md.coSimulation
    # model exchange leaves the events to the importer; a co-simulation FMU locates its own
    if iface == "model_exchange" and int(md.numberOfEventIndicators or 0) > 0:
        raise cx.fail("plant.fmu", f" = {ref!r}: {fname} has {md.numberOfEventIndicators} event "
                      f"indicators; hilrig does not locate state events in an FMU yet: export it "
                      f"without event indicators (or run it as co-simulation)")
    if iface == "model_exchange" and me.needsCompletedIntegratorStep:
        raise cx.fail("plant.fmu", f" = {ref!r}: {fname} needs fmi{fmi}CompletedIntegratorStep after "
                      f"every step, which hilrig's loop does not call; export it with "
                      f"completedIntegratorStepNotNeeded=\"true\" or run it as co-simulation")
    variables = {v.name: v for v in md.modelVariables}
    where_fmu = f"in {fname}"

    def variable(key, name, causalities, what):
        if not isinstance(name, str):
            raise cx.fail(key, f" = {name!r} is not the name of a variable {where_fmu}")
        v = variables.get(name)
        if v is None:
            raise cx.fail(key, f" = {name!r}: no variable {name!r} {where_fmu}{_close(name, variables)}; "
                          f"name one of its {what} variables")
        if v.type != real:
            raise cx.fail(key, f" = {name!r}: variable {name!r} {where_fmu} is of type {v.type}; "
                          f"hilrig exchanges {real} variables only: map a {real} one")
        if getattr(v, "dimensions", None):
            raise cx.fail(key, f" = {name!r}: variable {name!r} {where_fmu} is an array; hilrig "
                          f"exchanges scalar variables only: map a scalar one")
        if causalities and v.causality not in causalities:
            raise cx.fail(key, f" = {name!r}: variable {name!r} {where_fmu} has causality "
                          f"{v.causality!r}, an {' or '.join(causalities)} is needed here; map "
                          f"one of its {what} variables")
        return v

    def check_unit(key, name, v, expected):
        got = _canonical(v.unit or (v.declaredType.unit if v.declaredType is not None else None))
        if expected is not None and got is not None and got != expected:
            raise cx.fail(key, f" = {name!r}: variable {name!r} {where_fmu} is in {got}, hilrig's "
                          f"signal is in {expected}; map a variable in {expected} (or convert "
                          f"its unit in the FMU)")
        return got

    def table(key):
        t = tab.get(key, {})
        if not isinstance(t, dict):
            raise cx.fail(f"plant.{key}", f" = {t!r} is not a table of hilrig signal = FMU variable name")
        return t

    # inputs: u is required; the load signals are optional (the FMU may model its own load)
    inputs = []
    tin = table("inputs")
    if "u" not in tin:
        raise cx.fail("plant.inputs", f": the converter command u is not mapped; add u = \"<the "
                      f"FMU input {where_fmu} that takes the voltage command>\"")
    for sig, name in tin.items():
        key = f"plant.inputs.{sig}"
        if sig not in INPUT_SIGNALS:
            raise cx.unknown("plant.inputs", sig, INPUT_SIGNALS)
        v = variable(key, name, ("input",), "input")
        check_unit(key, name, v, INPUT_SIGNALS[sig])
        inputs.append((sig, name, v.valueReference))
    units = {}
    names = {}
    # outputs: v_out is required
    outputs = []
    tout = table("outputs")
    if "v_out" not in tout:
        raise cx.fail("plant.outputs", f": the output voltage v_out is not mapped; add v_out = "
                      f"\"<the FMU output {where_fmu} that is the output voltage>\"")
    for sig, name in tout.items():
        key = f"plant.outputs.{sig}"
        if not _NAME.match(sig):
            raise cx.fail(key, ": a signal name is a letter or _ followed by letters, digits or _")
        v = variable(key, name, ("output",), "output")
        u = check_unit(key, name, v, KNOWN_SIGNALS.get(sig))
        outputs.append((sig, name, v.valueReference))
        units[v.valueReference] = KNOWN_SIGNALS.get(sig) or u or "-"
        names[v.valueReference] = name
    # states: model exchange: exactly the FMU's continuous states, in its order
    tst = table("states")
    states = []
    if iface == "model_exchange" or me is not None:
        fmu_states = [dv.variable.derivative.name for dv in md.derivatives]
        inverse = {}
        for sig, name in tst.items():
            key = f"plant.states.{sig}"
            if name not in fmu_states:
                variable(key, name, (), "state")
                raise cx.fail(key, f" = {name!r}: variable {name!r} {where_fmu} is not a continuous "
                              f"state (its states: {', '.join(fmu_states)}); map one of them")
            inverse[name] = sig
        missing = [s for s in fmu_states if s not in inverse]
        if missing:
            raise cx.fail("plant.states", f": the FMU's state(s) {', '.join(repr(m) for m in missing)} "
                          f"{where_fmu} are not mapped; give each a hilrig name, e.g. "
                          f"{_safe(missing[0])} = {missing[0]!r} (v_out for the output capacitor's)")
        order = fmu_states
    else:
        if not tst:
            raise cx.fail("plant.states", f": a co-simulation FMU's states are the variables that "
                          f"hilrig sets at the start and reads after each step; map them, e.g. "
                          f"v_out = \"<the output voltage's state variable {where_fmu}>\"")
        inverse = {name: sig for sig, name in tst.items()}
        order = list(tst.values())
    starts = []
    for name in order:
        sig = inverse[name]
        key = f"plant.states.{sig}"
        if not _NAME.match(sig):
            raise cx.fail(key, ": a state name is a letter or _ followed by letters, digits or _")
        v = variable(key, name, (), "state")
        if iface == "co_simulation" and v.initial not in ("exact", "approx"):
            raise cx.fail(key, f" = {name!r}: variable {name!r} {where_fmu} has no start value "
                          f"hilrig may set (initial = {v.initial!r}); a co-simulation state needs "
                          f"initial = \"exact\" or \"approx\"")
        u = check_unit(key, name, v, KNOWN_SIGNALS.get(sig))
        states.append((sig, name, v.valueReference))
        units[v.valueReference] = KNOWN_SIGNALS.get(sig) or u or "-"
        names[v.valueReference] = name
        starts.append(float(v.start) if v.start not in (None, "") else 0.0)
    for sig, name, vr in inputs:
        units[vr] = INPUT_SIGNALS[sig]
        names[vr] = name
    # parameters: every other key of [plant] is a real parameter of the FMU
    params = []
    for v in md.modelVariables:
        if (v.causality == "parameter" and v.type == real and v.variability in ("fixed", "tunable")
                and not getattr(v, "dimensions", None)):
            u = _canonical(v.unit or (v.declaredType.unit if v.declaredType is not None else None))
            params.append({"name": v.name, "vr": v.valueReference,
                           "unit": u if u in UNITS.values() else "-",
                           "start": float(v.start) if v.start not in (None, "") else 0.0,
                           "description": v.description or ""})
    given = {}
    pnames = {q["name"]: q for q in params}
    for k, val in tab.items():
        if k in RESERVED:
            continue
        if k not in pnames:
            raise cx.fail(f"plant.{k}", f": {fname} has no real parameter {k!r}{_close(k, pnames)} "
                          f"(its parameters: {', '.join(pnames) or 'none'}; the FMU plant's own keys: "
                          f"{', '.join(RESERVED)})")
        q = pnames[k]
        given[k] = quantity(f"plant.{k}", val, q["unit"], (-1e300, 1e300))
    # the states that are currents through the converter's switches: with the gates blocked
    # (a trip's safe action gate_block) the command reaches the FMU as NaN and, with model
    # exchange, the loop stops each of them at zero (runtime/loop.py blocked_step)
    gates = tab.get("gate_block_currents", [])
    names_x = [n for n, _, _ in states]
    if not isinstance(gates, list) or not all(isinstance(g, str) for g in gates):
        raise cx.fail("plant.gate_block_currents", f" = {gates!r} is not a list of state names, "
                      f"e.g. [\"i_L1\"]")
    for g in gates:
        if g not in names_x:
            raise cx.fail("plant.gate_block_currents", f": {g!r} is not a state of this FMU plant"
                          f"{_close(g, names_x)} (its states: {', '.join(names_x)}); name the "
                          f"inductor current(s) through the converter's switches")
        vr = states[names_x.index(g)][2]
        if units.get(vr) not in ("A", "-"):
            raise cx.fail("plant.gate_block_currents", f": state {g!r} is in {units.get(vr)}; "
                          f"name a current (A) through the converter's switches")
    design = raw.get("design", {})
    if me is None and isinstance(design, dict) and design.get("defaults", "plant") == "plant":
        raise cx.fail("plant.interface", f" = {iface!r}: {fname} offers co-simulation only, which "
                      f"gives no derivatives to design the controller from; set [design] defaults "
                      f"= \"declared\" (the controller's declared numbers, or give them), or use "
                      f"an FMU that offers model exchange as well")
    spec = {"name": fname, "path": str(path), "sha256": hashlib.sha256(path.read_bytes()).hexdigest(),
            "interface": INTERFACES[iface], "guid": md.guid, "fmi": fmi,
            "me_id": me.modelIdentifier if me is not None else None,
            "cs_id": cs.modelIdentifier if cs is not None else None,
            "inputs": inputs, "outputs": outputs, "states": states, "state_starts": starts,
            "params": params, "names": names, "units": units,
            "gate_block_currents": [names_x.index(g) for g in gates]}
    from .plant import generate
    mod_path = generate(spec, folder)
    try:
        plugin = registry.load("plant", str(mod_path))
    except PluginError as exc:
        raise ScenarioError(f"{cx.name}: plant.fmu: {exc}") from None
    values = {q["name"]: q["start"] for q in params}
    values.update(given)
    return PluginChoice(plugin=plugin, values=values, given=frozenset(given))


def _safe(name: str) -> str:
    return re.sub(r"\W", "_", name.split(".")[-1])
