"""The compiled loop: one tick, its stage order, and how plugin kernels are composed.

One tick k at time t = k Ts runs these stages, in this order, in every mode:

1. sample    - plant outputs y from the plant state (in-process plant).
   measure   - the sensor chain of each signal the scenario declares one for (``[[sensors]]``,
               :mod:`hilrig.runtime.sensors`: sample offset, anti-alias filter, offset, ADC),
               right after the true values are kept; none by default (y exact).
2. inject    - scheduled sensor faults applied to y (:mod:`hilrig.safety.faults`; load faults
               act on the load when it is sampled, controller faults right after stage 4).
3. reference - the reference plugin writes the raw reference w from its declared reads of y;
               the shaping stage (rate limiter + linear filter, :mod:`hilrig.runtime.shaping`)
               yields r = [v_ref, v_ref', v_ref'', v_ref''', v_ref''''].
4. control   - the controller kernel ``step(t, p, xc, y, r, u) -> code`` writes u
               (on tick 0 its ``init`` runs first, from the first y and r: bumpless start).
5. protect   - interlocks on [y, u] (:mod:`hilrig.safety.interlocks`); a trip latches and
               forces the safe output on this same tick; a scheduled reset request clears the
               latch only if no condition holds (else it is refused).
6. actuate   - the plant advances one period by RK4 substeps with u and the load held
               (zero-order hold; the load profile is sampled at the tick's start).
7. record    - one row into the chunk buffer: y, u, r, raw reference, load, the true values of
               the signals a sensor fault or a sensor chain hits (``true_<name>``, written in
               stage 1 before the chain and injection), interlock word, controller code.

After the record stage the tick ends the run early on a *voltage collapse* (the plant's true
v_out, before sensor faults, below the scenario's ``limits.v_collapse``) or on a non-finite
plant state; the row of that tick is kept.

Same inputs, same order, no wall clock inside the stages: a SIL run is bit-identical run to run.

Composition. numba's on-disk cache never hits, in a new process, for a loop built as a closure
over plugin dispatchers or taking them as arguments. So the runtime writes one small Python
module per combination of plugins into a cache folder and compiles it with ``cache=True``; the
module's name carries a hash of every source file involved, the hilrig version and the numba
version, because numba only checks the cached function's own file for changes.
"""
from __future__ import annotations

import hashlib
import importlib.util
import os
import sys
import tempfile
from pathlib import Path

import numba

from .registry import Plugin
from .version import installed as installed_version

#: event codes written to ev[0]
EV_NONE, EV_COLLAPSE, EV_NONFINITE, EV_STOPPED = 0, 1, 2, 3
#: a non-finite plant state, a rise of stored energy the circuit cannot deliver, or a tick that
#: needed more sub-steps than the limit all end the run with this one event (its reason in
#: ev[EV_REASON]); EV_NONFINITE is this same event's code
EV_INTEGRATION = EV_NONFINITE
EVENT_TEXT = {EV_NONE: "", EV_COLLAPSE: "voltage collapse", EV_INTEGRATION: "plant integration error",
              EV_STOPPED: "stopped by the operator"}
#: ev[EV_REASON] of a plant integration error
WHY_NONFINITE, WHY_ENERGY, WHY_SUBSTEPS = 1, 2, 3
INTEGRATION_REASONS = {
    WHY_NONFINITE: "the plant state is not finite",
    WHY_ENERGY: "the stored energy rose beyond what the DC source and the load can deliver in "
                "one period",
    WHY_SUBSTEPS: "the stiffness-aware step needed more sub-steps in one period than its limit",
}
#: the stiffness-aware integration (docs/design-notes.md): an RK4 sub-step dt is kept when
#: dt * fast_rate(state) <= Z_FAST (the plant's state-dependent rate, e.g. a constant-power
#: load's conductance over the capacitance); otherwise it is split into sub-steps that each
#: meet it, the rate re-evaluated before each. The linear part's rate bound sets the number of
#: sub-steps of a run: Ts / substeps * linear_rate <= Z_LINEAR (runtime/run.py).
Z_FAST = 0.2
Z_LINEAR = 0.5
#: at most this many refined sub-steps in one period, else a plant integration error
MAX_REFINE = 2_000_000


_CHUNK = '''@njit(cache=True, error_model="numpy")
def {fname}(k0, n, ts, nsub, zf, v_collapse, i_vout,
              pp, x, load_t, load_v, lcur,
              pc, xc, iyc, yc, u, safe_u,
              pr, xr, iyr, yr, w,
              ad, g1, g2, cr, dr, slew, z, s, zt, r,
              dix, lim_sig, lim_side, lim_thr, lim_deb, lim_cnt, latch, pv,
              seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond,
              reset_t, reset_i, evlog, evn, wd, uq,
              s_tab, s_x,
              y, d, rec, ev{paced_params}):
    """{fdoc}"""
{borrow}{energy_start}    for i in range(n):
        kk = k0 + i
        t = kk * ts
{paced_wait}        # 1 sample (load faults act on the load, as a real device would)
        interp_rows(load_t, load_v, t, lcur, d)
        apply_faults(0, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, y, u, d)
        contactor(t, latch, wd, d)
        plant_outputs(t, pp, x, u, d, y)
        v_true = y[i_vout]
        keep_true(y, f_sig, f_cond, rec, i, y.shape[0] + u.shape[0] + 9)
        # the sensor chain (runtime/sensors.py): what is measured of the true outputs
        sensor_chain(kk, y, s_tab, s_x, rec, i, y.shape[0] + u.shape[0] + 9)
        # 2 inject: sensor faults on the measured signals
        apply_faults(1, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, y, u, d)
{decide_8}
        # 6 actuate: the command in force after the actuation delay, or the trip's safe state
        # (gates blocked at once; the output contactor open after its delay)
        contactor(t, latch, wd, d)
        nref = actuate(t, ts, nsub, zf, pp, x, u, uq, latch, wd, d)
{record_8}
{paced_stamp}        # end of tick: the run ends on a plant integration error (a non-finite state, a
        # rise of stored energy beyond what the circuit can deliver, too many sub-steps) or a
        # collapse
        if nref != 0:
            if nref < 0:
                ev[0] = {ev_nonfinite}
                ev[1] = kk
                ev[4] = {why_substeps}
                return i + 1
            ev[5] += nref
            if ev[6] == 0.0:
                ev[6] = kk + 1
        for j in range(NX):
            if not (x[j] - x[j] == 0.0):
                ev[0] = {ev_nonfinite}
                ev[1] = kk
                ev[4] = {why_nonfinite}
                return i + 1
{energy_check}        if not (v_true >= v_collapse):
            ev[0] = {ev_collapse}
            ev[1] = kk
            return i + 1
    return n
'''

