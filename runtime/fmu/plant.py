"""The generated plant plugin of an FMU (written into the loop cache by :func:`generate`; the
registry loads it as a file plugin, as the paralleled units' plant).

Its kernels call the FMU's C functions by address (runtime/native.py ``call_native``), with
the component pointers, function addresses and the addresses of the value-reference arrays
read from the plugin's parameter array ``p`` (runtime/fmu/instance.py ``HEADER``); ``p`` also
holds the kernels' scratch space (the states, inputs, derivatives and outputs handed to the
FMU). The text depends on the FMU's layout and the scenario's mapping, not on the addresses,
so the compiled kernels are cached across processes.

Model exchange (``interface = "me"``): ``derivs`` sets the time, the continuous states and the
inputs (fmi2SetTime, fmi2SetContinuousStates, fmi2SetReal) and returns fmi2GetDerivatives; the
loop integrates them with its own RK4 (the generic stages: no ``rk4_step``). ``outputs`` does
the same and reads the outputs with fmi2GetReal.

Co-simulation (``"cs"``): ``advance_period`` calls fmi2DoStep once per period (the FMU's own
integrator) and reads the mapped state variables back, so the loop's state follows the FMU's.
When the state or time it is called with is not the FMU's (the first tick, another run, a
start offset), it first resets the FMU to that state (fmi2Reset, fmi2SetupExperiment, the
parameters and the states by fmi2SetReal, initialisation). ``derivs`` uses the model-exchange
interface when the FMU offers it (the analysis and the start state), else returns NaN.

FMI 3.0: the same calls by their FMI 3.0 names (fmi3SetFloat64 / fmi3GetFloat64 with their
value counts, fmi3GetContinuousStateDerivatives, fmi3DoStep with its result flags, whose
terminateSimulation or earlyReturn counts as an error); the start time goes to
fmi3EnterInitializationMode (there is no fmi3SetupExperiment).

Any FMI status worse than a warning makes the kernel return NaN: the loop then ends the run
with a plant integration error (the state is not finite), as for any plant whose integration
fails.
"""
from __future__ import annotations

import numpy as np

from hilrig.plugins.base import Declaration, Param, Signal

from .instance import HEADER


def layout(spec: dict) -> dict:
    """Indices into ``p``: the header, then the CS bookkeeping and the scratch space."""
    nx, nin, ny = len(spec["states"]), len(spec["inputs"]), len(spec["outputs"])
    o = len(HEADER)
    lay = {k: i for i, k in enumerate(HEADER)}
    lay["t_next"] = o
    lay["last"] = o + 1
    lay["xb"] = lay["last"] + nx
    lay["inb"] = lay["xb"] + nx
    lay["db"] = lay["inb"] + nin
    lay["yb"] = lay["db"] + nx
    lay["out"] = lay["yb"] + ny  # FMI 3.0 fmi3DoStep's four results (three flags and a time)
    lay["size"] = lay["out"] + 4
    return lay


def _fn(lay, name):
    return f"np.int64(p[{lay[name]}])"


def _set_inputs(spec, lay, ind="    "):
    src = {"u": "u[0]", "P_load": "d[0]", "G_load": "d[1]", "I_load": "d[2]"}
    return "\n".join(f"{ind}p[{lay['inb'] + i}] = {src[n]}" for i, (n, _, _) in enumerate(spec["inputs"]))


def _tuple(items):
    return "(" + ", ".join(items) + ("," if len(items) == 1 else "") + ")"


