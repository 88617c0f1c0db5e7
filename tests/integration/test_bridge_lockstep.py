"""Lockstep soft-HIL against the stand-in simulator in a separate process: the same compiled
controller, the plant on the other side of a ZeroMQ socket (loopback or ipc only; every wait is
bounded)."""
import json
import os
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario
from tests.integration.standin import (CLI, free_tcp_port, reaped, serve, udp_address,
                                       wait_listening)

ROOT = Path(__file__).resolve().parents[2]


def _scenario(tmp_path, demo_path):
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "40 ms"')
    path = tmp_path / "short.toml"
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def lockstep_run(tmp_path_factory, demo_path):
    tmp = tmp_path_factory.mktemp("bridge")
    scen = _scenario(tmp, demo_path)
    address = f"ipc://{tmp}/sim.sock"
    sim = serve(scen, address)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp / "hil"),
                                  "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600)
        sim_out, sim_err = sim.communicate(timeout=120)
    assert p.returncode == 0, p.stdout + p.stderr
    assert sim.returncode == 0, sim_err
    sil = run_scenario(load_scenario(scen), tmp / "sil")
    return tmp, scen, sil, sim_out


def test_lockstep_reproduces_sil_bit_for_bit(lockstep_run):
    tmp, scen, sil, sim_out = lockstep_run
    a, b = open_run(tmp / "hil"), open_run(sil.folder)
    assert a.time.shape == b.time.shape == (800,)
    for name in ("v_out", "i_out", "i_L1", "v_C1", "i_L2", "u", "v_ref", "v_ref_raw"):
        # identical IEEE 754 operations in the same order on both sides, and the samples
        # travel as raw float64 bytes: bit-identical (the bound is 1e-9 V)
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    assert "session 1 ended after 800 ticks" in sim_out


def test_lockstep_summary_has_bridge_statistics(lockstep_run):
    tmp, *_ = lockstep_run
    s = json.loads((tmp / "hil" / "summary.json").read_text())
    assert s["mode"] == "lockstep" and s["completed"]
    br = s["bridge"]
    # handshake + ready + one actuation per tick + the closing STOP
    assert br["frames_sent"] == 800 + 2 + 1
    assert br["lost"] == 0 and br["duplicates"] == 0 and br["out_of_order"] == 0
    assert br["rtt_us"]["n"] >= 800 and br["rtt_us"]["p50"] > 0
    from hilrig.bridge import wire
    # with nothing out of the ordinary every tick's exchange runs in compiled code
    assert br["ticks_compiled"] == (800 if wire.available(wire.KIND_ZMQ) else 0)
    run = open_run(tmp / "hil")
    assert np.all(np.isnan(run.signals["P_load"]))  # the load lives in the simulator


def test_wrong_signal_map_is_refused_with_a_clear_message(tmp_path, demo_path):
    scen = _scenario(tmp_path, demo_path)
    # the simulator runs the single-stage plant: different measurements
    other = tmp_path / "other.toml"
    other.write_text(scen.read_text().replace('plugin = "two_stage_lc"', 'plugin = "single_lc"')
                     .replace('L1 = "150 uH"\nR1 = "5 mohm"\nC1 = "220 uF"\nL2 = "100 uH"\nR2 = "3 mohm"\nC2 = "680 uF"\n', ""))
    address = f"ipc://{tmp_path}/sim2.sock"
    sim = serve(other, address)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "r"),
                                  "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600)
    assert p.returncode == 2, p.stdout + p.stderr
    assert "handshake" in p.stdout and "map" in p.stdout
    assert "Traceback" not in p.stdout + p.stderr
    assert not (tmp_path / "r" / "recording.h5").exists()