#: the paced variant waits for each tick's deadline on the cycle counter and stamps its timing
_PACED_PARAMS = ", c_ref, k_ref, cpt, inv_f, c_late, c_comp, ctl, base"
_PACED_WAIT = """        # paced: wait for the deadline (spin on the cycle counter)
        dl = c_ref + (kk - k_ref) * cpt
        while True:
            c_in = float(cycles())
            if c_in >= dl:
                break
        # the last tick's work time, for the overrun watchdog (tick 0 does one-off
        # initialisation on cold caches: not judged)
        wd[3] = wd[7] if kk > 1 else 0.0
        # an operator's stop (ctl[4], from the live view): this tick latches the safe output
        wd[4] = 8.0 if ctl[4] != 0 else 0.0
"""
_PACED_STAMP = """        # paced: a forced overrun is spent for real; stamp lateness and compute time
        if wd[6] > 0.0:
            c_end = c_in + wd[6] / inv_f
            while float(cycles()) < c_end:
                pass
        c_out = float(cycles())
        rec[i, c_late] = (c_in - dl) * inv_f
        rec[i, c_comp] = (c_out - c_in) * inv_f
        wd[7] = (c_out - dl) * inv_f
        # publish the row to the recording process: the row first, then the count
        store_fence()
        ctl[0] = base + i + 1
        if ctl[4] != 0:
            ev[0] = 3  # EV_STOPPED, after the tick that applied the safe output
            ev[1] = kk
            return i + 1
"""


