"""Fixed-layout datagrams end to end (loopback UDP only; every wait bounded): lockstep against
the stand-in simulator reproduces the SIL recording (bit for bit with float64), loss and
wrong-length frames are counted, a frozen simulator trips the staleness watchdog, bad layouts
are one clear error, and a simulator written with nothing but Python's socket and struct
modules (as a simulator engineer would from docs/protocol.md section 16) is understood."""
import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario
from tests.integration.standin import CLI, reaped, serve, udp_address, wait_listening
from tests.integration.test_protocol_example import shared_plugins

LAYOUT_TABLE = '''
[bridge.layout]
byte_order = "little"
type = "float64"
[bridge.layout.sample]
counter = true
time = true
signals = ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"]
[bridge.layout.actuation]
counter = true
signals = ["u", "output_enable", "interlock_word"]
'''

#: float32, big-endian, the signals in another order, no time field (a layout file)
LAYOUT_FILE_F32 = '''
type = "float32"
byte_order = "big"
[sample]
signals = ["v_dc", "i_L2", "v_C1", "i_L1", "i_out", "v_out"]
[actuation]
signals = ["output_enable", "u"]
'''


def _scenario(tmp, demo_path):
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "40 ms"')
    path = tmp / "short.toml"
    path.write_text(text + LAYOUT_TABLE)
    return path


def _session(scen, out, *run_extra, sim_extra=(), layout=()):
    """One lockstep session against the stand-in over fixed-layout datagrams:
    (the run's CompletedProcess, the stand-in's output)."""
    address = udp_address()
    sim = serve(scen, address, "--layout", *layout, *sim_extra)
    with reaped(sim):
        head = wait_listening(sim)
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--layout", *layout,
                                  "--out", str(out), "--headless", "--timeout", "60",
                                  *run_extra], capture_output=True, text=True, timeout=600)
        sim_out, _ = sim.communicate(timeout=120)
    return p, head + sim_out


@pytest.fixture(scope="module")
def lockstep_runs(tmp_path_factory, demo_path):
    tmp = tmp_path_factory.mktemp("dgram")
    scen = _scenario(tmp, demo_path)
    p, sim_out = _session(scen, tmp / "hil")  # the layout of the scenario's [bridge.layout]
    assert p.returncode == 0, p.stdout + p.stderr
    sil = run_scenario(load_scenario(scen), tmp / "sil")
    return tmp, scen, sil, sim_out


def test_lockstep_fixed_layout_reproduces_sil_bit_for_bit(lockstep_runs):
    tmp, scen, sil, sim_out = lockstep_runs
    a, b = open_run(tmp / "hil"), open_run(sil.folder)
    assert a.time.shape == b.time.shape == (800,)
    for name in ("v_out", "i_out", "i_L1", "v_C1", "i_L2", "u", "v_ref", "v_ref_raw",
                 "interlock_word"):
        # float64 values travel as their own 8 bytes, the same operations run in the same
        # order on both sides: bit-identical
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    assert "session 1 ended (end request) after 800 ticks" in sim_out
    br = json.loads((tmp / "hil" / "summary.json").read_text())["bridge"]
    assert br["frames"] == "fixed-layout" and br["layout"]["sample"]["bytes"] == 4 + 8 + 6 * 8
    # the start request, one actuation per tick, the end request; no handshake
    assert br["frames_sent"] == 1 + 800 + 1 and br["frames_received"] == 801
    assert br["lost"] == 0 and br["rejected"] == {}


