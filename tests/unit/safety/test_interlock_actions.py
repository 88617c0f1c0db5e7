"""Interlock actions and the event log beyond the first cause: a "warn" row logs when its
condition starts and never trips or blocks a reset; conditions that start while a trip is
latched are logged as later causes (the first cause stays latched). Semantics: common
practice, no source."""
import numpy as np
import pytest

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.scenario import parse_scenario
from hilrig.safety.interlocks import (CODE_NONFINITE_STATE, EVT_ALSO, EVT_RESET_ACCEPTED,
                                      EVT_TRIP, EVT_WARN, L_RESET_NOW, L_TRIPPED, L_WARN_MASK,
                                      Interlock, InterlockTable, new_event_log, new_latch,
                                      protect, supervise)

NAMES = ["v_out", "i_out", "u"]
TS = 50e-6


class Rig:
    def __init__(self, rows, jit=True):
        self.tb = InterlockTable.build(rows, NAMES + ["p_out", "dv_out_dt"])
        self.latch = new_latch()
        self.latch[L_WARN_MASK] = float(self.tb.warn_mask())
        self.cnt = np.zeros(len(rows), dtype=np.int64)
        self.pv = np.zeros(2 * (len(NAMES) + 2))
        self.evlog, self.evn = new_event_log()
        self.k = 0
        # compiled, or as plain Python (for a Python traceback on failure)
        self.protect = protect if jit else protect.py_func
        self.supervise = supervise if jit else supervise.py_func

    def step(self, v=400.0, i=100.0, u=350.0, reset=False, code=0):
        y = np.array([v, i])
        uu = np.array([u])
        tb = self.tb
        w = self.protect(self.k, self.k * TS, TS, y, uu, code, np.array([0, 1]), tb.sig, tb.side,
                         tb.thr, tb.deb, self.cnt, self.latch, self.pv, np.zeros(1))
        if reset:
            self.latch[L_RESET_NOW] = 1.0
        self.supervise(self.k, self.k * TS, w, self.latch, np.zeros(0), np.zeros(1, np.int64),
                       self.evlog, self.evn)
        self.k += 1
        return float(uu[0])

    def events(self):
        return [(int(r[0]), int(r[1]), int(r[2])) for r in self.evlog[:int(self.evn[0])]]


def test_warn_row_logs_each_onset_and_never_trips():
    rig = Rig([Interlock("i_out", 150.0, above=True, action="warn")])
    for i in [100, 160, 170, 100, 100, 200, 100]:
        assert rig.step(i=i) == 350.0            # the command is never replaced
    assert rig.latch[L_TRIPPED] == 0.0
    assert rig.events() == [(1, EVT_WARN, 1), (5, EVT_WARN, 1)]   # one per onset


def test_warn_condition_does_not_block_a_reset():
    rig = Rig([Interlock("v_out", 480.0, above=True), Interlock("i_out", 150.0, above=True, action="warn")])
    rig.step(v=500.0)                            # trips on v_out
    rig.step(v=400.0, i=200.0, reset=True)       # the warn condition holds: reset still accepted
    assert rig.latch[L_TRIPPED] == 0.0
    assert [e[1] for e in rig.events()] == [EVT_TRIP, EVT_WARN, EVT_RESET_ACCEPTED]


def test_later_causes_are_logged_while_the_first_stays_latched():
    rig = Rig([Interlock("v_out", 480.0, above=True), Interlock("i_out", 500.0, above=True)])
    rig.step(v=500.0)                            # first cause: row 0
    rig.step(v=500.0, i=600.0)                   # row 1 starts while tripped
    rig.step(v=500.0, i=600.0)                   # still holding: not logged again
    rig.step(v=float("nan"), i=600.0)            # a non-finite measurement starts
    ev = rig.events()
    assert ev[0] == (0, EVT_TRIP, 1)
    assert ev[1] == (1, EVT_ALSO, 2)
    assert ev[2][1] == EVT_ALSO and rig.tb.cause_text(ev[2][2]) == "non-finite value of a signal"
    assert len(ev) == 3
    assert rig.latch[1] == 1.0                   # L_CAUSE: still the first


@pytest.mark.parametrize("jit", [True, False], ids=["njit", "python"])
@pytest.mark.parametrize("code, text, cause_id", [
    (CODE_NONFINITE_STATE, "non-finite controller state", "non-finite controller state"),
    (7, "controller fault code 7", "controller fault"),
    (-3, "controller fault code -3", "controller fault"),
    # codes of 1000 and more stay controller faults (they once landed in the watchdog range)
    (1000, "controller fault code 999 or above (the trip's value holds the code)", "controller fault"),
    (1003, "controller fault code 999 or above (the trip's value holds the code)", "controller fault"),
])
def test_a_later_controller_fault_is_logged_with_what_the_controller_did(jit, code, text, cause_id):
    """A dropout (NaN v_out) latches first; the controller, fed the NaN on the same tick, ends
    with a non-finite state (or returns a fault code): the later cause names that, never
    "code 0" (the controller bit is set only for a non-zero code)."""
    rig = Rig([Interlock("v_out", 480.0, above=True)], jit=jit)
    rig.step()
    rig.step(v=float("nan"), code=code)
    ev = rig.events()
    assert ev[0][:2] == (1, EVT_TRIP) and rig.tb.cause_id(ev[0][2]) == "non-finite v_out"
    also = [e for e in ev if e[1] == EVT_ALSO]
    texts = [rig.tb.cause_text(e[2]) for e in also]
    assert text in texts, texts
    assert cause_id in [rig.tb.cause_id(e[2]) for e in also]
    assert not any("code 0" in t for t in texts)


def _demo(extra: str) -> str:
    from importlib.resources import files
    return (files("hilrig.runtime") / "data" / "demo.toml").read_text() + extra


@pytest.mark.parametrize("extra, message", [
    ('[[interlocks]]\nsignal = "v_out"\nabove = "490 V"\naction = "beep"\n', "write \"trip\""),
    ('[[faults]]\nkind = "link_freeze"\nsignal = "v_out"\nstart = 0.1\n', "acts on the link to the simulator"),
    ('[[faults]]\nkind = "link_loss"\nvalue = 1.5\nstart = 0.1\n', "outside"),
    ('[[faults]]\nkind = "link_delay"\nvalue = "1 ms"\nwhen = { signal = "v_out", above = "1 V" }\n',
     "on a schedule"),
])
def test_bad_actions_and_link_faults_are_refused(extra, message):
    with pytest.raises(ScenarioError, match=message):
        parse_scenario(_demo(extra))


def test_link_faults_do_not_enter_the_compiled_loop():
    from hilrig.runtime.run import prepare
    sc = parse_scenario(_demo('[[faults]]\nkind = "link_freeze"\nstart = "0.1 s"\n'
                              '[[faults]]\nkind = "offset"\nsignal = "v_out"\nvalue = 1\nstart = 0.2\n'))
    a = prepare(sc).args
    assert a["f_kind"].shape == (1,)             # only the sensor fault