def module_text(spec: dict, source_key: str) -> str:
    lay = layout(spec)
    nx, nin, ny = len(spec["states"]), len(spec["inputs"]), len(spec["outputs"])
    nan = _tuple(["np.nan"] * nx)
    I32 = "np.int32(0)"
    fmi3 = spec["fmi"] == 3

    def rw(fn, comp, vr, n, ptr):
        """fmi2SetReal / fmi2GetReal (c, vr, nvr, values), or fmi3SetFloat64 / fmi3GetFloat64
        with the number of values after them (one per scalar variable)."""
        extra = f", {n}" if fmi3 else ""
        return f"call_native({_fn(lay, fn)}, {I32}, ({comp}, {_fn(lay, vr)}, {n}, {ptr}{extra}))"

    me_state = "\n".join(f"    p[{lay['xb'] + i}] = x[{i}]" for i in range(nx))
    me_prefix = f"""    c = {_fn(lay, 'me_c')}
    a = np.int64(p.ctypes.data)
{me_state}
{_set_inputs(spec, lay)}
    st = call_native({_fn(lay, 'settime')}, {I32}, (c, np.float64(t)))
    st |= call_native({_fn(lay, 'setx')}, {I32}, (c, a + {8 * lay['xb']}, np.int64({nx})))
    st |= {rw('me_setreal', 'c', 'vr_in', f'np.int64({nin})', f"a + {8 * lay['inb']}")}"""
    parts = []
    if spec["me_id"] is not None:
        parts.append(f'''@njit(cache=True, error_model="numpy")
def derivs(t, p, x, u, d):
    """dx/dt from the FMU (model exchange): time, states and inputs set, derivatives read."""
{me_prefix}
    st |= call_native({_fn(lay, 'getder')}, {I32}, (c, a + {8 * lay['db']}, np.int64({nx})))
    if st > 1:
        return {nan}
    return {_tuple([f"p[{lay['db'] + i}]" for i in range(nx)])}''')
    else:
        parts.append(f'''@njit(cache=True, error_model="numpy")
def derivs(t, p, x, u, d):
    """A co-simulation-only FMU gives no derivatives."""
    return {nan}''')
    if spec["interface"] == "me":
        parts.append(f'''@njit(cache=True, error_model="numpy")
def outputs(t, p, x, u, d, y):
    """The mapped outputs (fmi2GetReal) at time t, state x, inputs u and load d."""
{me_prefix}
    st |= {rw('me_getreal', 'c', 'vr_out', f'np.int64({ny})', f"a + {8 * lay['yb']}")}
    for i in range({ny}):
        y[i] = p[{lay['yb']} + i] if st <= 1 else np.nan''')
    else:
        experiment = "(c, np.int32(0), 0.0, np.float64(t), np.int32(0), 0.0)"
        if fmi3:  # the experiment's start time is fmi3EnterInitializationMode's argument
            setup = ""
            enter = f"    st |= call_native({_fn(lay, 'enter')}, {I32}, {experiment})"
        else:
            setup = f"    st |= call_native({_fn(lay, 'setup')}, {I32}, {experiment})"
            enter = f"    st |= call_native({_fn(lay, 'enter')}, {I32}, (c,))"
        o = lay["out"]
        if fmi3:
            dostep = "\n".join([
                f"    for i in range(4):\n        p[{o} + i] = 0.0",
                f"    st |= call_native({_fn(lay, 'dostep')}, {I32}, (c, np.float64(t), np.float64(h), "
                f"np.int32(1), a + {8 * o}, a + {8 * (o + 1)}, a + {8 * (o + 2)}, a + {8 * (o + 3)}))",
                "    # terminateSimulation or earlyReturn: the step did not reach t + h",
                f"    if p[{o + 1}] != 0.0 or p[{o + 2}] != 0.0:\n        st |= 3"])
        else:
            dostep = (f"    st |= call_native({_fn(lay, 'dostep')}, {I32}, (c, np.float64(t), "
                      f"np.float64(h), np.int32(1)))")
        same = " and ".join(f"x[{i}] == p[{lay['last'] + i}]" for i in range(nx))
        store = "\n".join(f"    p[{lay['xb'] + i}] = x[{i}]" for i in range(nx))
        parts.append(f'''@njit(cache=True, error_model="numpy")
def _sync(t, p, x):
    """Reset the co-simulation FMU to the state x at time t unless it is there already (the
    time within 1e-9 s relative): 0, or the worst FMI status of the reset."""
    tn = p[{lay['t_next']}]
    if abs(t - tn) <= 1e-9 * (1.0 + abs(t)) and {same}:
        return 0
    c = {_fn(lay, 'cs_c')}
    a = np.int64(p.ctypes.data)
{store}
    st = call_native({_fn(lay, 'reset')}, {I32}, (c,))
{setup}
    st |= {rw('cs_setreal', 'c', 'vr_par', _fn(lay, 'n_par'), _fn(lay, 'par'))}
    st |= {rw('cs_setreal', 'c', 'vr_x', f'np.int64({nx})', f"a + {8 * lay['xb']}")}
{enter}
    st |= call_native({_fn(lay, 'exit')}, {I32}, (c,))
    for i in range({nx}):
        p[{lay['last']} + i] = p[{lay['xb']} + i]
    p[{lay['t_next']}] = t if st <= 1 else np.nan
    return st''')
        parts.append(f'''@njit(cache=True, error_model="numpy")
def advance_period(t, h, p, s, u, d):
    """One fmi2DoStep over the period [t, t + h] with u and d held; the new state read back."""
    st = _sync(t, p, s)
    c = {_fn(lay, 'cs_c')}
    a = np.int64(p.ctypes.data)
{_set_inputs(spec, lay)}
    st |= {rw('cs_setreal', 'c', 'vr_in', f'np.int64({nin})', f"a + {8 * lay['inb']}")}
{dostep}
    st |= {rw('cs_getreal', 'c', 'vr_x', f'np.int64({nx})', f"a + {8 * lay['xb']}")}
    for i in range({nx}):
        p[{lay['last']} + i] = p[{lay['xb']} + i]
    if st > 1:
        p[{lay['t_next']}] = np.nan
        return {nan}
    p[{lay['t_next']}] = t + h
    return {_tuple([f"p[{lay['xb'] + i}]" for i in range(nx)])}''')
        parts.append(f'''@njit(cache=True, error_model="numpy")
def outputs(t, p, x, u, d, y):
    """The mapped outputs (fmi2GetReal) at time t and state x (the FMU reset to x if it is
    not there), with the inputs u and load d."""
    st = _sync(t, p, x)
    c = {_fn(lay, 'cs_c')}
    a = np.int64(p.ctypes.data)
{_set_inputs(spec, lay)}
    st |= {rw('cs_setreal', 'c', 'vr_in', f'np.int64({nin})', f"a + {8 * lay['inb']}")}
    st |= {rw('cs_getreal', 'c', 'vr_out', f'np.int64({ny})', f"a + {8 * lay['yb']}")}
    for i in range({ny}):
        y[i] = p[{lay['yb']} + i] if st <= 1 else np.nan''')
    head = f'''"""Generated by hilrig: the plant of the FMU {spec['name']} (FMI {spec['fmi']}.0, {spec['interface']}).
Do not edit: the file name is the hash of its text.
FMU sha256: {spec['sha256']}; hilrig sources: {source_key}"""
import numpy as np
from numba import njit
from hilrig.runtime.native import call_native
from hilrig.runtime.fmu import plant as _fp

SPEC = {spec!r}
DECLARATION = _fp.declaration(SPEC)
#: the states that are currents through the converter's switches ([plant] gate_block_currents):
#: with the gates blocked the command reaches the FMU as NaN (runtime/loop.py)
GATE_BLOCK_CURRENTS = {tuple(spec["gate_block_currents"])!r}


'''
    return head + "\n\n\n".join(parts) + "\n"