def test_lockstep_float32_big_endian_layout_file_stays_within_the_rounding_bound(lockstep_runs):
    """float32 frames: every measurement and command is rounded to binary32 on each crossing
    (IEEE 754 round to nearest: relative error at most 2**-24). The runs are no longer
    identical. The measured v_out differs from SIL's by about one such rounding of its value
    (seen: 2.5e-5 V at 420 V, 1.01 units); the bound allows 4. Through the controller the
    differences grow: u and i_L1 stay within 1e-4 of their range in the SIL run (seen: about
    1.8e-5; a bound from this test's runs with a margin of 5, not a derived one)."""
    tmp, scen, sil, _ = lockstep_runs
    (tmp / "f32.toml").write_text(LAYOUT_FILE_F32)
    p, sim_out = _session(scen, tmp / "f32", layout=(str(tmp / "f32.toml"),))
    assert p.returncode == 0, p.stdout + p.stderr
    assert "6 x float32" in sim_out and "big-endian" in sim_out
    a, b = open_run(tmp / "f32"), open_run(sil.folder)
    assert a.time.shape == b.time.shape
    v, v_sil = a.signals["v_out"], b.signals["v_out"]
    assert np.max(np.abs(v - v_sil)) <= 4 * 2.0**-24 * np.max(np.abs(v_sil))
    for name in ("i_L1", "u"):
        x, y = a.signals[name], b.signals[name]
        assert np.max(np.abs(x - y)) <= 1e-4 * np.ptp(y), (name, np.max(np.abs(x - y)))
    for name in ("v_out", "i_L1", "u"):
        assert a.signals[name].tobytes() != b.signals[name].tobytes()  # the rounding shows


def test_lockstep_loss_and_wrong_length_frames_are_counted_and_still_reproduce_sil(lockstep_runs):
    """The stand-in drops 5 % of its samples and sends every 97th one byte short: the runtime
    resends its actuation on a loss, counts the short datagrams as ``frame-length`` rejections
    and treats them as lost, and the recording is still the SIL one."""
    tmp, scen, sil, sim_out = lockstep_runs
    p, sim_out = _session(scen, tmp / "lossy", sim_extra=("--drop", "0.05", "--corrupt-every",
                                                           "97", "--fault-seed", "3"))
    assert p.returncode == 0, p.stdout + p.stderr
    a, b = open_run(tmp / "lossy"), open_run(sil.folder)
    for name in ("v_out", "i_L1", "u"):
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    br = json.loads((tmp / "lossy" / "summary.json").read_text())["bridge"]
    assert br["resent"] > 0
    assert br["rejected"].get("frame-length", 0) >= 1, br["rejected"]
    assert set(br["rejected"]) == {"frame-length"}
    assert "corrupted" in sim_out


def test_frozen_simulator_trips_the_staleness_watchdog_into_the_safe_state(tmp_path, demo_path):
    scen = _scenario(tmp_path, demo_path)
    p, sim_out = _session(scen, tmp_path / "r", "--set", 'watchdogs.stale_limit="200 ms"',
                          sim_extra=("--freeze-after", "300", "--idle-timeout", "5"))
    assert p.returncode == 1, p.stdout + p.stderr
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert not s["completed"] and s["end_event"] == "bridge stale", s["events"]
    assert s["trip"]["cause_id"] == "watchdog stale"
    stale = [e for e in s["events"] if e["event"] == "bridge stale"][0]
    assert stale["detected_after_s"] >= 0.2
    k = s["trip"]["tick"]
    # the stand-in took actuation 299, sent sample 300, froze on actuation 300: sample 301
    # never came, and the tick that waited for it trips
    assert k == 301
    run = open_run(tmp_path / "r")
    assert run.time.shape[0] == k + 1 and run.signals["u"][k] == 0.0  # limits.safe_u
    assert (int(run.signals["interlock_word"][k]) >> 50) & 1
    assert "frozen at tick 300" in sim_out


def test_disconnected_simulator_trips_the_staleness_watchdog(tmp_path, demo_path):
    """Fixed-layout frames have no STOP: a simulator that goes away falls silent, and the
    runtime's staleness watchdog ends the run in the safe state."""
    scen = _scenario(tmp_path, demo_path)
    p, sim_out = _session(scen, tmp_path / "r", "--set", 'watchdogs.stale_limit="200 ms"',
                          sim_extra=("--disconnect-after", "100"))
    assert p.returncode == 1, p.stdout + p.stderr
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert s["end_event"] == "bridge stale" and s["trip"]["cause_id"] == "watchdog stale"
    assert s["trip"]["tick"] == 101
    assert "session 1 ended (disconnect) after 100 ticks" in sim_out