_TEMPLATE = '''"""Generated by hilrig {version} for plant={plant}, controller={ctrl}, reference={ref}.
Do not edit: the file name is the hash of its sources. key={key}"""
import numpy as np
from numba import njit
from hilrig.plugins.tables import interp_rows as _interp_rows
from hilrig.runtime.loop import inline as _inline
from hilrig.runtime.shaping import shape_init, shape_step as _shape_step
from hilrig.safety.interlocks import (protect as _protect, supervise as _supervise,
                                      watch as _watch, state_code as _state_code, L_REINIT)
from hilrig.safety.faults import apply as _apply_faults, trigger as _trigger, keep_true as _keep_true
from hilrig.runtime.clock import cycles, store_fence
from hilrig.safety.interlocks import W_HOST_TIME, W_HOST_BITS, W_FORCED, W_DELAY
from hilrig.safety.interlocks import (contactor as _contactor, gates_blocked as _gates_blocked,
                                      follow_enable as _follow_enable)
from hilrig.bridge.wire import (exchange, get_sample, read_vector, put_actuation, put_sample,
                                get_actuation, zmq_recv, zmq_send, c_poll, c_recvfrom, c_sendto,
                                IO_KIND, IO_HANDLE, IO_WAIT_MS, IO_STATUS, IO_NRECV, IO_NSENT,
                                IO_SEQ, IO_ADDRLEN, F_INV_F, F_TOOK, F_TSIM, F_WAITED, KIND_ZMQ,
                                ST_OK, ST_END, ST_FRAME, ST_SENDFAIL, ST_NONFINITE, ST_IDLE)
from hilrig.runtime.borrow import borrowed
from hilrig.runtime.sensors import chain as _sensor_chain
{imports}
interp_rows = _inline(_interp_rows)
shape_step = _inline(_shape_step)
protect = _inline(_protect)
watch = _inline(_watch)
trigger = _inline(_trigger)
supervise = _inline(_supervise)
state_code = _inline(_state_code)
apply_faults = _inline(_apply_faults)
keep_true = _inline(_keep_true)
contactor = _inline(_contactor)
gates_blocked = _inline(_gates_blocked)
follow_enable = _inline(_follow_enable)
sensor_chain = _inline(_sensor_chain)

#: plant state count, a literal so that the compiler unrolls the state loops
NX = {nx}
#: the plugins (kind, origin) this module was generated for: run.bind refuses any other's arrays
PLUGINS = {plugins!r}
#: compiled with bounds checks (the --checked build)
CHECKED = {checked!r}
#: the plant models a converter with blocked gates (GATE_BLOCK_CURRENTS): the safe action
#: gate_block reaches it as a NaN command; otherwise it gets safe_u (zero voltage)
GATE_BLOCK = {gate_block!r}


#: the stiffness-aware integration's rule (runtime/loop.py Z_FAST, MAX_REFINE)
MAX_REFINE = {max_refine}


@njit(inline="always")
def rk4(ta, dt, pp, s, u, d):
    """One classic RK4 step of length dt from the state tuple s at time ta, u and d held."""
{rk4_body}
    return s


{step_defs}


@njit(inline="always")
def actuate(t, h, nsub, zf, pp, x, u, uq, latch, wd, d):
    """Stage 6: the plant advances one period. The command in force is the controller's u of
    this tick, or (actuation delay of wd[W_DELAY] half periods) the command of an earlier tick
    from the queue uq (rows 1-3: 1-3 ticks ago; row 0: the applied command), switching at
    mid-period for an odd number of half periods; with the gates blocked by a trip, NaN (the
    plant's diodes decide; a plant that does not model them applies 0 V). Returns advance's
    count of refined steps, or -1."""
    dh = int(wd[W_DELAY])
    # a plant that does not model blocked gates (no GATE_BLOCK_CURRENTS) gets safe_u instead
    blocked = GATE_BLOCK and gates_blocked(latch, wd)
    nu = u.shape[0]
    if dh > 0 and not (uq[1, 0] == uq[1, 0]):
        # the first tick: the commands before it are taken to be its own (bumpless start)
        for m in range(1, 4):
            for j in range(nu):
                uq[m, j] = u[j]
    l1 = (dh + 1) // 2
    l2 = dh // 2
    nh = 2 if (l1 != l2 and not blocked) else 1
    hh = h / nh
    ns = nsub if nh == 1 else (nsub + 1) // 2
    n = 0
    for half in range(nh):
        lag = l1 if half == 0 else l2
        ua = u
        if blocked or lag > 0:
            ua = uq[0]
            for j in range(nu):
                ua[j] = np.nan if blocked else uq[lag, j]
        m = advance(t + half * hh, hh, ns, zf, pp, x, ua, d)
        if m < 0:
            return m
        n += m
    if dh > 0:
        for m in range(3, 1, -1):
            for j in range(nu):
                uq[m, j] = uq[m - 1, j]
        for j in range(nu):
            uq[1, j] = u[j]
    return n


@njit(inline="always")
def advance(t, h, nsub, zf, pp, x, u, d):
    """RK4 with nsub substeps over one control period h; u and the load d held. A plant
    that brings its own ``rk4_step`` (the same method, arranged for its equations) is stepped
    with it; otherwise the generic stages run over its ``derivs``.

    Stiffness-aware: a substep dt with dt * fast_rate(state) > zf (the plant's state-dependent
    rate bound; a plant without one is never refined) is split into shorter RK4 steps that
    each meet the bound at their start, the rate re-evaluated before each, the last one
    ending exactly on the substep's end. Returns the number of refined steps taken (0 on the
    usual path), -1 when one period needed more than MAX_REFINE.

    The state travels as a tuple so that it stays in registers through the substeps."""
{advance_body}


{run_chunk}

{paced_chunk}


@njit(cache=True, error_model="numpy")
def bridge_tick(kk, i, ts, v_collapse, i_vout,
                pc, xc, iyc, yc, u, safe_u,
                pr, xr, iyr, yr, w,
                ad, g1, g2, cr, dr, slew, z, s, zt, r,
                dix, lim_sig, lim_side, lim_thr, lim_deb, lim_cnt, latch, pv,
                seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond,
                reset_t, reset_i, evlog, evn, wd,
                s_tab, s_x,
                y, d, rec, ev):
    """Bridge modes: one tick on a y received from the simulator (stages 2-5 and 7; the
    simulator samples and actuates). Writes row i of rec; returns 1, or 0 if the run ends."""
    t = kk * ts
    v_true = y[i_vout]
    keep_true(y, f_sig, f_cond, rec, i, y.shape[0] + u.shape[0] + 9)
    # the sensor chain (runtime/sensors.py): what is measured of the true outputs
    sensor_chain(kk, y, s_tab, s_x, rec, i, y.shape[0] + u.shape[0] + 9)
    # 2 inject: sensor faults on the measured signals
    apply_faults(1, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, y, u, d)
{decide_4}
{record_4}
    if not (v_true - v_true == 0.0):
        return 1  # the protect stage has tripped on it; the safe output goes out
    if not (v_true >= v_collapse):
        ev[0] = {ev_collapse}
        ev[1] = kk
        return 0
    return 1


@njit(cache=True, error_model="numpy")
def bridge_chunk(k0, n, ts, v_collapse, i_vout,
                 pc, xc, iyc, yc, u, safe_u,
                 pr, xr, iyr, yr, w,
                 ad, g1, g2, cr, dr, slew, z, s, zt, r,
                 dix, lim_sig, lim_side, lim_thr, lim_deb, lim_cnt, latch, pv,
                 seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond,
                 reset_t, reset_i, evlog, evn, wd,
                 s_tab, s_x,
                 y, d, rec, ev, io, fio, meas, sbuf, rbuf, pfd, rtt):
    """Lockstep over a socket, compiled end to end (hilrig.bridge.wire): ticks k0 .. k0+n-1 in
    rows 0 .. n-1 of rec. Each tick runs on the sample in meas (tick k0's is there on entry),
    sends its actuation and waits for the next sample, which it reads into meas (its seq and
    time into io[IO_SEQ], fio[F_TSIM]); rtt[i] is the round trip [ns]. Returns the number of
    ticks run; io[IO_STATUS] says why it stopped (ST_OK: all n ran; otherwise the last tick's
    actuation went out and the Python path takes over its reply)."""
    inv_f = fio[F_INV_F]
    n_meas = meas.shape[0]
    cw = rec.shape[1] - 2
    io[IO_STATUS] = ST_OK
    for i in range(n):
        kk = k0 + i
        t = kk * ts
        c_in = float(cycles())
        for j in range(n_meas):
            y[j] = meas[j]
        for j in range(d.shape[0]):
            d[j] = np.nan  # the load lives in the simulator
        wd[W_HOST_TIME] = fio[F_TOOK]
        wd[W_HOST_BITS] = 0.0
        v_true = y[i_vout]
        keep_true(y, f_sig, f_cond, rec, i, y.shape[0] + u.shape[0] + 9)
        # the sensor chain (runtime/sensors.py): what is measured of the true outputs
        sensor_chain(kk, y, s_tab, s_x, rec, i, y.shape[0] + u.shape[0] + 9)
        # 2 inject: sensor faults on the measured signals
        apply_faults(1, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, y, u, d)
{decide_8}
{record_8}
        go = True
        if v_true - v_true == 0.0 and not (v_true >= v_collapse):
            ev[0] = {ev_collapse}
            ev[1] = kk
            go = False
        if wd[W_FORCED] > 0.0:
            # a forced overrun is spent for real
            c_end = c_in + wd[W_FORCED] / inv_f
            while float(cycles()) < c_end:
                pass
        ns = put_actuation(sbuf, kk, u, np.int64(rec[i, cw]), latch[0] == 0.0)
        io[IO_NSENT] = ns
        c_sent = float(cycles())
        fio[F_TOOK] = (c_sent - c_in) * inv_f
        m = exchange(io, sbuf, ns, rbuf, pfd)
        c_back = float(cycles())
        fio[F_WAITED] = (c_back - c_sent) * inv_f
        if m < 0:
            io[IO_STATUS] = -m
            return i + 1
        seq, tsim, p = get_sample(rbuf, m, n_meas)
        if seq != kk + 1:
            io[IO_STATUS] = ST_FRAME
            io[IO_NRECV] = m
            return i + 1
        rtt[i] = (c_back - c_sent) * inv_f * 1e9
        read_vector(rbuf, p, meas)
        io[IO_SEQ] = seq
        fio[F_TSIM] = tsim
        if not go:
            io[IO_STATUS] = ST_END
            return i + 1
    return n


@njit(cache=True, error_model="numpy")
def sim_serve(k, limit, ts, nsub, zf, pp, x, u, load_t, load_v, lcur, d, y,
              seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, uq, slatch,
              io, rbuf, sbuf, pfd, addr, alen):
    """Stand-in simulator, lockstep, compiled: while k < limit, take the actuation of tick k,
    advance the plant one period and answer with the sample of tick k + 1 (as sim_advance and
    sim_sample). Returns the tick reached; io[IO_STATUS] says why it stopped (ST_FRAME: a frame
    for the Python path is in rbuf[:io[IO_NRECV]])."""
    n_act = u.shape[0]
    cap = rbuf.shape[0]
    ut = np.empty(n_act)
    io[IO_STATUS] = ST_OK
    while k < limit:
        h = io[IO_HANDLE]
        if io[IO_KIND] == KIND_ZMQ:
            m = zmq_recv(h, rbuf, cap)
            if m < 0:
                io[IO_STATUS] = ST_IDLE
                return k
            if m > cap:
                m = cap
        else:
            if c_poll(pfd, io[IO_WAIT_MS]) <= 0:
                io[IO_STATUS] = ST_IDLE
                return k
            alen[0] = addr.shape[0]
            m = c_recvfrom(h, rbuf, cap, addr, alen)
            if m < 0:
                io[IO_STATUS] = ST_IDLE
                return k
            io[IO_ADDRLEN] = alen[0]
        seq, word, enable = get_actuation(rbuf, m, ut)
        if seq != k:
            io[IO_STATUS] = ST_FRAME
            io[IO_NRECV] = m
            return k
        # output disabled (the runtime's trip is latched): the scenario's safe state, as in SIL
        for j in range(n_act):
            u[j] = ut[j]
        follow_enable(k * ts, enable, slatch)
        contactor(k * ts, slatch, wd, d)
        nref = actuate(k * ts, ts, nsub, zf, pp, x, u, uq, slatch, wd, d)
        k += 1
        if nref < 0:
            io[IO_STATUS] = ST_NONFINITE
            return k
        for j in range(NX):
            if not (x[j] - x[j] == 0.0):
                io[IO_STATUS] = ST_NONFINITE
                return k
        t = k * ts
        interp_rows(load_t, load_v, t, lcur, d)
        apply_faults(0, k, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, y, u, d)
        contactor(t, slatch, wd, d)
        plant_outputs(t, pp, x, u, d, y)
        trigger(t, y, f_t0, f_t1, f_cond)
        ns = put_sample(sbuf, k, t, y)
        io[IO_NSENT] = ns
        if io[IO_KIND] == KIND_ZMQ:
            sent = zmq_send(h, sbuf, ns)
        else:
            sent = c_sendto(h, sbuf, ns, addr, io[IO_ADDRLEN])
        if sent < 0:
            io[IO_STATUS] = ST_SENDFAIL
            return k
    return k


@njit(cache=True, error_model="numpy")
def sim_sample(kk, t, pp, x, u, load_t, load_v, lcur, d, y,
               seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, uq, slatch):
    """Stand-in simulator: the plant's outputs at time t (the load sampled at t, with the
    scenario's load faults and its output contactor; its sensor faults are injected on the
    runtime's side). Conditional faults are triggered on these outputs, as in SIL."""
    interp_rows(load_t, load_v, t, lcur, d)
    apply_faults(0, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, y, u, d)
    contactor(t, slatch, wd, d)
    plant_outputs(t, pp, x, u, d, y)
    trigger(t, y, f_t0, f_t1, f_cond)


@njit(cache=True, error_model="numpy")
def sim_advance(t, ts, nsub, zf, pp, x, u, d, enable, wd, uq, slatch):
    """Stand-in simulator: advance the plant one period with u and the load d held, under the
    scenario's actuation delay and, while the runtime's output is disabled, its safe state."""
    follow_enable(t, enable, slatch)
    contactor(t, slatch, wd, d)
    if actuate(t, ts, nsub, zf, pp, x, u, uq, slatch, wd, d) < 0:
        return False
    for j in range(NX):
        if not (x[j] - x[j] == 0.0):
            return False
    return True
'''


