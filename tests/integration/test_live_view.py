"""The live view: a paced run in tmux (a real terminal, 80 x 24) starts its viewer by itself;
the screen shows the panels and the high-voltage caution; a reset pressed while the trip's
cause persists is refused, one pressed after it is gone is accepted; the run ends by itself.
And a plain-text viewer survives the runtime going away and says so.

Trip and reset semantics: common practice, no source (ISO 13849-1 5.2.2.3 asks for a separate,
intended reset, from memory). Screen contents are read with tmux capture-pane."""
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
#: these tests are about the live view: a paced run here is judged against limits no shared
#: machine breaches (the timing verdict and its exit status 3 are tested in test_paced.py)
GENEROUS_PACED = '\n[paced]\nmiss_share_max = 1.0\nmax_lateness = "10 s"\n'


def _live_scenario(demo_path: str, folder: Path) -> Path:
    """Test data: the demo's emulator into a 4 ohm resistive load for 6 s; the v_out sensor
    drops out (NaN) from 1.0 s to 2.5 s; the safe output holds 400 V so the run goes on
    after the trip."""
    s = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "6 s"')
    i, j = s.index("[load]"), s.index("[limits]")
    s = s[:i] + '[load]\n[[load.points]]\nt = "0 s"\nR = "4 ohm"\n\n' + s[j:]
    s = s.replace('v_collapse = "25 V"', 'v_collapse = "25 V"\nsafe_u = "400 V"')
    s = s[:s.index("[[interlocks]]")]
    s += ('[[interlocks]]\nsignal = "v_out"\nabove = "480 V"\n\n'
          '[[faults]]\nkind = "dropout"\nsignal = "v_out"\nstart = "1 s"\nend = "2.5 s"\n')
    # the safe output is a held command (zero_voltage action at safe_u), not a gate block
    s += '\n[safe_state]\naction = "zero_voltage"\n'
    f = folder / "live.toml"
    f.write_text(s + GENEROUS_PACED)
    return f


def _pane(session: str) -> str:
    return subprocess.run(["tmux", "capture-pane", "-p", "-t", session], capture_output=True,
                          text=True, timeout=30).stdout


def _wait_for(session: str, pred, limit_s: float, what: str) -> str:
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        text = _pane(session)
        if pred(text):
            return text
        time.sleep(0.2)
    raise AssertionError(f"timed out waiting for {what}; the screen:\n{_pane(session)}")


def _sim_time(text: str) -> float:
    m = re.search(r"t = ([0-9.]+) s of", text)
    return float(m.group(1)) if m else -1.0


@pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux is not installed")
def test_live_view_in_a_terminal_refuses_then_accepts_a_reset(tmp_path, demo_path):
    scen = _live_scenario(demo_path, tmp_path)
    session = f"hilrig-test-{os.getpid()}"
    cache = os.environ["HILRIG_CACHE_DIR"]
    cmd = (f"cd {tmp_path} && HILRIG_CACHE_DIR={cache} {' '.join(CLI)} run {scen} --paced "
           f"--out {tmp_path / 'r'}; echo EXIT=$?; sleep 120")
    subprocess.run(["tmux", "new-session", "-d", "-s", session, "-x", "80", "-y", "24", cmd],
                   check=True, timeout=30)
    try:
        screen = _wait_for(session, lambda t: "TRIPPED" in t, 300, "the trip")
        for panel in ("hilrig live view", "signals", "protection", "timing", "WARNING",
                      "not safety-rated", "keys:", "v_out (o) and reference (.)"):
            assert panel in screen, (panel, screen)
        assert "non-finite value of v_out" in screen
        assert all(len(line) <= 80 for line in screen.splitlines())
        # the sensor is still out: the reset is refused, with the reason on the screen
        subprocess.run(["tmux", "send-keys", "-t", session, "r"], check=True, timeout=30)
        _wait_for(session, lambda t: "reset refused" in t and "still holds" in t, 20,
                  "the refused reset")
        # after 2.5 s the measurement is back: the reset is accepted and the trip clears
        _wait_for(session, lambda t: _sim_time(t) > 2.8, 60, "t > 2.8 s")
        subprocess.run(["tmux", "send-keys", "-t", session, "r"], check=True, timeout=30)
        _wait_for(session, lambda t: "reset accepted" in t or "armed, no trip" in t, 20,
                  "the accepted reset")
        # the run ends by itself; the viewer closes and the summary follows
        # (a run that tripped, even if reset, did not complete: exit status 1)
        _wait_for(session, lambda t: "EXIT=1" in t, 120, "the end of the run")
    finally:
        subprocess.run(["tmux", "kill-session", "-t", session], timeout=30)
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    kinds = [e["event"] for e in s["events"]]
    assert "trip" in kinds and "reset refused" in kinds and "reset accepted" in kinds
    assert kinds.index("reset refused") < kinds.index("reset accepted")
    assert s["completed"] and s["mode"] == "paced"