def test_non_loopback_address_needs_explicit_flag(tmp_path, demo_path):
    scen = _scenario(tmp_path, demo_path)
    p = subprocess.run(CLI + ["run", str(scen), "--bridge", "tcp://192.0.2.1:47810",
                              "--out", str(tmp_path / "r"), "--headless"],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 2
    assert "not on this machine" in p.stdout and "--allow-remote" in p.stdout


def test_remote_bridge_above_60_v_needs_the_high_voltage_acknowledgement(tmp_path, demo_path):
    """ISO 6469-3 voltage class B begins above 60 V DC (from memory): the demo's 800 V link is
    far above it, so a bridge to another machine needs the explicit acknowledgement flag."""
    scen = _scenario(tmp_path, demo_path)
    base = CLI + ["run", str(scen), "--bridge", "tcp://192.0.2.1:47810", "--allow-remote",
                  "--out", str(tmp_path / "r"), "--headless"]
    p = subprocess.run(base, capture_output=True, text=True, timeout=300)
    assert p.returncode == 2 and "--acknowledge-high-voltage" in p.stdout
    assert "not safety-rated" in p.stdout
    # acknowledged, the run goes on to the next check (CurveZMQ keys for a remote ZeroMQ peer)
    p = subprocess.run(base + ["--acknowledge-high-voltage"], capture_output=True, text=True,
                       timeout=300)
    assert p.returncode == 2 and "needs CurveZMQ keys" in p.stdout
    assert not (tmp_path / "r" / "recording.h5").exists()


def test_killing_the_simulator_trips_the_staleness_watchdog(tmp_path, demo_path):
    """Killing the stand-in simulator mid-run: no reply within the staleness limit trips the
    stale watchdog on the next tick, whose output is the safe one, and the run ends with the
    recording intact (trip semantics: common practice, no source)."""
    scen = _scenario(tmp_path, demo_path)
    address = f"ipc://{tmp_path}/sim3.sock"
    sim = serve(scen, address)
    proc = subprocess.Popen(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "r"),
                                   "--headless", "--timeout", "30",
                                   "--set", 'timing.duration="20 s"',
                                   "--set", 'watchdogs.stale_limit="200 ms"'],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    with reaped(sim, proc):
        # let the session run, then kill the simulator mid-run
        deadline = time.monotonic() + 120
        while not (tmp_path / "r" / "recording.h5").exists() and time.monotonic() < deadline:
            time.sleep(0.2)
        time.sleep(1.0)
        sim.kill()
        sim.communicate(timeout=60)
        out, err = proc.communicate(timeout=300)
    assert proc.returncode == 1, out + err
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert not s["completed"] and s["end_event"] == "bridge stale", s["events"]
    assert s["trip"]["cause_id"] == "watchdog stale"
    stale = [e for e in s["events"] if e["event"] == "bridge stale"][0]
    assert 0.2 <= stale["detected_after_s"] < 0.2 + 0.15
    run = open_run(tmp_path / "r")
    n = run.time.shape[0]
    k = s["trip"]["tick"]
    assert n == s["ticks_run"] == k + 1      # the watchdog tick is the last one recorded
    assert run.signals["u"][k] == 0.0         # the safe output (limits.safe_u) on that tick
    assert (int(run.signals["interlock_word"][k]) >> 50) & 1
    assert np.all(np.isfinite(run.signals["v_out"])) and np.all(run.signals["u"][:k] > 0.0)


def test_udp_lockstep_with_lost_and_corrupted_datagrams_still_reproduces_sil(lockstep_run):
    """Loss and corruption are the protocol's business: the runtime resends its actuation, the
    simulator answers a repeated actuation with its last sample without advancing, and a
    datagram that does not decode is counted and treated as lost."""
    tmp, scen, sil, _ = lockstep_run
    address = udp_address()
    sim = serve(scen, address, "--drop", "0.05", "--corrupt-every", "97", "--fault-seed", "7")
    with reaped(sim):
        wait_listening(sim)  # bound before the first datagram
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp / "udp"),
                                  "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600)
        sim_out, sim_err = sim.communicate(timeout=120)
    assert p.returncode == 0, p.stdout + p.stderr
    a, b = open_run(tmp / "udp"), open_run(sil.folder)
    for name in ("v_out", "i_L1", "u"):
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    s = json.loads((tmp / "udp" / "summary.json").read_text())
    br = s["bridge"]
    assert br["resent"] > 0 and br["rejected"]
    assert "dropped" in sim_out and "corrupted" in sim_out
    from hilrig.bridge import wire
    if wire.available(wire.KIND_UDP):
        # every tick ran in compiled code, which handed each resend and each mangled
        # datagram to the Python path and took over again at the next tick
        assert br["ticks_compiled"] == 800


