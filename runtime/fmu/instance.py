"""Live FMU instances (FMI 2.0 or 3.0): instantiated in Python with fmpy before a run (when the
plant plugin's parameters are packed), kept for the process (a later run of the same FMU and
parameters reuses them: the kernels set every state they need on each call), freed at exit or
by :func:`release_all`.

The compiled kernels get the instance as numbers in the plugin's parameter array ``p``
(:func:`header`): the component pointers, the addresses of the FMI functions they call and of
the value-reference arrays (runtime/native.py: exact as float64 below 2**53).
"""
from __future__ import annotations

import atexit
import ctypes
import shutil

import numpy as np

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.native import function_address

#: the header of ``p``, in order (runtime/fmu/plant.py reads them by these indices)
HEADER = ("me_c", "cs_c", "settime", "setx", "me_setreal", "me_getreal", "getder",
          "cs_setreal", "cs_getreal", "dostep", "reset", "setup", "enter", "exit",
          "vr_in", "vr_out", "vr_x", "vr_par", "par", "n_par")

_LIVE: dict[tuple, "Instance"] = {}


class Instance:
    """One FMU's instances for one set of parameter values: a model-exchange instance (when
    the scenario runs model exchange, or for the start state when the FMU offers it) and a
    co-simulation instance (when it runs co-simulation)."""

    def __init__(self, spec: dict, values: dict):
        from fmpy import extract
        self.spec = spec
        self.unzip = extract(spec["path"])
        self.me = self.cs = None
        self.vr_in = np.array([v for _, _, v in spec["inputs"]], dtype=np.uint32)
        self.vr_out = np.array([v for _, _, v in spec["outputs"]], dtype=np.uint32)
        self.vr_x = np.array([v for _, _, v in spec["states"]], dtype=np.uint32)
        pars = [(q["vr"], float(values[q["name"]])) for q in spec["params"]]
        self.vr_par = np.array([v for v, _ in pars] or [0], dtype=np.uint32)
        self.par = np.array([x for _, x in pars] or [0.0], dtype=np.float64)
        self.n_par = len(pars)
        try:
            if spec["me_id"] is not None:
                self.me = self._start("me")
            if spec["interface"] == "cs":
                self.cs = self._start("cs")
        except Exception as exc:  # fmpy raises Exception for a library it cannot load
            self.free()
            raise ScenarioError(f"{spec['name']}: the FMU could not be instantiated: {exc} "
                                f"(an FMU for this platform, linux64, is needed)") from None

    def _start(self, kind: str):
        fmi3 = self.spec["fmi"] == 3
        if fmi3:
            from fmpy.fmi3 import FMU3Model as Model, FMU3Slave as Slave
        else:
            from fmpy.fmi2 import FMU2Model as Model, FMU2Slave as Slave
        cls, ident = (Model, self.spec["me_id"]) if kind == "me" else (Slave, self.spec["cs_id"])
        m = cls(guid=self.spec["guid"], unzipDirectory=self.unzip, modelIdentifier=ident,
                instanceName=f"hilrig_{kind}")
        m.instantiate()
        if not fmi3:
            m.setupExperiment(startTime=0.0)
        if self.n_par:
            self._set(m, list(self.vr_par), list(self.par))
        if fmi3:
            m.enterInitializationMode(startTime=0.0)
        else:
            m.enterInitializationMode()
        m.exitInitializationMode()
        if kind == "me":
            for _ in range(100):
                more = m.updateDiscreteStates()[0] if fmi3 else m.newDiscreteStates()[0]
                if not more:
                    break
            m.enterContinuousTimeMode()
        return m

    def _set(self, m, vrs, values):
        if self.spec["fmi"] == 3:
            m.setFloat64(vrs, values)
        else:
            m.setReal(vrs, values)

    def _get(self, m, vrs):
        return m.getFloat64(vrs) if self.spec["fmi"] == 3 else m.getReal(vrs)

    def header(self) -> np.ndarray:
        """The header of ``p`` (:data:`HEADER`)."""
        def fa(m, name):
            return float(function_address(getattr(m.dll, name))) if m is not None and name else 0.0

        me, cs = self.me, self.cs
        if self.spec["fmi"] == 3:
            names = dict(settime="fmi3SetTime", setx="fmi3SetContinuousStates",
                         setreal="fmi3SetFloat64", getreal="fmi3GetFloat64",
                         getder="fmi3GetContinuousStateDerivatives", dostep="fmi3DoStep",
                         reset="fmi3Reset", setup=None, enter="fmi3EnterInitializationMode",
                         exit="fmi3ExitInitializationMode")
        else:
            names = dict(settime="fmi2SetTime", setx="fmi2SetContinuousStates",
                         setreal="fmi2SetReal", getreal="fmi2GetReal",
                         getder="fmi2GetDerivatives", dostep="fmi2DoStep", reset="fmi2Reset",
                         setup="fmi2SetupExperiment", enter="fmi2EnterInitializationMode",
                         exit="fmi2ExitInitializationMode")
        h = dict(me_c=float(me.component or 0) if me else 0.0,
                 cs_c=float(cs.component or 0) if cs else 0.0,
                 settime=fa(me, names["settime"]), setx=fa(me, names["setx"]),
                 me_setreal=fa(me, names["setreal"]), me_getreal=fa(me, names["getreal"]),
                 getder=fa(me, names["getder"]),
                 cs_setreal=fa(cs, names["setreal"]), cs_getreal=fa(cs, names["getreal"]),
                 dostep=fa(cs, names["dostep"]), reset=fa(cs, names["reset"]),
                 setup=fa(cs, names["setup"]), enter=fa(cs, names["enter"]),
                 exit=fa(cs, names["exit"]),
                 vr_in=float(self.vr_in.ctypes.data), vr_out=float(self.vr_out.ctypes.data),
                 vr_x=float(self.vr_x.ctypes.data), vr_par=float(self.vr_par.ctypes.data),
                 par=float(self.par.ctypes.data), n_par=float(self.n_par))
        out = np.array([h[k] for k in HEADER], dtype=np.float64)
        assert all(float(int(v)) == v and v < 2.0 ** 53 for v in out)
        return out

    def equilibrium(self, v_out: float, d) -> np.ndarray:
        """The steady state with the output ``v_out`` [V] and the load ``d``: Newton's method on
        dx/dt = 0 and the mapped v_out output = v_out, over the states and the command u
        (Jacobian by central differences), through the model-exchange interface."""
        m, spec = self.me, self.spec
        nx = len(spec["states"])
        iv = [n for n, _, _ in spec["outputs"]].index("v_out")
        dx = np.zeros(nx)
        d = np.asarray(d, dtype=np.float64)

        def residual(z):
            x = np.ascontiguousarray(z[:nx])
            ins = {"u": z[nx], "P_load": d[0], "G_load": d[1], "I_load": d[2]}
            m.setTime(0.0)
            m.setContinuousStates(x.ctypes.data_as(ctypes.POINTER(ctypes.c_double)), nx)
            self._set(m, list(self.vr_in), [float(ins[n]) for n, _, _ in spec["inputs"]])
            dptr = dx.ctypes.data_as(ctypes.POINTER(ctypes.c_double))
            if spec["fmi"] == 3:
                m.getContinuousStateDerivatives(dptr, nx)
            else:
                m.getDerivatives(dptr, nx)
            y = self._get(m, [int(self.vr_out[iv])])[0]
            return np.append(dx.copy(), y - v_out)

        z = np.append(np.array(spec["state_starts"], dtype=np.float64), float(v_out))
        for i, (name, _, _) in enumerate(spec["states"]):
            if name == "v_out":
                z[i] = v_out
        for _ in range(50):
            r = residual(z)
            jac = np.empty((nx + 1, nx + 1))
            for j in range(nx + 1):
                h = 1e-6 * max(1.0, abs(z[j]))
                zp, zm = z.copy(), z.copy()
                zp[j] += h
                zm[j] -= h
                jac[:, j] = (residual(zp) - residual(zm)) / (2.0 * h)
            try:
                step = np.linalg.solve(jac, r)
            except np.linalg.LinAlgError:
                break
            z -= step
            if np.all(np.abs(step) <= 1e-14 * np.maximum(1.0, np.abs(z))):
                return z[:nx].copy()
        if np.all(np.isfinite(z)) and np.max(np.abs(residual(z)[:nx]) / np.maximum(1.0, np.abs(z[:nx]))) < 1e-6:
            return z[:nx].copy()
        raise ScenarioError(f"{spec['name']}: no steady state of the FMU found at v_out = "
                            f"{v_out:g} V (Newton's method on its derivatives did not converge); "
                            f"set [initial] v_out to a voltage the plant can hold")

    def free(self) -> None:
        for m in (self.me, self.cs):
            if m is not None and m.component:
                try:
                    m.terminate()
                except Exception:
                    pass
                m.freeInstance()
                m.component = None
        self.me = self.cs = None
        shutil.rmtree(self.unzip, ignore_errors=True)


def get(spec: dict, values: dict) -> Instance:
    """The live instance for this FMU and these parameter values (made on first use)."""
    key = (spec["path"], spec["sha256"], spec["interface"],
           tuple((q["name"], float(values[q["name"]])) for q in spec["params"]))
    inst = _LIVE.get(key)
    if inst is None:
        inst = _LIVE[key] = Instance(spec, values)
    return inst


def release_all() -> None:
    """Free every live instance (at exit; a test or a long-lived process may call it too: the
    next pack instantiates again)."""
    while _LIVE:
        _, inst = _LIVE.popitem()
        inst.free()


atexit.register(release_all)