@pytest.mark.parametrize("layout, words", [
    ('[sample]\nsignals = ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dcc"]\n'
     '[actuation]\nsignals = ["u"]\n', ["unknown signal 'v_dcc'", "did you mean 'v_dc'"]),
    ('type = "double"\n[sample]\nsignals = ["v_out"]\n[actuation]\nsignals = ["u"]\n',
     ["sample.type = 'double'"]),
    ('[sample]\nbyte_order = "network"\nsignals = ["v_out"]\n[actuation]\nsignals = ["u"]\n',
     ["sample.byte_order = 'network'"]),
    ('[sample]\nsignals = ["v_out", "i_out", "i_L1", "v_C1", "i_L2", "v_dc"]\n'
     '[actuation]\nsignals = ["u", "u"]\n', ["'u' is listed twice"]),
])
def test_bad_layout_file_is_one_clear_error_exit_2(tmp_path, demo_path, layout, words):
    scen = tmp_path / "s.toml"
    scen.write_text(Path(demo_path).read_text())
    bad = tmp_path / "bad.toml"
    bad.write_text(layout)
    for cmd in (["run", str(scen), "--bridge", "udp://127.0.0.1:9", "--layout", str(bad),
                 "--headless", "--out", str(tmp_path / "r")],
                ["serve-sim", "--scenario", str(scen), "--bind", "udp://127.0.0.1:9",
                 "--layout", str(bad)]):
        p = subprocess.run(CLI + cmd, capture_output=True, text=True, timeout=300)
        assert p.returncode == 2, p.stdout + p.stderr
        err = [ln for ln in p.stdout.splitlines() if ln.startswith("error:")]
        assert len(err) == 1 and str(bad) in err[0], p.stdout
        for w in words:
            assert w in p.stdout.replace("\n", " "), p.stdout
        assert "Traceback" not in p.stdout + p.stderr
    assert not (tmp_path / "r").exists()