def test_python_path_alone_also_reproduces_sil(lockstep_run):
    """The per-tick Python path (HILRIG_BRIDGE_PYTHON=1 on both sides: no compiled exchange)
    gives the same bits as the compiled one and as SIL."""
    tmp, scen, sil, _ = lockstep_run
    address = f"ipc://{tmp}/py.sock"
    env = dict(os.environ, HILRIG_BRIDGE_PYTHON="1")
    sim = serve(scen, address, env=env)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp / "py"),
                                  "--headless", "--timeout", "60"],
                           capture_output=True, text=True, timeout=600, env=env)
        sim.communicate(timeout=120)
    assert p.returncode == 0, p.stdout + p.stderr
    a, b = open_run(tmp / "py"), open_run(sil.folder)
    for name in ("v_out", "i_L1", "u", "v_ref"):
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    br = json.loads((tmp / "py" / "summary.json").read_text())["bridge"]
    assert br["ticks_compiled"] == 0 and br["frames_sent"] == 800 + 2 + 1


def test_frozen_simulator_over_zeromq_trips_the_staleness_watchdog(tmp_path, demo_path):
    scen = _scenario(tmp_path, demo_path)
    address = f"ipc://{tmp_path}/frz.sock"
    sim = serve(scen, address, "--freeze-after", "200")
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "r"),
                                  "--headless", "--timeout", "3"],
                           capture_output=True, text=True, timeout=600)
    assert p.returncode == 1, p.stdout + p.stderr
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    # ticks 0..200 ran on samples; no reply to actuation 200 within the limit (the --timeout
    # here), so tick 201 is the watchdog tick: stale trip, safe output, end of the run
    assert s["end_event"] == "bridge stale" and s["ticks_run"] == 202
    assert s["trip"]["cause_id"] == "watchdog stale" and s["trip"]["tick"] == 201


def test_curve_keys_authenticate_and_a_wrong_key_is_refused(tmp_path, demo_path):
    """CurveZMQ (ZeroMQ RFC 26): the simulator admits only runtimes whose public key it holds."""
    scen = _scenario(tmp_path, demo_path)
    good, other = tmp_path / "keys", tmp_path / "other"
    for folder in (good, other):
        p = subprocess.run(CLI + ["keys", str(folder)], capture_output=True, text=True, timeout=120)
        assert p.returncode == 0, p.stderr
    assert oct((good / "runtime.key_secret").stat().st_mode & 0o777) == "0o600"
    # making keys again into the same folder is refused, nothing overwritten
    before = (good / "runtime.key_secret").read_bytes()
    p = subprocess.run(CLI + ["keys", str(good)], capture_output=True, text=True, timeout=120)
    assert p.returncode == 2 and (good / "runtime.key_secret").read_bytes() == before
    address = f"tcp://127.0.0.1:{free_tcp_port()}"
    sim = serve(scen, address, "--idle-timeout", "60", "--curve-keys", str(good))
    with reaped(sim):
        # a runtime with keys from another folder: refused during the handshake, clearly
        wrong = tmp_path / "wrong"
        wrong.mkdir()
        for f in ("runtime.key", "runtime.key_secret"):
            (wrong / f).write_bytes((other / f).read_bytes())
        (wrong / "simulator.key").write_bytes((good / "simulator.key").read_bytes())
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "w"),
                                  "--headless", "--timeout", "5", "--curve-keys", str(wrong)],
                           capture_output=True, text=True, timeout=300)
        assert p.returncode == 2, p.stdout + p.stderr
        assert "CurveZMQ" in p.stdout and "Traceback" not in p.stdout + p.stderr
        # the right keys: the session runs
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "ok"),
                                  "--headless", "--timeout", "30", "--curve-keys", str(good)],
                           capture_output=True, text=True, timeout=600)
        assert p.returncode == 0, p.stdout + p.stderr
        sim.communicate(timeout=120)
    assert json.loads((tmp_path / "ok" / "summary.json").read_text())["completed"]