# Stages 3-5 and 7, written once and placed in both the SIL chunk loop and the bridge tick
# (numba's inliner cannot nest these many inlined calls, so the text is shared instead).
_DECIDE = """# 3 reference
for j in range(iyr.shape[0]):
    yr[j] = y[iyr[j]]
if kk == 0:
    ref_init(pr, xr, yr)
ref_step(t, ts, pr, xr, yr, w)
if kk == 0:
    shape_init(w[0], z, s)
shape_step(ad, g1, g2, cr, dr, slew, ts, z, s, zt, w[0], r)
# 4 control
for j in range(iyc.shape[0]):
    yc[j] = y[iyc[j]]
if kk == 0 or latch[L_REINIT] != 0.0:
    # bumpless start, and restart after an accepted reset
    ctrl_init(pc, xc, yc, r)
    latch[L_REINIT] = 0.0
# watchdogs (the last tick's overrun, link conditions raised by the host), before the
# controller faults of this tick overwrite the forced overrun they read
wword = watch(kk, t, wd, latch)
code = ctrl_step(t, pc, xc, yc, r, u)
code = state_code(code, xc)
apply_faults(2, kk, t, seed, f_stage, f_kind, f_sig, f_t0, f_t1, f_val, f_hold, f_cond, wd, y, u, d)
# 5 protect
word = wword | protect(kk, t, ts, y, u, code, dix, lim_sig, lim_side, lim_thr, lim_deb,
                       lim_cnt, latch, pv, safe_u)
word = supervise(kk, t, word, latch, reset_t, reset_i, evlog, evn)"""

_RECORD = """# 7 record
c = 0
for j in range(y.shape[0]):
    rec[i, c] = y[j]
    c += 1
for j in range(u.shape[0]):
    rec[i, c] = u[j]
    c += 1
for j in range(5):
    rec[i, c] = r[j]
    c += 1
rec[i, c] = w[0]
c += 1
for j in range(d.shape[0]):
    rec[i, c] = d[j]
    c += 1
# the true-value columns, written before injection (faults.keep_true)
for j in range(f_cond.shape[0]):
    if f_cond[j, 5] >= 0.0:
        c += 1
# and those of the chained signals (sensors.chain, column S_TRUE)
for j in range(s_tab.shape[0]):
    if s_tab[j, 11] >= 0.0:
        c += 1
rec[i, c] = word
rec[i, c + 1] = code"""


