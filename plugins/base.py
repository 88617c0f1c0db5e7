"""The plugin contract: what a plugin module declares, and the kernel signatures it provides.

Kernels (all ``@njit(cache=True)``, float64 arrays preallocated by the runtime, no allocation):

plant
    ``derivs(t, p, x, u, d) -> tuple`` returns dx/dt as a tuple of the state count, for the
    state ``x`` given as a tuple (the integrator keeps the state in registers this way; indexing
    ``x[i]`` also works when a test passes an array); ``outputs(t, p, x, u, d, y)`` writes the
    measured signals, in the order of ``DECLARATION.outputs``, for the state array ``x``. ``d`` holds the load now:
    ``d[0]`` constant power [W], ``d[1]`` conductance [S], ``d[2]`` constant current [A].
    Optional: ``rk4_step(dt, p, s, u, d) -> tuple``, one classic RK4 step of length dt from the
    state tuple ``s`` with u and d held, written out for the plant's equations (the runtime
    otherwise runs its generic RK4 stages over ``derivs``). It takes no time argument: only for
    equations that do not depend on t explicitly. It must be the same method: test it
    against the generic step (see tests/unit/plugins/test_plants.py).
controller
    ``init(p, xc, y, r)`` sets the controller states from the first measurement and reference
    (bumpless start); ``step(t, p, xc, y, r, u) -> int`` writes the actuation ``u`` and returns 0,
    or a fault code that the protect stage turns into a trip.
reference
    ``init(p, xr, y)`` and ``step(t, dt, p, xr, y, w)``: writes the raw voltage reference into
    ``w[0]``; the runtime's shaping filter then yields the reference and its derivatives.

``y`` handed to a controller or reference kernel holds exactly the signals the plugin declares in
``reads``, in that order; ``r`` holds ``[v_ref, v_ref', v_ref'', v_ref''', v_ref'''']``.

The loop compiles every kernel with numba's ``error_model="numpy"``: a float division by zero
gives inf or NaN (IEEE 754) instead of raising, and the loop trips on a non-finite command,
measurement or controller state. An integer ``//`` or ``%`` by zero gives 0 without any trip:
guard integer divisors in kernels.

``p`` is built in Python before the run by ``DECLARATION.build(values, ctx)`` (default: the
declared scalar parameters in order). Design work that is not per tick (gains from pole
placement, tables) belongs there.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np

KINDS = ("plant", "controller", "reference")

#: the reference vector r handed to every controller
REFERENCE_SIGNALS = (
    ("v_ref", "V"), ("v_ref_d1", "V/s"), ("v_ref_d2", "V/s^2"), ("v_ref_d3", "V/s^3"),
    ("v_ref_d4", "V/s^4"),
)

#: the load vector d handed to every plant
LOAD_SIGNALS = (("P_load", "W"), ("G_load", "S"), ("I_load", "A"))


@dataclass(frozen=True)
class Param:
    """A scalar parameter: name, SI unit, default, closed bounds and a description."""

    name: str
    unit: str
    default: float
    bounds: tuple[float, float]
    description: str
    #: open lower bound (value must be strictly greater than bounds[0])
    lower_open: bool = False

    def check(self, value: float) -> str | None:
        """Return a description of what is wrong with ``value``, or None if it is allowed."""
        lo, hi = self.bounds
        low_ok = value > lo if self.lower_open else value >= lo
        if not (low_ok and value <= hi):
            br = "(" if self.lower_open else "["
            return f"outside {br}{lo:g}, {hi:g}] {self.unit}"
        return None


@dataclass(frozen=True)
class TableParam:
    """A table parameter: rows of numbers, one unit per column, e.g. OCV against SOC."""

    name: str
    columns: tuple[tuple[str, str], ...]
    default: tuple[tuple[float, ...], ...]
    description: str
    #: the first column must be strictly increasing (breakpoints of an interpolation table)
    increasing_first: bool = True
    #: allow equal consecutive breakpoints (a step in a piecewise-linear profile)
    allow_equal_first: bool = False
    min_rows: int = 2
    #: per column: (low, high, low_open); None means any finite value
    column_bounds: tuple[tuple[float, float, bool] | None, ...] | None = None


@dataclass(frozen=True)
class ChoiceParam:
    """A parameter that is one of a few named options (a design method, a variant)."""

    name: str
    choices: tuple[str, ...]
    default: str
    description: str


@dataclass(frozen=True)
class Signal:
    """A named signal with its SI unit."""

    name: str
    unit: str
    description: str = ""


@dataclass(frozen=True)
class Tunable:
    """A parameter that tuning and the design search may move, within [low, high] (a narrower
    range than the parameter's bounds: where a search makes sense). ``scale`` "log" searches
    the logarithm (gains spanning decades; low must be > 0), "linear" the value itself."""

    name: str
    low: float
    high: float
    scale: str = "log"

    def __post_init__(self):
        if self.scale not in ("log", "linear"):
            raise ValueError(f"tunable {self.name!r}: scale {self.scale!r} is not 'log' or 'linear'")
        if not (self.high > self.low) or (self.scale == "log" and not self.low > 0.0):
            raise ValueError(f"tunable {self.name!r}: needs low < high"
                             + (" and low > 0 on a log scale" if self.scale == "log" else ""))


@dataclass(frozen=True)
class DesignRange:
    """The operating range a controller is designed for: output voltage [V] and constant load
    power [W] (negative: regeneration)."""

    v_lo: float
    v_hi: float
    p_lo: float
    p_hi: float

    @property
    def v_mid(self) -> float:
        return 0.5 * (self.v_lo + self.v_hi)

    def points(self) -> list[tuple[float, float]]:
        """The corners and the centre (duplicates removed when the range is a line or a point)."""
        pts = [(self.v_lo, self.p_lo), (self.v_lo, self.p_hi), (self.v_hi, self.p_lo),
               (self.v_hi, self.p_hi), (self.v_mid, 0.5 * (self.p_lo + self.p_hi))]
        return list(dict.fromkeys(pts))


@dataclass
class BuildContext:
    """What a plugin's build hook may use: control period, other plugins' values."""

    Ts: float
    plant: Mapping[str, Any] = field(default_factory=dict)
    plant_name: str = ""
    plant_outputs: tuple[str, ...] = ()
    #: names of the plant's states, in the order of its ``derivs``
    plant_states: tuple[str, ...] = ()
    #: the plant plugin module (``derivs``, ``outputs``, ``DECLARATION``): for design work such
    #: as linearising the plant at an operating point in a controller's build hook
    plant_module: Any = None
    #: the scenario's sample-to-actuation delay [control periods] (timing.actuation_delay): a
    #: controller that compensates delay (``Declaration.compensates_delay``) designs for it
    actuation_delay: float = 0.0
    #: the operating range the controller is designed for (``[design]``, or derived from the
    #: scenario); None when there is none (a plant or reference build)
    design_range: DesignRange | None = None


@dataclass
class Declaration:
    """Everything the runtime and the user need to know about a plugin."""

    kind: str
    name: str
    summary: str
    params: Sequence[Param | TableParam | ChoiceParam]
    states: Sequence[Signal]
    reads: Sequence[str] = ()
    outputs: Sequence[Signal] = ()
    inputs: Sequence[Signal] = ()
    source: str = ""
    #: build(values, ctx) -> float64 array p; default packs the scalar params in order
    build: Callable[[Mapping[str, Any], BuildContext], np.ndarray] | None = None
    #: plant only: equilibrium(values, v_out, d) -> x0 at the given output voltage and load
    equilibrium: Callable[[Mapping[str, Any], float, np.ndarray], np.ndarray] | None = None
    #: number of states the kernel keeps (may depend on values, e.g. RC pairs)
    n_states: Callable[[Mapping[str, Any]], int] | None = None
    #: controller only: it compensates the actuation delay it is built for (a prediction over
    #: ``BuildContext.actuation_delay``); runs and comparisons say so beside the delay
    compensates_delay: bool = False
    #: controller only: the parameters that tuning may move (``hilrig tune``) and, with
    #: ``design_search``, that the design refines over the design range
    tunable: Sequence[Tunable] = ()
    #: controller only: design(values, ctx) -> candidate value sets, best first, for the
    #: parameters the scenario does not give (see docs/plugins.md, "Designs from the plant").
    #: The runtime keeps the first candidate whose worst closed-loop |z| over the design range
    #: is below its target, else the first stable one, else the lowest; with ``design_search``
    #: it then minimises that
    #: worst |z| over the tunables (runtime/analysis/design.py)
    design: Callable[[Mapping[str, Any], BuildContext], list[dict[str, Any]]] | None = None
    #: refine the design by minimising the worst-case |z| over the tunables (Nelder-Mead)
    design_search: bool = False
    #: the method of the design, in a line, with its published source (for the run record)
    design_method: str = ""

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"plugin {self.name!r}: kind {self.kind!r} is not one of {KINDS}")

    def param(self, name: str) -> Param | TableParam | ChoiceParam:
        for p in self.params:
            if p.name == name:
                return p
        close = difflib.get_close_matches(name, [p.name for p in self.params], n=3)
        hint = f"; did you mean {', '.join(close)}?" if close else ""
        raise KeyError(f"{self.kind} {self.name!r} has no parameter {name!r}{hint}")

    def defaults(self) -> dict[str, Any]:
        return {p.name: p.default for p in self.params}

    def pack(self, values: Mapping[str, Any], ctx: BuildContext) -> np.ndarray:
        """Return the float64 parameter array ``p`` for the kernels."""
        if self.build is not None:
            p = np.ascontiguousarray(self.build(values, ctx), dtype=np.float64)
        else:
            p = np.array([float(values[q.name]) for q in self.params if isinstance(q, Param)],
                         dtype=np.float64)
        if p.ndim != 1 or p.size == 0:
            p = np.zeros(1) if p.size == 0 else p.ravel()
        return p

    def state_count(self, values: Mapping[str, Any]) -> int:
        return self.n_states(values) if self.n_states is not None else len(self.states)

    def describe(self) -> dict:
        """Plain-data description (for ``hilrig plugins --json``)."""
        params = []
        for q in self.params:
            if isinstance(q, Param):
                params.append(dict(name=q.name, unit=q.unit, default=q.default,
                                   min=q.bounds[0], max=q.bounds[1], description=q.description))
            elif isinstance(q, ChoiceParam):
                params.append(dict(name=q.name, unit="-", default=q.default, min=None, max=None,
                                   description=f"{q.description} (one of: {', '.join(q.choices)})"))
            else:
                params.append(dict(name=q.name, unit=" | ".join(f"{c} [{u}]" for c, u in q.columns),
                                   default=[list(r) for r in q.default], min=None, max=None,
                                   description=q.description))
        return dict(kind=self.kind, name=self.name, summary=self.summary, params=params,
                    states=[dict(name=s.name, unit=s.unit) for s in self.states],
                    reads=list(self.reads),
                    outputs=[dict(name=s.name, unit=s.unit) for s in self.outputs],
                    source=self.source,
                    tunable=[dict(name=t.name, low=t.low, high=t.high, scale=t.scale)
                             for t in self.tunable],
                    designed=bool(self.design), design_method=self.design_method)


def table_array(rows) -> np.ndarray:
    """Rows of a table parameter as a 2-D float64 array."""
    return np.asarray([list(r) for r in rows], dtype=np.float64)