def test_remote_zeromq_needs_curve_keys():
    from hilrig.bridge.errors import BridgeError
    from hilrig.bridge.transport import ReqTransport, check_address
    with pytest.raises(BridgeError, match="--allow-remote"):
        check_address("tcp://192.0.2.1:47810")
    assert check_address("tcp://192.0.2.1:47810", allow_remote=True)
    with pytest.raises(BridgeError, match="needs CurveZMQ keys"):
        ReqTransport("tcp://192.0.2.1:47810", allow_remote=True)


def test_disconnect_trips_the_peer_lost_watchdog_and_statistics_are_recorded(tmp_path, demo_path):
    scen = _scenario(tmp_path, demo_path)
    address = f"ipc://{tmp_path}/dc.sock"
    sim = serve(scen, address, "--disconnect-after", "300")
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "r"),
                                  "--headless", "--timeout", "2"],
                           capture_output=True, text=True, timeout=600)
        sim_out, _ = sim.communicate(timeout=60)
    assert p.returncode == 1, p.stdout + p.stderr
    assert "disconnected at tick 300" in sim_out
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    # the simulator says STOP unasked in answer to actuation 300: tick 301 is the watchdog tick
    assert s["end_event"] == "bridge peer lost" and s["ticks_run"] == 302
    assert s["trip"]["cause_id"] == "watchdog peer lost" and s["trip"]["tick"] == 301
    assert "disconnecting" in [e for e in s["events"] if e["event"] == "bridge peer lost"][0]["detail"]
    # the watchdog tripped (the first cause), the bridge's end came with it
    oc = s["outcome"]
    assert oc["status"] == "tripped" and oc["first_cause"].startswith("watchdog peer lost")
    assert oc["first_cause_time_s"] == s["trip"]["time_s"] and "bridge peer lost" in oc["then"]
    assert not oc["whole_run"] and oc["end_time_s"] == pytest.approx(302 * s["Ts_s"])
    run = open_run(tmp_path / "r")
    assert json.loads(run.attrs["bridge"])["frames_sent"] == s["bridge"]["frames_sent"]


def test_freeze_on_command_trips_the_staleness_watchdog(tmp_path, demo_path):
    """A fault typed at the stand-in simulator's standard input while it serves (here: freeze)
    acts on the running session: the runtime's staleness watchdog trips."""
    scen = _scenario(tmp_path, demo_path)
    address = f"ipc://{tmp_path}/cmd.sock"
    sim = subprocess.Popen(CLI + ["serve-sim", "--scenario", str(scen), "--bind", address,
                                  "--sessions", "1", "--idle-timeout", "60", "--commands"],
                           stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                           text=True)
    proc = subprocess.Popen(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "r"),
                                   "--headless", "--timeout", "30",
                                   "--set", 'timing.duration="60 s"',
                                   "--set", 'watchdogs.stale_limit="200 ms"'],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    with reaped(sim, proc):
        deadline = time.monotonic() + 120
        while not (tmp_path / "r" / "recording.h5").exists() and time.monotonic() < deadline:
            time.sleep(0.2)
        time.sleep(0.5)
        sim.stdin.write("bogus\ndrop 0.5\nfreeze\n")
        sim.stdin.flush()
        out, err = proc.communicate(timeout=300)
        sim.kill()  # frozen by design: it would wait out its idle timeout
        sim_out, _ = sim.communicate(timeout=120)
    assert proc.returncode == 1, out + err
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert s["trip"]["cause_id"] == "watchdog stale" and s["end_event"] == "bridge stale"
    assert 0 < s["ticks_run"] < 60 / 50e-6
    assert "unknown command 'bogus'" in sim_out
    assert "refused: drop needs a datagram transport" in sim_out
    assert "fault: freezing from tick" in sim_out