#: the chunk functions' parameters that are not arrays (every other one is borrowed)
_SCALAR_PARAMS = {"k0", "n", "ts", "nsub", "zf", "v_collapse", "i_vout", "slew", "seed",
                  "c_ref", "k_ref", "cpt", "inv_f", "c_late", "c_comp", "base"}


def _borrow_text(params: str) -> str:
    """Lines that rebind each array parameter (of a parameter list ``params``) of a compiled
    function to a borrowed view (:mod:`hilrig.runtime.borrow`): the kernels inlined into it
    then take and release no reference counts (about half the time of a tick on the bench
    loop, ``bench/loop_stages.py``)."""
    names = [p.strip() for p in params.split(",") if p.strip()]
    return "".join(f"    {p} = borrowed({p})\n" for p in names if p not in _SCALAR_PARAMS)


def _chunk_params(paced: bool) -> str:
    head = _CHUNK.split("def {fname}(", 1)[1].split("):", 1)[0]
    return head.replace("{paced_params}", _PACED_PARAMS if paced else "")


def _indent(text: str, n: int) -> str:
    return "\n".join((" " * n + line) if line else line for line in text.splitlines())


def inline(kernel):
    """A copy of a compiled kernel that numba inlines into its caller (the generated loop).

    With ``NUMBA_DISABLE_JIT=1`` kernels are plain functions and are returned unchanged.
    """
    py = getattr(kernel, "py_func", None)
    if py is None:
        return kernel
    return numba.njit(inline="always")(py)


def cache_dir() -> Path:
    """Folder for generated loop modules (``HILRIG_CACHE_DIR`` or the user cache)."""
    env = os.environ.get("HILRIG_CACHE_DIR")
    base = Path(env) if env else Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "hilrig"
    return base / "loops"


#: runtime code that no compiled function imports (work on finished runs, beside a real-time
#: run, the analysis, the command line): a change there must not recompile every loop
_NOT_COMPILED = ("trials", "live", "analysis", "cli.py", "provenance.py", "waveforms.py")


def _sources(plugins: list[Plugin]) -> list[Path]:
    import hilrig.plugins
    import hilrig.runtime
    import hilrig.safety
    files = set()
    import hilrig.bridge
    for pkg in (hilrig.runtime, hilrig.plugins, hilrig.safety, hilrig.bridge):
        root = Path(pkg.__file__).resolve().parent
        for f in root.rglob("*.py"):
            if pkg is hilrig.runtime and f.relative_to(root).parts[0] in _NOT_COMPILED:
                continue
            files.add(f)
    files.update(Path(p.source_file) for p in plugins)
    return sorted(files)


_SOURCE_KEY: dict[str, str] = {}


def source_key() -> str:
    """Hash of the hilrig and numba versions and every hilrig source file a compiled function
    may import (as in :func:`combination_key`, without plugins), once per process: a generated
    module that imports hilrig's compiled code (paralleled units, runtime/multi) carries it in
    its text, so that a change of that code makes a new module rather than a stale cache hit
    (numba checks only a function's own file)."""
    if not _SOURCE_KEY:
        h = hashlib.sha256()
        h.update(f"hilrig {installed_version()} numba {numba.__version__} py {sys.version_info[:2]}".encode())
        for f in _sources([]):
            h.update(str(f).encode())
            h.update(f.read_bytes())
        _SOURCE_KEY["key"] = h.hexdigest()[:20]
    return _SOURCE_KEY["key"]


def combination_key(plant: Plugin, ctrl: Plugin, ref: Plugin) -> str:
    """Hash of the hilrig and numba versions and every source file the loop depends on."""
    h = hashlib.sha256()
    h.update(f"hilrig {installed_version()} numba {numba.__version__} py {sys.version_info[:2]}".encode())
    for kind, p in (("plant", plant), ("controller", ctrl), ("reference", ref)):
        h.update(f"{kind}={p.origin}".encode())
    for f in _sources([plant, ctrl, ref]):
        h.update(str(f).encode())
        h.update(f.read_bytes())
    return h.hexdigest()[:20]


def has_rk4_step(plant: Plugin) -> bool:
    """Whether the plant plugin brings its own RK4 step (optional kernel ``rk4_step``)."""
    return getattr(plant.module, "rk4_step", None) is not None


def has_advance_period(plant: Plugin) -> bool:
    """Whether the plant plugin integrates a whole period itself (optional kernel
    ``advance_period``, e.g. a switching-level plant placing its switching instants)."""
    return getattr(plant.module, "advance_period", None) is not None


def _import_lines(plant: Plugin, ctrl: Plugin, ref: Plugin) -> str:
    lines = []
    names = {"plant": ("derivs", "outputs") + (("rk4_step",) if has_rk4_step(plant) else ())
                       + (("advance_period",) if has_advance_period(plant) else ())
                       + (("fast_rate",) if has_fast_rate(plant) else ())
                       + (("energy", "energy_limit") if has_energy_check(plant) else ()),
             "ctrl": ("init", "step"), "ref": ("init", "step")}
    for tag, p in (("plant", plant), ("ctrl", ctrl), ("ref", ref)):
        how, where = p.origin
        if how == "module":
            lines.append(f"import {where} as _{tag}")
        else:
            lines.append("from hilrig.runtime.registry import load_file as _load_file")
            lines.append(f"_{tag} = _load_file({where!r})")
        for k in names[tag]:
            if k == "advance_period":
                # called, not inlined: a whole period's work dwarfs a call, and inlined it
                # would be compiled anew into each chunk function of every combination
                lines.append(f"{tag}_{k} = _{tag}.{k}")
                continue
            if k in getattr(p.module, "NOT_INLINED", ()):
                # a generated plugin of paralleled units (runtime/multi): its kernels already
                # inline each unit's; inlined again into every chunk function they would
                # multiply the compile time by the number of those functions
                lines.append(f"{tag}_{k} = _{tag}.{k}")
                continue
            # each kernel is inlined into the loop: a call across compiled functions passes
            # every array through reference counting and keeps values out of registers
            lines.append(f"{tag}_{k} = _inline(_{tag}.{k})")
    return "\n".join(lines)