def test_plain_viewer_says_when_the_runtime_is_gone(tmp_path, demo_path):
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "600 s"')
    scen = tmp_path / "long.toml"
    scen.write_text(text)
    run = subprocess.Popen(CLI + ["run", str(scen), "--paced", "--telemetry", address,
                                  "--out", str(tmp_path / "r"), "--headless"],
                           stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    viewer = subprocess.Popen(CLI + ["watch", address, "--plain", "--give-up", "8"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        # wait until the viewer shows frames, then kill the runtime without warning
        deadline = time.monotonic() + 240
        lines = []
        while time.monotonic() < deadline:
            line = viewer.stdout.readline()
            lines.append(line)
            if "protection" in line:
                break
        assert any("protection" in x for x in lines), lines
        run.send_signal(signal.SIGKILL)
        run.wait(timeout=60)
        out, err = viewer.communicate(timeout=120)
    finally:
        for p in (run, viewer):
            if p.poll() is None:
                p.kill()
                p.communicate(timeout=60)
    assert "the runtime is gone" in out
    assert "giving up" in out  # it kept waiting until its own limit, then closed in order
    assert viewer.returncode == 0 and "Traceback" not in err


def _free_port() -> int:
    import socket
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    return port


@pytest.mark.parametrize("mode", ["sil", "paced"])
def test_stop_command_ends_the_run_in_order(tmp_path, demo_path, mode):
    """A viewer's stop: one more tick with the safe output latched ("stop requested"), then
    the run ends with the recording closed."""
    import zmq
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "600 s"')
    scen = tmp_path / "long.toml"
    scen.write_text(text + GENEROUS_PACED)
    args = CLI + ["run", str(scen), "--telemetry", address, "--out", str(tmp_path / "r"),
                  "--headless"] + (["--paced"] if mode == "paced" else [])
    run = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    ctx = zmq.Context.instance()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.connect(address)
    push = ctx.socket(zmq.PUSH)
    push.setsockopt(zmq.LINGER, 0)
    push.connect(f"tcp://127.0.0.1:{port + 1}")
    import msgpack
    try:
        # the first frames can come before the first tick (a paced run's real-time requests
        # take a while): a stop then ends the run at tick 0; wait for a frame with ticks run
        frame = None
        deadline = time.monotonic() + 240
        while time.monotonic() < deadline:
            if sub.poll(1000):
                frame = msgpack.unpackb(sub.recv(), raw=False)
                if frame["tick"] > 0:
                    break
        assert frame and frame["tick"] > 0, frame or "no telemetry"
        push.send(b"stop")
        out, err = run.communicate(timeout=120)
    finally:
        sub.close(0)
        push.close(0)
        if run.poll() is None:
            run.kill()
            run.communicate(timeout=60)
    assert run.returncode == 1, out + err
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert s["end_event"] == "stopped by the operator", s["events"]
    assert s["trip"]["cause_id"] == "stop requested"
    # the stop's own trip is the operator's, not a fault
    assert s["outcome"]["status"] == "stopped" and s["outcome"]["first_cause"] == "stopped by the operator"
    from hilrig.runtime.recording import open_run
    rec = open_run(tmp_path / "r")
    assert rec.attrs["complete"] and rec.time.shape[0] == s["ticks_run"]
    assert rec.signals["u"][-1] == 0.0 and rec.signals["u"][-2] > 0.0


def test_bridge_run_publishes_link_statistics_and_obeys_stop(tmp_path, demo_path):
    """A lockstep bridge run with --telemetry: frames carry the link statistics, and a stop
    ends the run in order (safe output on the last tick, the simulator told to stop)."""
    import msgpack
    import zmq
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "600 s"')
    scen = tmp_path / "long.toml"
    scen.write_text(text)
    sim_addr = f"ipc://{tmp_path}/sim.sock"
    sim = subprocess.Popen(CLI + ["serve-sim", "--scenario", str(scen), "--bind", sim_addr,
                                  "--sessions", "1", "--idle-timeout", "120"],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    run = subprocess.Popen(CLI + ["run", str(scen), "--bridge", sim_addr, "--telemetry", address,
                                  "--out", str(tmp_path / "r"), "--headless", "--timeout", "30"],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    ctx = zmq.Context.instance()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.connect(address)
    push = ctx.socket(zmq.PUSH)
    push.setsockopt(zmq.LINGER, 0)
    push.connect(f"tcp://127.0.0.1:{port + 1}")
    try:
        frame = None
        deadline = time.monotonic() + 240
        while time.monotonic() < deadline:
            if sub.poll(1000):
                frame = msgpack.unpackb(sub.recv(), raw=False)
                if frame["bridge"] and frame["bridge"]["frames_sent"] > 0:
                    break
        assert frame and frame["bridge"]["frames_sent"] > 0, frame
        assert frame["mode"] == "lockstep" and frame["caution"]
        push.send(b"stop")
        out, err = run.communicate(timeout=120)
        sim_out, _ = sim.communicate(timeout=120)
    finally:
        sub.close(0)
        push.close(0)
        for p in (run, sim):
            if p.poll() is None:
                p.kill()
                p.communicate(timeout=60)
    assert run.returncode == 1, out + err
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert s["end_event"] == "stopped by the operator" and s["trip"]["cause_id"] == "stop requested"
    assert "session 1 ended" in sim_out       # the simulator got its orderly STOP


def test_view_renders_in_80_columns_and_freezes_the_trace():
    from rich.console import Console

    from hilrig.runtime.live.watch import View
    v = View()
    frame = {"v": 1, "title": "t (test data)", "mode": "sil", "demo_data": False, "caution": "x",
             "tick": 100, "n_total": 1000, "t": 0.005, "wall": 0.1,
             "values": {"v_out": [500.0, "V"], "v_ref": [400.0, "V"]},
             "limits": [["v_out", "above", 480.0, "V"]], "word": (1 << 50) | (1 << 41),
             "latched": True, "cause": "interlock v_out > 480 V", "trip_t": 0.004,
             "events": [[80, "trip: interlock v_out > 480 V"]],
             "trace": {"t": [0.0, 0.001, 0.002], "v_out": [400.0, 450.0, 500.0],
                       "v_ref": [400.0, 400.0, 400.0]},
             "timing": {"ticks_per_s": 1e6, "lateness_p99_us": None, "late_ticks": None,
                        "compute_p99_us": None}, "bridge": None, "ended": False, "end_event": None}
    v.frame = frame
    console = Console(width=80, record=True, force_terminal=False)
    console.print(v.render(80))
    text = console.export_text()
    assert all(len(line) <= 80 for line in text.splitlines())
    for part in ("TRIPPED", "interlock v_out > 480 V", "watchdog: stale", "WARNING", "##########"):
        assert part in text, part
    v.frozen_trace = frame["trace"]
    frame2 = dict(frame, trace={"t": [0.0, 0.001], "v_out": [1.0, 2.0], "v_ref": [1.0, 2.0]})
    v.frame = frame2
    console = Console(width=80, record=True, force_terminal=False)
    console.print(v.render(80))
    text = console.export_text()
    assert "FROZEN" in text and "500.0" in text  # still the frozen window's scale


def _styled_segments(renderable, width=80):
    """The (text, style) segments rich draws for a renderable on a 256-colour terminal."""
    import io

    from rich.console import Console
    console = Console(width=width, file=io.StringIO(), force_terminal=True, color_system="256")
    return [(seg.text, seg.style) for seg in console.render(renderable) if seg.text.strip()]


def test_the_trip_line_is_readable_and_the_hazard_notice_is_an_orange_warning():
    """The trip cause must not be drawn in its own background colour; the hazard notice uses the
    signal word WARNING (could result in death or serious injury; ANSI Z535.4 / ISO 3864-2, from
    memory) in the WARNING colour of ANSI Z535, orange (a terminal colour approximates it)."""
    from rich.color import Color

    from hilrig.runtime.live.watch import View
    v = View()
    v.frame = {"v": 1, "title": "t (test data)", "mode": "sil", "demo_data": False,
               "caution": "x", "tick": 100, "n_total": 1000, "t": 0.005, "wall": 0.1,
               "values": {"v_out": [500.0, "V"]}, "limits": [["v_out", "above", 480.0, "V"]],
               "word": 1 << 50, "latched": True, "cause": "interlock v_out > 480 V",
               "trip_t": 0.004, "events": [], "trace": {"t": [], "v_out": [], "v_ref": []},
               "timing": {"ticks_per_s": 1e6, "lateness_p99_us": None, "late_ticks": None,
                          "compute_p99_us": None}, "bridge": None, "ended": False,
               "end_event": None}
    segs = _styled_segments(v.render(80))
    cause = [st for tx, st in segs if "interlock v_out > 480 V" in tx]
    assert cause, segs
    for st in cause:
        assert st.color is not None and st.bgcolor != st.color, st  # readable: not red on red
    word = [st for tx, st in segs if tx.strip() == "WARNING"]
    assert word, segs
    orange = Color.parse("dark_orange")  # 256-colour palette 208, #ff8700
    assert word[0].bgcolor == orange and word[0].bold, word[0]
    assert not any("CAUTION" in tx for tx, _ in segs)
    rest = [st for tx, st in segs if "hazardous voltage" in tx]
    assert rest and rest[0].color == orange
    # a publisher's title with a terminal escape code (ESC [2J clears the screen) is shown as
    # text, never sent raw
    v.frame = dict(v.frame, title="t\x1b[2J (test data)")
    text = "".join(tx for tx, _ in _styled_segments(v.render(80)))
    assert "\x1b[2J" not in text and "t\\x1b[2J (test data)" in text


@pytest.mark.parametrize("mode", ["sil", "paced"])
def test_telemetry_address_in_use_is_one_clear_error(tmp_path, demo_path, mode):
    import zmq
    port = _free_port()
    ctx = zmq.Context.instance()
    squat = ctx.socket(zmq.PUB)
    squat.bind(f"tcp://127.0.0.1:{port}")
    try:
        p = subprocess.run(CLI + ["run", demo_path, "--telemetry", f"tcp://127.0.0.1:{port}",
                                  "--out", str(tmp_path / "r"), "--headless"]
                           + (["--paced"] if mode == "paced" else []),
                           capture_output=True, text=True, timeout=300)
    finally:
        squat.close(0)
    assert p.returncode == 2, p.stdout + p.stderr
    assert "telemetry address" in p.stdout and "choose another" in p.stdout
    assert "Traceback" not in p.stdout + p.stderr
    assert not (tmp_path / "r" / "recording.h5").exists()