@pytest.mark.parametrize("line, expect, field, value", [
    ("freeze", "freezing from tick 42", "freeze_after", 42),
    ("disconnect", "disconnecting at tick 42", "disconnect_after", 42),
    ("drop 0.25", "dropping 25% of frames", "drop", 0.25),
    ("delay 0.002", "delay 0.002 s", "delay_s", 0.002),
    ("corrupt 7", "every 7th frame", "corrupt_every", 7),
    ("drop 1.5", "not a fraction", "drop", 0.0),
    ("delay x", "'x' is not a number", "delay_s", 0.0),
    ("corrupt 0", "not a whole number", "corrupt_every", None),
])
def test_fault_commands_parse_and_apply(line, expect, field, value):
    from hilrig.bridge.standin import Faults, apply_command
    f = Faults()
    assert expect in apply_command(f, line, 42, datagrams=True)
    assert getattr(f, field) == value


def test_scenario_link_freeze_is_applied_by_the_stand_in(tmp_path, demo_path):
    """A link fault in the scenario's [[faults]] (timed): the stand-in simulator reads the same
    scenario and stops answering from that tick; the runtime's staleness watchdog trips."""
    scen = _scenario(tmp_path, demo_path)
    scen.write_text(scen.read_text() + '\n[[faults]]\nkind = "link_freeze"\nstart = "10 ms"\n'
                    '\n[watchdogs]\nstale_limit = "150 ms"\n')
    address = f"ipc://{tmp_path}/lf.sock"
    sim = serve(scen, address)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "r"),
                                  "--headless"], capture_output=True, text=True, timeout=600)
    assert p.returncode == 1, p.stdout + p.stderr
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    # 10 ms at 50 us: the simulator answers actuations up to tick 199, then goes silent
    assert s["trip"]["cause_id"] == "watchdog stale" and s["trip"]["tick"] == 201, s["events"]
    link = [f for f in s["faults"] if f["kind"] == "link_freeze"][0]
    assert link["applies_to"].startswith("the stand-in simulator") and link["active_from_s"] == 0.01


def test_lockstep_applies_the_safe_state_and_the_delay_as_sil_does(tmp_path, demo_path):
    """The stand-in simulator applies the scenario's actuation delay (half a period: the queue and
    the mid-period switch; the demo's cascaded PI trips at once with 1.5) and, once the runtime's output-enable flag drops on a trip, its safe
    state (gate block, and the output contactor 1 ms later): the lockstep recording equals the
    SIL run's bit for bit, through the trip and the collapse that follows."""
    scen = _scenario(tmp_path, demo_path)
    text = scen.read_text().replace("substeps = 4", "substeps = 4\nactuation_delay = 0.5", 1)
    assert "actuation_delay" in text
    scen.write_text(text + '\n[safe_state]\ncontactor_delay = "1 ms"\n'
                    '\n[[faults]]\nkind = "offset"\nsignal = "v_out"\nvalue = "100 V"\n'
                    'start = "20 ms"\n')
    address = f"ipc://{tmp_path}/safe.sock"
    sim = serve(scen, address)
    with reaped(sim):
        p = subprocess.run(CLI + ["run", str(scen), "--bridge", address, "--out", str(tmp_path / "hil"),
                                  "--headless", "--timeout", "60"], capture_output=True, text=True,
                           timeout=600)
        sim.communicate(timeout=120)
    assert p.returncode == 1, p.stdout + p.stderr
    sil = run_scenario(load_scenario(scen), tmp_path / "sil")
    s = sil.summary
    assert s["trip"]["tick"] == 400 and s["safe_state"]["applied"] == "gate_block"
    assert s["actuation_delay_periods"] == 0.5
    a, b = open_run(tmp_path / "hil"), open_run(sil.folder)
    assert a.time.shape == b.time.shape and a.time.shape[0] > 420
    for name in ("v_out", "i_out", "i_L1", "v_C1", "i_L2", "u"):
        assert a.signals[name].tobytes() == b.signals[name].tobytes(), name
    i_l1, i_out = b.signals["i_L1"], b.signals["i_out"]
    assert np.all(i_l1[400:] >= 0.0) and i_l1[-1] == 0.0     # freewheeled and stopped
    assert np.all(i_out[420:] == 0.0) and i_out[419] > 0.0   # the contactor opened at 1 ms