def _step_text(nx: int, currents: tuple[int, ...], enables: tuple[int, ...] = ()) -> str:
    """``step``, one RK4 step as the substep loop takes it. For a plant that models blocked
    gates (``GATE_BLOCK_CURRENTS``) a blocked step goes to ``blocked_step``, compiled apart (it
    is rare, and inlining it would multiply the loop's compile time): each current through the
    converter's diodes that reaches zero within the step stops there (the step is redone to
    the crossing, located on the Euler line from the step's start, or else by linear
    interpolation of that current over the RK4 step, the current set to zero, and the rest of
    the step taken from there, where the plant holds it at zero). With ``enables`` (a plant of
    paralleled units, ``GATE_BLOCK_ENABLE``) each current stops only while the input at its
    index is not above 0.5 (its unit's gates blocked; the runtime's trip makes it NaN)."""
    if not currents:
        return ('@njit(inline="always")\n'
                "def step(ta, dt, pp, s, u, d, blocked):\n"
                '    """One RK4 step (this plant does not model blocked gates)."""\n'
                "    return rk4(ta, dt, pp, s, u, d)")
    out = ['@njit(cache=True, error_model="numpy")',
           "def blocked_step(ta, dt, pp, s, u, d):",
           '    """One RK4 step with the gates blocked: a diode current stops at zero."""',
           "    s1 = rk4(ta, dt, pp, s, u, d)",
           # the Euler line from the step's start as well: in the diode phase the current falls
           # almost linearly, and RK4's stages that straddle zero (each on the other diode) can
           # cancel and hide the crossing (the current then hung just above zero)
           "    k1 = plant_derivs(ta, pp, s, u, d)"]
    for n_i, i in enumerate(currents):
        items = tuple_text(["0.0" if j == i else f"sa[{j}]" for j in range(nx)])
        pad = ""
        if enables:
            # a unit that runs: its current is not stopped
            out += ["    th = -1.0", f"    if not (u[{enables[n_i]}] > 0.5):"]
            pad = "    "
        out += [pad + line for line in [
                f"    e = s[{i}] + dt * k1[{i}]",
                f"    if (s[{i}] > 0.0 and not (e > 0.0)) or (s[{i}] < 0.0 and not (e < 0.0)):",
                f"        th = s[{i}] / (s[{i}] - e)",
                f"    elif (s[{i}] > 0.0 and not (s1[{i}] > 0.0)) or (s[{i}] < 0.0 and not (s1[{i}] < 0.0)):",
                f"        th = s[{i}] / (s[{i}] - s1[{i}])",
                "    else:",
                "        th = -1.0",
                "    if th >= 0.0:",
                "        sa = rk4(ta, th * dt, pp, s, u, d)",
                f"        sa = {items}",
                "        s1 = rk4(ta + th * dt, (1.0 - th) * dt, pp, sa, u, d)"]]
    out += ["    return s1", "", "",
            '@njit(inline="always")',
            "def step(ta, dt, pp, s, u, d, blocked):",
            '    """One RK4 step; with the converter\'s gates blocked (u NaN), blocked_step."""',
            "    if blocked:",
            "        return blocked_step(ta, dt, pp, s, u, d)",
            "    return rk4(ta, dt, pp, s, u, d)"]
    return "\n".join(out)


def gate_block_currents(plant: Plugin) -> tuple[int, ...]:
    """The plant's states that are currents through the converter's switches (optional module
    attribute ``GATE_BLOCK_CURRENTS``): with the gates blocked each one stops at zero."""
    return tuple(int(i) for i in getattr(plant.module, "GATE_BLOCK_CURRENTS", ()))


#: the most items a generated tuple display holds: CPython builds a longer one through a list,
#: which numba's bytecode reader cannot always take back to a tuple (many states: paralleled
#: units)
TUPLE_CHUNK = 24


def tuple_text(items: list[str]) -> str:
    """A tuple display of ``items`` for generated code: ``(a, b,)``, or for more than
    TUPLE_CHUNK items the concatenation of displays of at most that many each."""
    items = list(items)
    parts = ["(" + ", ".join(items[i:i + TUPLE_CHUNK]) + ",)"
             for i in range(0, len(items), TUPLE_CHUNK)] or ["()"]
    return parts[0] if len(parts) == 1 else "(" + " + ".join(parts) + ")"


def gate_block_enables(plant: Plugin) -> tuple[int, ...]:
    """For each of ``GATE_BLOCK_CURRENTS``, the input whose value blocks it when not above 0.5
    (optional ``GATE_BLOCK_ENABLE``: paralleled units, each blocked on its own); empty: the
    currents stop while the command is NaN (the runtime's trip)."""
    en = tuple(int(i) for i in getattr(plant.module, "GATE_BLOCK_ENABLE", ()))
    if en and len(en) != len(gate_block_currents(plant)):
        raise ValueError(f"plant {plant.name!r}: GATE_BLOCK_ENABLE has {len(en)} entries, "
                         f"GATE_BLOCK_CURRENTS {len(gate_block_currents(plant))}")
    return en