def test_bad_layout_in_the_scenario_and_wrong_address_are_refused(tmp_path, demo_path):
    scen = tmp_path / "s.toml"
    scen.write_text(Path(demo_path).read_text() + LAYOUT_TABLE.replace('"v_dc"]', '"v_dc", "v_out"]'))
    p = subprocess.run(CLI + ["run", str(scen), "--headless", "--out", str(tmp_path / "r")],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 2 and "s.toml: bridge.layout: sample.signals: 'v_out' is listed twice" \
        in p.stdout.replace("\n", " "), p.stdout
    scen.write_text(Path(demo_path).read_text() + LAYOUT_TABLE)
    p = subprocess.run(CLI + ["run", str(scen), "--bridge", "tcp://127.0.0.1:9", "--layout",
                              "--headless", "--out", str(tmp_path / "r")],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 2 and "must be udp://HOST:PORT" in p.stdout, p.stdout
    assert "Traceback" not in p.stdout + p.stderr


# -- a simulator from the document alone: socket and struct, nothing of hilrig -------------------

SIMULATOR = r'''
import math, select, socket, struct, sys, time
TS, TAU = 1e-3, 20e-3                 # the scenario's tick period and plant (test data)
START = 0xFFFFFFFF
s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
s.bind(("127.0.0.1", 0))
print("listening on", s.getsockname()[1], flush=True)
s.settimeout(120)
while True:                           # wait for the start request: counter 0xFFFFFFFF
    data, peer = s.recvfrom(2048)
    if len(data) == 12 and struct.unpack("<Id", data)[0] == START:
        break
v, u, t0 = 10.0, 0.0, time.perf_counter()
for k in range(150):
    if k == 60:
        s.sendto(b"\x01\x02\x03\x04\x05", peer)        # a datagram of the wrong length
    if k not in (50, 51, 52):                          # samples 50-52 lost: a gap of 3
        s.sendto(struct.pack("<Id", k, v), peer)       # sample: uint32 counter, v_out
    deadline = t0 + (k + 1) * TS
    while True:
        left = deadline - time.perf_counter()
        if left <= 0:
            break
        if select.select([s], [], [], left)[0]:
            a = s.recv(2048)
            if len(a) == 12:
                c, uu = struct.unpack("<Id", a)        # actuation: uint32 counter, u
                if c == k and math.isfinite(uu):
                    u = uu
    v = u + (v - u) * math.exp(-TS / TAU)              # exact step of dv/dt = (u - v)/tau
print("silent from tick 150", flush=True)
time.sleep(5)                                          # then silence: the runtime goes stale
'''

FREE_SCENARIO = '''
title = "fixed-layout free-running (test data)"
[timing]
Ts = "1 ms"
substeps = 4
duration = "1 s"
[plant]
plugin = "{d}/first_order.py"
tau = "20 ms"
[controller]
plugin = "{d}/pi_v.py"
Kp = 2.0
Ki = 100.0
[reference]
plugin = "profile"
points = [[0, 10], ["50 ms", 10], ["50 ms", 12]]
[shaping]
pole = "500 rad/s"
slew_rate = "1 kV/s"
[limits]
v_collapse = 0
[watchdogs]
stale_limit = "100 ms"
peer_timeout = "200 ms"
[bridge.layout.sample]
signals = ["v_out"]
[bridge.layout.actuation]
signals = ["u"]
'''


def test_free_running_struct_simulator_gap_wrong_length_and_watchdog(tmp_path):
    """A simulator that knows only the byte layout (section 16): the runtime counts its lost
    samples as a gap, rejects and counts the short datagram, and trips the staleness watchdog
    when it falls silent, with the safe output and exit status 1."""
    scen = tmp_path / "fr.toml"
    scen.write_text(FREE_SCENARIO.format(d=shared_plugins()))
    sim = subprocess.Popen([sys.executable, "-c", textwrap.dedent(SIMULATOR)],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    with reaped(sim):
        port = int(wait_listening(sim).split()[-1])
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", f"udp://127.0.0.1:{port}",
                                  "--mode", "free-running", "--layout", "--out",
                                  str(tmp_path / "r"), "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600)
    assert p.returncode == 1, p.stdout + p.stderr
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    br = s["bridge"]
    assert br["frames"] == "fixed-layout"
    assert br["lost"] == 3 and br["rejected"] == {"frame-length": 1}, br
    assert s["trip"]["cause_id"] == "watchdog stale", s["events"]
    assert s["end_event"] == "bridge peer lost"
    k = s["trip"]["tick"]
    run = open_run(tmp_path / "r")
    assert run.signals["u"][k] == 0.0 and k >= 150
    # the loop closed over the struct-only simulator: v_out follows the 12 V step
    v = run.signals["v_out"]
    assert abs(v[140] - 12.0) < 0.5, v[140]


def test_doc_fixed_layout_simulator_runs_a_lockstep_session(tmp_path):
    """docs/protocol.md section 16.8, run as its own process against the runtime: a simulator
    written from the document alone (standard library only) interoperates."""
    import math
    import re
    from tests.integration.test_protocol_example import SCENARIO, with_shared_plugins
    doc = (Path(__file__).resolve().parents[2] / "docs" / "protocol.md").read_text()
    block = doc.split("<!-- example: fixed_simulator.py -->", 1)[1]
    code = re.search(r"```python\n(.*?)```", block, re.S).group(1)
    assert not re.search(r"^\s*(import|from) (hilrig|msgpack|numpy)", code, flags=re.M)
    layout = re.search(r"```toml\n(\[bridge\.layout\.sample\].*?)```",
                       doc.split("### 16.8", 1)[1], re.S).group(1)
    (tmp_path / "fixed_simulator.py").write_text(code)
    (tmp_path / "scen.toml").write_text(with_shared_plugins(SCENARIO) + layout)
    ts = float(re.search(r"^TS = ([0-9.e-]+)", code, re.M).group(1))
    tau = float(re.search(r"^TAU = ([0-9.e-]+)", code, re.M).group(1))
    sim = subprocess.Popen([sys.executable, str(tmp_path / "fixed_simulator.py"), "0"],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    with reaped(sim):
        address = re.search(r"udp://127\.0\.0\.1:\d+", wait_listening(sim)).group(0)
        p = subprocess.run(CLI + ["run", str(tmp_path / "scen.toml"), "--bridge", address,
                                  "--layout", "--out", str(tmp_path / "run"), "--headless",
                                  "--timeout", "30"], capture_output=True, text=True, timeout=600)
        line = sim.stdout.readline()  # the example's end-of-session line
    assert p.returncode == 0, p.stdout + p.stderr
    assert line.startswith("session ended after 300 ticks; 0 datagrams rejected"), line
    run = open_run(tmp_path / "run")
    v, u = run.signals["v_out"], run.signals["u"]
    assert v.shape == (300,)
    # every sample is the exact zero-order-hold step of dv/dt = (u - v)/tau from the previous
    # one with the recorded actuation (exact solution of a linear first-order ODE, derived)
    a = math.exp(-ts / tau)
    np.testing.assert_allclose(v[1:], u[:-1] + (v[:-1] - u[:-1]) * a, rtol=1e-12, atol=1e-12)
    assert abs(v[-1] - 2.0) < 0.01  # the runtime's PI brings the plant to the 2 V reference


def test_free_running_against_the_stand_in_counts_dropped_samples_as_gaps(tmp_path):
    """The stand-in in free-running over fixed-layout datagrams, dropping 10 % of its samples:
    the runtime counts the missing counter values as lost (sequence gaps), holds the last
    measurement on their ticks, and the loop still tracks the 12 V step."""
    scen = tmp_path / "fr.toml"
    scen.write_text(FREE_SCENARIO.format(d=shared_plugins()).replace(
        'duration = "1 s"', 'duration = "0.4 s"').replace(
        '[watchdogs]\n', '[watchdogs]\nmax_gap = 100000\n'))
    address = udp_address()
    sim = serve(scen, address, "--mode", "free-running", "--layout", "--drop", "0.1",
                "--fault-seed", "5")
    with reaped(sim):
        wait_listening(sim)
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--mode",
                                  "free-running", "--layout", "--out", str(tmp_path / "r"),
                                  "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600)
        sim_out, _ = sim.communicate(timeout=120)
    assert p.returncode == 0, p.stdout + p.stderr
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert s["completed"] and s["mode"] == "free-running", s["events"]
    br = s["bridge"]
    assert br["frames"] == "fixed-layout" and br["lost"] >= 5 and br["held_ticks"] >= br["lost"]
    assert "session 1 ended (end request)" in sim_out
    v = open_run(tmp_path / "r").signals["v_out"]
    assert np.all(np.isfinite(v)) and abs(v[-1] - 12.0) < 0.05


def test_lockstep_stand_in_serves_a_second_session_from_a_fresh_plant(lockstep_runs):
    """After the end request the stand-in waits for the next start request and starts its
    plant afresh: a second run against the same stand-in records the same bits as the first."""
    tmp, scen, sil, _ = lockstep_runs
    address = udp_address()
    sim = serve(scen, address, "--layout", "--sessions", "2")
    with reaped(sim):
        wait_listening(sim)
        for name in ("first", "second"):
            p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--layout",
                                      "--out", str(tmp / name), "--headless", "--timeout", "60"],
                               capture_output=True, text=True, timeout=600)
            assert p.returncode == 0, p.stdout + p.stderr
        sim_out, _ = sim.communicate(timeout=120)
    assert sim.returncode == 0 and "session 2 ended (end request) after 800 ticks" in sim_out
    a, b = open_run(tmp / "first"), open_run(tmp / "second")
    for name in ("v_out", "i_L1", "u"):
        assert a.signals[name].tobytes() == b.signals[name].tobytes() == \
            open_run(sil.folder).signals[name].tobytes(), name
