"""Load models at the emulator's output: constant power, resistive and constant current, summed.

.. math::

    i_{load}(v) = \\frac{P}{v} + G\\,v + I \\quad (v \\ge v_{min}), \\qquad
    i_{load}(v) = \\frac{P\\,v}{v_{min}^2} + G\\,v + I \\quad (v < v_{min})

with P [W] the constant-power demand (negative: the device under test feeds power back),
G [S] the load conductance, I [A] the constant current, v [V] the output voltage.

Limits of validity: a real constant-power device (an inverter with a regulated DC link, a
DC-DC converter) switches off or limits its current at low input voltage; P/v is singular at 0 V.
Below ``v_min`` the constant-power part is therefore modelled as the resistance it would have
at ``v_min`` (continuous at ``v_min``, zero at 0 V), which keeps the integration finite while the
runtime's collapse check ends the run.
"""
from numba import njit


@njit(cache=True, inline="always")
def load_current(v, d, v_min):
    """Current [A] drawn by the summed load at output voltage v [V]; d = [P W, G S, I A]."""
    # G v + I first: it does not wait for the division, so on the integrator's critical path
    # (v -> P / v -> dv/dt -> next stage's v) one addition follows the division, not two
    rest = d[1] * v + d[2]
    if v >= v_min:
        i_p = d[0] / v
    else:
        i_p = d[0] * v / (v_min * v_min)
    return i_p + rest


@njit(cache=True, inline="always")
def power_current_scaled(k, v, d, v_min):
    """k times the constant-power part of the load current at v [V], k P / v (below v_min its
    resistive stand-in k P v / v_min^2). k P is formed before v is known, so the division is the
    only operation between v and the result (the integrator's critical path)."""
    kp = k * d[0]
    if v >= v_min:
        return kp / v
    return kp * v / (v_min * v_min)