def generate(spec: dict, folder):
    """Write (if absent) the plant module for ``spec`` into ``folder``; its path."""
    from hilrig.runtime.loop import source_key
    from hilrig.runtime.multi.plant import write_module
    return write_module(folder, "fmu_plant", module_text(spec, source_key()))


def declaration(spec: dict) -> Declaration:
    """The generated module's DECLARATION: the FMU's real parameters as the plugin's
    parameters, the mapped states, inputs and outputs."""
    from . import instance

    params = tuple(Param(q["name"], q["unit"], q["start"], (-1e300, 1e300),
                         q["description"] or f"FMU parameter {q['name']}") for q in spec["params"])
    lay = layout(spec)

    def build(values, ctx):
        p = np.zeros(lay["size"])
        p[:len(HEADER)] = instance.get(spec, values).header()
        p[lay["t_next"]] = np.nan
        p[lay["last"]:lay["last"] + len(spec["states"])] = np.nan
        return p

    def equilibrium(values, v_out, d):
        if spec["me_id"] is None:
            # co-simulation only: no derivatives to find a steady state with; the FMU's own
            # start values, with the v_out state (if mapped) at the start voltage
            x = np.array(spec["state_starts"], dtype=np.float64)
            for i, (n, _, _) in enumerate(spec["states"]):
                if n == "v_out":
                    x[i] = v_out
            return x
        return instance.get(spec, values).equilibrium(float(v_out), d)

    def sig(rows):
        return tuple(Signal(n, u, f"FMU variable {f}") for n, f, u in rows)

    return Declaration(
        kind="plant", name=f"fmu:{spec['name']}",
        summary=f"FMU {spec['name']} ({'model exchange' if spec['interface'] == 'me' else 'co-simulation'})",
        params=params,
        states=sig((n, spec["names"][vr], spec["units"][vr]) for n, _, vr in spec["states"]),
        inputs=tuple(Signal(n, spec["units"][vr], f"FMU variable {spec['names'][vr]}")
                     for n, _, vr in spec["inputs"] if n == "u"),
        outputs=sig((n, spec["names"][vr], spec["units"][vr]) for n, _, vr in spec["outputs"]),
        source=f"FMU {spec['path']} (sha256 {spec['sha256'][:12]}), FMI {spec['fmi']}.0",
        build=build, equilibrium=equilibrium)
