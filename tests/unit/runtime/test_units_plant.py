"""The bus plant of paralleled units (runtime/multi/plant.py) at kernel level, no loop compile.

Equivalence (issue #16, item 5): N identical units in the merged topology (every cable of zero
impedance, C_bus = 0) are one unit with N times each capacitance and 1/N of each inductance
and of each series resistance. Derivation (circuit theory, Kirchhoff's laws; common practice,
no source): put N equal branches L, R, C in parallel with equal states and the same converter
voltage. Each unit's inductor current is i/N of the total i, and L d(i/N)/dt = u - R i/N - v is
(L/N) di/dt = u - (R/N) i - v: one branch of L/N and R/N carrying i. The N capacitors share
one voltage and their currents add, C dv/dt per unit times N: N C dv/dt = sum of the currents.
So the rates of the voltages are equal, the rates of the currents and the currents themselves
are 1/N of the single unit's, and each unit's output current is the load current over N.

The reference is the single two_stage_lc plugin with the scaled values (the unit plant's own
equations, Erickson and Maksimovic, Fundamentals of Power Electronics, 2nd ed., ch. 3 and 7);
the integration check uses scipy.integrate.solve_ivp (DOP853) on both systems.

Also: blocked gates scale the same way; the cabled bus plant follows its circuit equations.

These tests need ``[units]`` in a scenario: on the code before branch units16 the scenario
reader refuses the key ``units`` (ScenarioError), so every test here fails there.
"""
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from hilrig.plugins.base import BuildContext
from hilrig.plugins.plants import two_stage_lc as single
from hilrig.runtime.scenario import parse_scenario

#: a unit's values (invented test data, deliberately not the plugin's defaults, so that a
#: parameter taken from the wrong place shows)
UNIT = dict(V_dc=760.0, L1=163e-6, R1=6.5e-3, C1=237e-6, L2=91e-6, R2=2.7e-3, C2=715e-6,
            v_load_min=10.0)
TS = 50e-6


def units_text(n: int, units_extra: str = "") -> str:
    vals = "\n".join(f"{k} = {v!r}" for k, v in UNIT.items())
    return f"""
title = "merged units, kernel test (test data)"
[timing]
Ts = "50 us"
duration = "10 ms"
[plant]
plugin = "two_stage_lc"
{vals}
[controller]
plugin = "cascaded_pi"
[design]
defaults = "declared"
[units]
count = {n}
{units_extra}
[reference]
plugin = "profile"
points = [[0, "400 V"]]
"""


def scaled(n: int) -> dict:
    """The one unit equivalent to n merged units: C x n, L / n, R / n (module docstring)."""
    v = dict(UNIT)
    for k in ("C1", "C2"):
        v[k] = UNIT[k] * n
    for k in ("L1", "L2", "R1", "R2"):
        v[k] = UNIT[k] / n
    return v


@pytest.fixture(scope="module", params=[1, 2, 4, 8])
def bus(request):
    n = request.param
    sc = parse_scenario(units_text(n), name=f"units{n}.toml")
    assert sc.units is not None and sc.units.topology == "merged" and sc.units.count == n
    mod = sc.plant.plugin.module
    p = sc.plant.plugin.declaration.pack(sc.plant.values, BuildContext(Ts=TS))
    ps = single.DECLARATION.pack(scaled(n), BuildContext(Ts=TS))
    return n, mod, p, ps


def _u(n, cmd):
    """The bus plant's inputs: each unit's command, every unit enabled, trip 0, correction 0."""
    return np.concatenate([np.full(n, cmd), np.ones(n), np.zeros(2 * n)])