def _rk4_text(nx: int, own_step: bool, fast: bool = False, period: bool = False,
              enables: tuple[int, ...] = ()) -> dict[str, str]:
    """The RK4 step, unrolled for nx states (the plant's own ``rk4_step`` if it has one, else
    the generic stages over its ``derivs``), and the body of ``advance``: the substep loop,
    refined where the plant's ``fast_rate`` asks for it (``fast``), else one RK4 step per
    substep; or, for a plant with ``advance_period`` (``period``), one call of it per period."""
    r = range(nx)
    if own_step:
        body = "    s = plant_rk4_step(dt, pp, s, u, d)"
    else:
        s_k1 = tuple_text([f"s[{i}] + 0.5 * dt * k1[{i}]" for i in r])
        s_k2 = tuple_text([f"s[{i}] + 0.5 * dt * k2[{i}]" for i in r])
        s_k3 = tuple_text([f"s[{i}] + dt * k3[{i}]" for i in r])
        s_new = tuple_text([f"s[{i}] + dt / 6.0 * (k1[{i}] + 2.0 * k2[{i}] + 2.0 * k3[{i}] + "
                            f"k4[{i}])" for i in r])
        body = "\n".join([
            "    k1 = plant_derivs(ta, pp, s, u, d)",
            f"    k2 = plant_derivs(ta + 0.5 * dt, pp, {s_k1}, u, d)",
            f"    k3 = plant_derivs(ta + 0.5 * dt, pp, {s_k2}, u, d)",
            f"    k4 = plant_derivs(ta + dt, pp, {s_k3}, u, d)",
            f"    s = {s_new}"])
    if fast:
        step = """        # the whole substep when dt * rate <= zf (the usual path); where it is stiff, RK4
        # steps of at most zf / rate each, the rate taken at each one's start, the remainder
        # split evenly so that the last step ends on the substep's end (one call site of step:
        # each inlined copy of the plant's RK4 costs compile time)
        rem = dt
        split = False
        while True:
            q = rem * plant_fast_rate(pp, s, d)
            hh = rem
            if not (q <= zf):
                if not (q < zf * MAX_REFINE) or extra >= MAX_REFINE:
                    return -1  # a non-finite rate, or more steps than the limit
                hh = rem / np.ceil(q / zf)
                split = True
            s = step(ta, hh, pp, s, u, d, blocked)
            if split:
                extra += 1
            if hh == rem:
                break
            ta += hh
            rem -= hh"""
    else:
        step = "        s = step(ta, dt, pp, s, u, d, blocked)"
    x_items = tuple_text([f"x[{i}]" for i in r])
    # gates blocked: the runtime's trip (every input NaN), or a paralleled unit's own block
    blocked = (" or ".join(f"not (u[{e}] > 0.5)" for e in dict.fromkeys(enables))
               if enables else "not (u[0] == u[0])")
    store = "\n".join(f"    x[{i}] = s[{i}]" for i in r)
    if period:
        # the plant integrates the whole period itself (switching instants, its own rule)
        advance = f"    s = plant_advance_period(t, h, pp, {x_items}, u, d)\n{store}\n    return 0"
    else:
        advance = (f"    dt = h / nsub\n    s = {x_items}\n    extra = 0\n"
                   f"    blocked = {blocked}\n"
                   f"    for j in range(nsub):\n        ta = t + j * dt\n{step}\n{store}\n"
                   f"    return extra")
    return dict(x_items=x_items, rk4_body=body, fast_step=step, store=store, advance_body=advance)


def _energy_text(checks: bool) -> dict[str, str]:
    """The energy check after each tick of the in-process plant (plants with ``energy`` and
    ``energy_limit``): the stored energy may not rise beyond what the circuit can deliver."""
    if not checks:
        return dict(energy_start="", energy_check="")
    return dict(
        energy_start="    e_now = plant_energy(pp, x)\n",
        energy_check="""        e_next = plant_energy(pp, x)
        e_lim = plant_energy_limit(ts, pp, e_now, d)
        if not (e_next <= e_lim * (1.0 + 1e-9) + 1e-12):
            ev[0] = {ev}
            ev[1] = kk
            ev[4] = {why}
            ev[7] = e_next
            ev[8] = e_lim
            ev[9] = e_now
            return i + 1
        e_now = e_next
""".format(ev=EV_INTEGRATION, why=WHY_ENERGY))


def has_fast_rate(plant: Plugin) -> bool:
    """Whether the plant has the optional kernel ``fast_rate`` (stiffness-aware sub-steps)."""
    return getattr(plant.module, "fast_rate", None) is not None


def has_energy_check(plant: Plugin) -> bool:
    """Whether the plant has the optional kernels ``energy`` and ``energy_limit``."""
    return (getattr(plant.module, "energy", None) is not None
            and getattr(plant.module, "energy_limit", None) is not None)


def plugin_ids(plant: Plugin, ctrl: Plugin, ref: Plugin) -> tuple:
    """What identifies the plugins of a loop: (kind, name, origin) of each."""
    return tuple((kind, p.name, tuple(p.origin))
                 for kind, p in (("plant", plant), ("controller", ctrl), ("reference", ref)))


def generate(plant: Plugin, ctrl: Plugin, ref: Plugin,
             checked: bool | None = None) -> tuple[Path, bool]:
    """Write (if absent) the loop module for this combination; return (path, was_new).

    ``checked`` (default: :func:`hilrig.runtime.checked.requested`) writes the bounds-checked
    variant, a module of its own name (cached apart)."""
    if checked is None:
        checked = checked_build()
    key = combination_key(plant, ctrl, ref)
    folder = cache_dir()
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / (f"loop_{key}_checked.py" if checked else f"loop_{key}.py")
    if path.exists():
        return path, False
    nx = len(plant.declaration.states)
    parts = dict(ev_nonfinite=EV_NONFINITE, ev_collapse=EV_COLLAPSE,
                 why_nonfinite=WHY_NONFINITE, why_substeps=WHY_SUBSTEPS,
                 decide_8=_indent(_DECIDE, 8), record_8=_indent(_RECORD, 8),
                 **_energy_text(has_energy_check(plant)))
    sil = _CHUNK.format(fname="run_chunk", paced_params="", paced_wait="", paced_stamp="",
                        borrow=_borrow_text(_chunk_params(False)),
                        fdoc="SIL: run ticks k0 .. k0+n-1; return how many ran (fewer if the "
                             "run ended).", **parts)
    paced = _CHUNK.format(fname="paced_chunk", paced_params=_PACED_PARAMS,
                          paced_wait=_PACED_WAIT, paced_stamp=_PACED_STAMP,
                          borrow=_borrow_text(_chunk_params(True)),
                          fdoc="Paced: as run_chunk, each tick at its deadline on the cycle "
                               "counter (c_ref at tick k_ref, cpt counts per tick), with its "
                               "lateness and compute time [s] in rec columns c_late, c_comp; "
                               "after each tick ctl[0] = base + rows done (rec is a block of "
                               "the recording ring in shared memory).",
                          **parts)
    text = _TEMPLATE.format(version=installed_version(), plant=plant.name, ctrl=ctrl.name, ref=ref.name,
                            key=key, imports=_import_lines(plant, ctrl, ref),
                            ev_nonfinite=EV_NONFINITE, ev_collapse=EV_COLLAPSE,
                            nx=nx, decide_4=_indent(_DECIDE, 4), record_4=_indent(_RECORD, 4),
                            decide_8=parts["decide_8"], record_8=parts["record_8"],
                            run_chunk=sil, paced_chunk=paced,
                            plugins=plugin_ids(plant, ctrl, ref), checked=bool(checked),
                            max_refine=MAX_REFINE,
                            step_defs=_step_text(nx, gate_block_currents(plant),
                                                 gate_block_enables(plant)),
                            gate_block=bool(gate_block_currents(plant)),
                            **_rk4_text(nx, has_rk4_step(plant), has_fast_rate(plant),
                                         has_advance_period(plant), gate_block_enables(plant)))
    if checked:
        text = checked_text(text)
    # write then rename: concurrent workers never import a half-written file, and an existing
    # file is never rewritten (a new mtime would invalidate numba's cache of it)
    fd, tmp = tempfile.mkstemp(dir=folder, suffix=".tmp")
    with os.fdopen(fd, "w") as fh:
        fh.write(text)
    os.replace(tmp, path)
    return path, True