def _unit_x(xs, n):
    """Each unit's states from the single unit's: currents / n, voltages the same."""
    i1, v1, i2, vo = xs
    return (i1 / n, v1, i2 / n, vo) * n


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_merged_units_rates_are_the_scaled_single_units(bus, seed):
    """derivs and outputs of N merged units against the single two_stage_lc with the scaled
    values (module docstring), at random states, commands and loads: the voltages' rates equal,
    each unit's current rates x N equal the single unit's, each unit's output current x N is the
    load current; rtol 1e-12 (round-off: the bus node sums N C_k f_k and divides by sum C_k)."""
    n, mod, p, ps = bus
    rng = np.random.default_rng(seed)
    xs = (rng.uniform(-300, 900), rng.uniform(300, 500), rng.uniform(-300, 900),
          rng.uniform(300, 500))
    d = np.array([rng.uniform(-50e3, 250e3), rng.uniform(0, 0.5), rng.uniform(-50, 50)])
    cmd = rng.uniform(0, 700)
    x = _unit_x(xs, n)
    f = np.array(mod.derivs(0.0, p, x, _u(n, cmd), d))
    fs = np.array(single.derivs(0.0, ps, xs, np.array([cmd]), d))
    assert f.shape == (4 * n,)
    for k in range(n):
        fk = f[4 * k:4 * k + 4]
        np.testing.assert_allclose(fk[[1, 3]], fs[[1, 3]], rtol=1e-12, atol=0)
        np.testing.assert_allclose(n * fk[[0, 2]], fs[[0, 2]], rtol=1e-12, atol=1e-9)
    # outputs: bus v_out, load current; per unit v_out, i_out, i_L1, v_C1, i_L2, v_dc
    y = np.zeros(2 + 6 * n)
    mod.outputs(0.0, p, np.array(x), _u(n, cmd), d, y)
    ys = np.zeros(6)
    single.outputs(0.0, ps, np.array(xs), np.array([cmd]), d, ys)
    assert y[0] == ys[0] and y[1] == pytest.approx(ys[1], rel=1e-14)
    for k in range(n):
        yk = y[2 + 6 * k:8 + 6 * k]
        np.testing.assert_allclose(n * yk[[1, 2, 4]], ys[[1, 2, 4]], rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(yk[[0, 3, 5]], ys[[0, 3, 5]], rtol=1e-15)


def test_merged_units_integrate_as_the_scaled_single_unit(bus):
    """Both systems integrated by scipy's solve_ivp (DOP853, rtol 1e-11) from the same
    (mapped) start, off the equilibrium, with a fixed command and a 150 kW constant-power load
    for 5 ms: the bus voltage and each unit's currents x N follow the single unit within 1e-7
    relative (the two integrations pick their own steps; round-off in the rates is 1e-15)."""
    n, mod, p, ps = bus
    d = np.array([150e3, 0.0, 0.0])
    cmd = 402.0
    x0s = np.array([300.0, 395.0, 340.0, 390.0])
    u = _u(n, cmd)
    sol_b = solve_ivp(lambda t, x: np.array(mod.derivs(t, p, tuple(x), u, d)), (0.0, 5e-3),
                      np.array(_unit_x(tuple(x0s), n)), method="DOP853", rtol=1e-11, atol=1e-9,
                      dense_output=True)
    sol_s = solve_ivp(lambda t, x: np.array(single.derivs(t, ps, tuple(x), np.array([cmd]), d)),
                      (0.0, 5e-3), x0s, method="DOP853", rtol=1e-11, atol=1e-9, dense_output=True)
    assert sol_b.success and sol_s.success
    t = np.linspace(0.0, 5e-3, 201)
    xb, xs = sol_b.sol(t), sol_s.sol(t)
    # the run moves: the voltage swings by volts (the check is not of a resting state)
    assert np.ptp(xs[3]) > 5.0
    scale = np.max(np.abs(xs), axis=1)
    for k in range(n):
        np.testing.assert_allclose(xb[4 * k + 3], xs[3], rtol=0, atol=1e-7 * scale[3])
        np.testing.assert_allclose(xb[4 * k + 1], xs[1], rtol=0, atol=1e-7 * scale[1])
        np.testing.assert_allclose(n * xb[4 * k], xs[0], rtol=0, atol=1e-7 * scale[0])
        np.testing.assert_allclose(n * xb[4 * k + 2], xs[2], rtol=0, atol=1e-7 * scale[2])


def test_merged_units_with_blocked_gates_are_the_blocked_single_unit(bus):
    """Every unit's enable 0 (gates blocked: its command reaches its plant as NaN and its
    diodes decide the switch node, plugins/plants/two_stage_lc.py) against the single unit with
    a NaN command, at a positive, a negative and a zero converter current: the same scaling."""
    n, mod, p, ps = bus
    d = np.array([80e3, 0.0, 0.0])
    u = _u(n, 400.0)
    u[n:2 * n] = 0.0
    for i1 in (120.0, -80.0, 0.0):
        xs = (i1, 398.0, 150.0, 396.0)
        f = np.array(mod.derivs(0.0, p, _unit_x(xs, n), u, d))
        fs = np.array(single.derivs(0.0, ps, xs, np.array([np.nan]), d))
        assert np.all(np.isfinite(fs))
        for k in range(n):
            fk = f[4 * k:4 * k + 4]
            np.testing.assert_allclose(fk[[1, 3]], fs[[1, 3]], rtol=1e-12, atol=0)
            np.testing.assert_allclose(n * fk[[0, 2]], fs[[0, 2]], rtol=1e-12, atol=1e-9)


#: two units on cables (test data)
CABLES = """C_bus = "1.5 mF"
[units.unit1]
cable_R = "4 mohm"
cable_L = "2 uH"
[units.unit2]
cable_R = "11 mohm"
cable_L = "3.5 uH"
"""


def test_cabled_bus_plant_follows_the_circuit_equations():
    """Two units on cables: each cable's current and the bus voltage follow Kirchhoff's laws
    for the circuit of runtime/multi/plant.py's docstring (circuit theory, common practice, no
    source): L_c,k di_c,k/dt = v_k - R_c,k i_c,k - v_bus, C_bus dv_bus/dt = sum_k i_c,k -
    i_load(v_bus); each unit's own states follow the single two_stage_lc with its cable current
    as its load (the plugin's equations with the load current i_c,k). At random states."""
    sc = parse_scenario(units_text(2, CABLES), name="cabled.toml")
    assert sc.units.topology == "cabled"
    mod = sc.plant.plugin.module
    p = sc.plant.plugin.declaration.pack(sc.plant.values, BuildContext(Ts=TS))
    pu = single.DECLARATION.pack(UNIT, BuildContext(Ts=TS))
    rc, lc, cb = (4e-3, 11e-3), (2e-6, 3.5e-6), 1.5e-3
    rng = np.random.default_rng(7)
    for _ in range(5):
        xu = [tuple(rng.uniform([0, 380, 0, 380], [300, 420, 300, 420])) for _ in range(2)]
        ic = rng.uniform(0, 300, 2)
        vb = rng.uniform(380, 420)
        d = np.array([rng.uniform(0, 200e3), rng.uniform(0, 0.2), rng.uniform(-20, 20)])
        cmd = rng.uniform(350, 450, 2)
        x = xu[0] + xu[1] + (ic[0], ic[1], vb)
        u = np.concatenate([cmd, np.ones(2), np.zeros(4)])
        f = np.array(mod.derivs(0.0, p, x, u, d))
        assert f.shape == (11,)
        for k in range(2):
            fu = np.array(single.derivs(0.0, pu, xu[k], cmd[k:k + 1], np.array([0.0, 0.0, ic[k]])))
            np.testing.assert_allclose(f[4 * k:4 * k + 4], fu, rtol=1e-13)
            vk = xu[k][3]
            assert f[8 + k] == pytest.approx((vk - rc[k] * ic[k] - vb) / lc[k], rel=1e-12)
        il = d[0] / vb + d[1] * vb + d[2]
        assert f[10] == pytest.approx((ic[0] + ic[1] - il) / cb, rel=1e-12, abs=1e-6)
        # outputs: the bus voltage, the load current, each unit's output current is its cable's
        y = np.zeros(2 + 12)
        mod.outputs(0.0, p, np.array(x), u, d, y)
        assert y[0] == vb and y[1] == pytest.approx(il, rel=1e-14)
        assert y[2 + 1] == ic[0] and y[8 + 1] == ic[1]
        assert y[2 + 0] == xu[0][3] and y[8 + 0] == xu[1][3]