def checked_build() -> bool:
    """Whether this process uses the bounds-checked loop (``--checked``, ``HILRIG_CHECKED=1``
    or ``NUMBA_BOUNDSCHECK=1``; :mod:`hilrig.runtime.checked`)."""
    from .checked import requested
    return requested()


def module_for(plant: Plugin, ctrl: Plugin, ref: Plugin):
    """The loaded loop module for this combination (generated first if needed), in the build
    this process uses (normal or bounds-checked)."""
    return load_module(generate(plant, ctrl, ref)[0])


#: stages of the loop, as the bounds-checked build marks them in ev[EV_STAGE] before each one:
#: (the call or comment that starts the stage, stage code, who owns the code that runs there)
_STAGES = (
    ("# 3 reference", 1, "hilrig: the reference plugin's inputs (iyr)"),
    ("ref_init(", 2, "reference {ref}: kernel init"),
    ("ref_step(", 3, "reference {ref}: kernel step"),
    ("shape_init(", 4, "hilrig: the shaping filter"),
    ("shape_step(", 4, "hilrig: the shaping filter"),
    ("# 4 control", 5, "hilrig: the controller's inputs (iyc)"),
    ("ctrl_init(", 6, "controller {ctrl}: kernel init"),
    ("ctrl_step(", 7, "controller {ctrl}: kernel step"),
    ("watch(", 8, "hilrig: watchdogs"),
    ("state_code(", 9, "hilrig: the controller state check"),
    ("apply_faults(", 10, "hilrig: fault injection"),
    ("protect(", 11, "hilrig: interlocks"),
    ("supervise(", 12, "hilrig: trip latch and resets"),
    ("interp_rows(", 13, "hilrig: the load profile"),
    ("plant_outputs(", 14, "plant {plant}: kernel outputs"),
    ("advance(", 15, "plant {plant}: kernel derivs, rk4_step or advance_period (the RK4 stage)"),
    ("# 7 record", 16, "hilrig: the recording row"),
    ("keep_true(", 16, "hilrig: the recording row"),
    ("sensor_chain(", 18, "hilrig: the sensor chain"),
    ("put_actuation(", 17, "hilrig: the bridge's frame codec"),
    ("get_sample(", 17, "hilrig: the bridge's frame codec"),
    ("read_vector(", 17, "hilrig: the bridge's frame codec"),
    ("for j in range(n_meas):", 17, "hilrig: the bridge's frame codec"),
)
#: slots of the event array ev: [event code, its tick, stage (checked build), tick (checked),
#: integration error's reason, refined sub-steps so far, first refined tick + 1 (0: none),
#: energy after the failed tick, its limit, energy before it]
EV_STAGE, EV_STAGE_TICK = 2, 3
EV_REASON, EV_REFINED, EV_FIRST_REFINED, EV_E_AFTER, EV_E_LIMIT, EV_E_BEFORE = 4, 5, 6, 7, 8, 9
EV_SIZE = 10
#: functions of the generated module that receive ev (the others run on the simulator's side)
_MARKED = ("run_chunk", "paced_chunk", "bridge_tick", "bridge_chunk")


def checked_text(text: str) -> str:
    """The bounds-checked variant of a generated module: every compiled function with
    ``boundscheck=True`` (numba applies the caller's flag to the kernels inlined into it), and
    in the functions that receive ``ev`` a line before each stage that writes the stage's code
    and the tick into it, so that an ``IndexError`` can be traced to a kernel."""
    text = text.replace('@njit(cache=True, error_model="numpy")',
                        '@njit(cache=True, error_model="numpy", boundscheck=True)')
    text = text.replace('@njit(inline="always")', '@njit(inline="always", boundscheck=True)')
    out = []
    func = None
    for line in text.splitlines():
        stripped = line.strip()
        if line.startswith("def "):
            func = line[4:].split("(", 1)[0]
        if func in _MARKED:
            for start, code, _ in _STAGES:
                if start in stripped and not stripped.startswith("def "):
                    indent = line[:len(line) - len(line.lstrip())]
                    out.append(f"{indent}ev[{EV_STAGE}] = {code}.0")
                    break
        out.append(line)
        if func in _MARKED and stripped == "t = kk * ts":
            indent = line[:len(line) - len(line.lstrip())]
            out.append(f"{indent}ev[{EV_STAGE_TICK}] = kk")
    return "\n".join(out) + "\n"


def stage_text(ev, plant: str, ctrl: str, ref: str) -> str:
    """Where the bounds-checked loop was when it stopped: the stage's owner and the tick."""
    code = int(ev[EV_STAGE]) if len(ev) > EV_STAGE else 0
    names = {c: w for _, c, w in _STAGES}
    if code not in names:
        return "at an unknown stage"
    return (names[code].format(plant=repr(plant), ctrl=repr(ctrl), ref=repr(ref))
            + f", tick {int(ev[EV_STAGE_TICK])}")


def compiled_is_cached(path: Path) -> bool:
    """True when numba's cache index for the generated module exists (no compile expected)."""
    pyc = path.parent / "__pycache__"
    return pyc.is_dir() and any(f.name.startswith(path.stem + ".run_chunk") and f.suffix == ".nbi"
                                for f in pyc.iterdir())


def load_module(path: Path):
    """Import a generated loop module by path (cached in sys.modules)."""
    name = "hilrig_loop_" + path.stem[len("loop_"):]
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module
