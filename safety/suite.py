"""Interlock test suites: cases of (scenario, fault, expected outcome), run and judged.

A suite file (TOML) names a base scenario and lists cases. Each case adds faults, interlocks
and watchdog settings to the base scenario (or overrides its keys) and says what must happen:

- ``expect = "trip"``: the first latched cause must be ``cause`` (a short cause name such as
  ``"v_out above"`` or ``"watchdog stale"``), the trip must come no earlier than the fault and
  within ``within`` (a time or ``"N ticks"``) of it, and with ``hold`` (default true) the safe
  output must be applied and the latch set on every recorded tick from the trip to the end;
- ``expect = "no trip"``: a nuisance case (a load step inside the limits, say): the run must
  complete without any trip.

The latency of a trip is measured from the start of the earliest fault of the case (a
conditional fault: from its trigger; a simulator fault of a bridge case: from its tick) to the
trip, in simulated time; the staleness watchdog's latency is wall time (from the last sample to
the trip), because that is the time it watches.

SIL cases run in parallel worker processes (the loop is compiled once, first); bridge cases
start a stand-in simulator with the case's transport faults and run one at a time, after the
SIL cases, so that the wall-clock watchdogs are not judged on a machine loaded by other cases.

These cases prove what the software interlocks of this tool do in simulation. They are
monitoring functions, not safety-rated functions (IEC 61508, ISO 13849): passing a suite says
nothing about the hardware protection a real installation needs.
"""
from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
import xml.etree.ElementTree as ET
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import tomli_w

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib

from hilrig.runtime.errors import ScenarioError
from hilrig.runtime.outcome import judge as judge_outcome
from hilrig.runtime.recording import dumps_json
from hilrig.runtime.units import parse_quantity

from .interlocks import BIT_LATCHED

CASE_KEYS = {"name", "scenario", "set", "faults", "interlocks", "watchdogs", "expect", "cause",
             "within", "hold", "bridge", "description"}
BRIDGE_KEYS = {"mode", "transport", "simulator", "second_client"}
SIM_FAULT_KEYS = {"drop": float, "delay": float, "jitter": float, "freeze_after": int,
                  "disconnect_after": int, "corrupt_every": int, "fault_seed": int}
EXPECT = ("trip", "no trip")


class SuiteError(ScenarioError):
    """A suite file that cannot be run as written."""


@dataclass
class Case:
    name: str
    text: str                      # the case's whole scenario, as TOML
    scenario_path: str             # the base scenario (plugin files resolve against it)
    expect: str
    cause: str | None = None
    within_s: float | None = None
    within_ticks: int | None = None
    hold: bool = True
    bridge: dict[str, Any] | None = None
    description: str = ""


@dataclass
class Suite:
    path: Path
    title: str
    demo_data: bool
    cases: list[Case]


@dataclass
class CaseResult:
    name: str
    passed: bool
    expect: str
    outcome: str                   # "trip: <cause>" or "no trip" or an error
    cause_id: str | None = None
    trip_tick: int | None = None
    fault_s: float | None = None
    latency_s: float | None = None
    latency_ticks: int | None = None
    latency_clock: str = "simulated"
    reasons: list[str] = field(default_factory=list)
    folder: str = ""
    seconds: float = 0.0


def load_suite(path: str | Path) -> Suite:
    """Read and check a suite file; every case's scenario is validated before anything runs."""
    from hilrig.runtime.scenario import parse_scenario
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SuiteError(f"suite file {str(path)!r} does not exist") from None
    except tomllib.TOMLDecodeError as exc:
        raise SuiteError(f"{path.name}: not valid TOML: {exc}") from None
    for k in raw:
        if k not in ("title", "demo_data", "scenario", "cases", "description"):
            raise SuiteError(f"{path.name}: unknown key {k!r} (allowed: cases, demo_data, "
                             f"description, scenario, title)")
    cases_raw = raw.get("cases")
    if not isinstance(cases_raw, list) or not cases_raw or not all(isinstance(c, dict) for c in cases_raw):
        raise SuiteError(f"{path.name}: needs at least one [[cases]] table")
    cases = []
    names = set()
    for i, c in enumerate(cases_raw):
        where = f"{path.name}: cases[{i}]"
        for k in c:
            if k not in CASE_KEYS:
                raise SuiteError(f"{where}: unknown key {k!r} (allowed: {', '.join(sorted(CASE_KEYS))})")
        name = c.get("name")
        if not isinstance(name, str) or not name.strip():
            raise SuiteError(f"{where}: needs a name")
        if name in names:
            raise SuiteError(f"{where}: the name {name!r} is used twice")
        names.add(name)
        where = f"{path.name}: case {name!r}"
        base = c.get("scenario", raw.get("scenario"))
        if not isinstance(base, str):
            raise SuiteError(f"{where}: no scenario (set 'scenario' at the top or in the case)")
        base_path = (path.parent / base).resolve()
        try:
            base_raw = tomllib.loads(base_path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise SuiteError(f"{where}: scenario {str(base_path)!r} does not exist") from None
        except tomllib.TOMLDecodeError as exc:
            raise SuiteError(f"{where}: scenario {base_path.name} is not valid TOML: {exc}") from None
        merged = _merge(where, base_raw, c)
        # plugin files named relative to the base scenario: make them absolute, so that the
        # case file works from its run folder (and in a stand-in simulator started there)
        for sec in ("plant", "controller", "reference"):
            plug = merged.get(sec, {}).get("plugin") if isinstance(merged.get(sec), dict) else None
            if isinstance(plug, str) and plug.endswith((".py", ".c")) and not Path(plug).is_absolute():
                merged[sec]["plugin"] = str((base_path.parent / plug).resolve())
        text = (f"# interlock test case {name!r} of {path.name}, built from {base_path.name}\n"
                + tomli_w.dumps(merged))
        try:
            parse_scenario(text, name=f"{path.name} [{name}]", path=str(base_path))
        except ScenarioError as exc:
            raise SuiteError(str(exc)) from None
        expect = c.get("expect")
        if expect not in EXPECT:
            raise SuiteError(f"{where}: expect = {expect!r}; write \"trip\" or \"no trip\"")
        cause = c.get("cause")
        if expect == "trip" and cause is not None and not isinstance(cause, str):
            raise SuiteError(f"{where}: cause = {cause!r} is not a cause name such as \"v_out above\"")
        if expect == "no trip" and (cause is not None or "within" in c):
            raise SuiteError(f"{where}: a no-trip case takes no cause or within")
        within_s = within_ticks = None
        if "within" in c:
            w = c["within"]
            m = re.fullmatch(r"\s*(\d+)\s*ticks?\s*", w) if isinstance(w, str) else None
            if m:
                within_ticks = int(m.group(1))
            else:
                try:
                    within_s = parse_quantity(w, "s", where=f"{where}: within")
                except Exception as exc:
                    raise SuiteError(f"{exc}") from None
                if not within_s >= 0:
                    raise SuiteError(f"{where}: within must not be negative")
        hold = c.get("hold", expect == "trip")
        if not isinstance(hold, bool):
            raise SuiteError(f"{where}: hold = {hold!r} is not true or false")
        bridge = c.get("bridge")
        if bridge is not None:
            bridge = _check_bridge(where, bridge)
        cases.append(Case(name=name, text=text, scenario_path=str(base_path), expect=expect,
                          cause=cause, within_s=within_s, within_ticks=within_ticks, hold=hold,
                          bridge=bridge, description=str(c.get("description", ""))))
    return Suite(path=path, title=str(raw.get("title", path.stem)),
                 demo_data=bool(raw.get("demo_data", False)), cases=cases)


def _merge(where: str, base: dict, case: dict) -> dict:
    """The case's scenario: the base with the case's faults and interlocks appended, its
    watchdog settings merged and its ``set`` overrides (dotted keys) applied."""
    out = json.loads(json.dumps(base))  # a deep copy of plain TOML values
    for key in ("faults", "interlocks"):
        extra = case.get(key, [])
        if not isinstance(extra, list) or not all(isinstance(x, dict) for x in extra):
            raise SuiteError(f"{where}: {key} must be a list of tables")
        if extra:
            out[key] = list(out.get(key, [])) + extra
    wd = case.get("watchdogs", {})
    if not isinstance(wd, dict):
        raise SuiteError(f"{where}: watchdogs must be a table")
    if wd:
        out["watchdogs"] = {**out.get("watchdogs", {}), **wd}
    sets = case.get("set", {})
    if not isinstance(sets, dict):
        raise SuiteError(f"{where}: set must be a table of dotted keys, e.g. "
                         f"set = {{ \"timing.duration\" = \"0.2 s\" }}")
    for dotted, value in sets.items():
        node = out
        parts = dotted.split(".")
        for p in parts[:-1]:
            node = node.setdefault(p, {})
            if not isinstance(node, dict):
                raise SuiteError(f"{where}: set {dotted!r}: {p} is not a table")
        node[parts[-1]] = value
    return out


def _check_bridge(where: str, b: Any) -> dict[str, Any]:
    if not isinstance(b, dict):
        raise SuiteError(f"{where}: bridge must be a table, e.g. bridge = {{ mode = "
                         f"\"free-running\", simulator = {{ freeze_after = 200 }} }}")
    for k in b:
        if k not in BRIDGE_KEYS:
            raise SuiteError(f"{where}: bridge: unknown key {k!r} (allowed: {', '.join(sorted(BRIDGE_KEYS))})")
    mode = b.get("mode", "lockstep")
    if mode not in ("lockstep", "free-running"):
        raise SuiteError(f"{where}: bridge mode {mode!r}; modes: lockstep, free-running")
    transport = b.get("transport", "ipc")
    if transport not in ("ipc", "tcp", "udp"):
        raise SuiteError(f"{where}: bridge transport {transport!r}; transports: ipc, tcp, udp")
    sim = b.get("simulator", {})
    if not isinstance(sim, dict):
        raise SuiteError(f"{where}: bridge.simulator must be a table of stand-in simulator faults")
    for k, v in sim.items():
        if k not in SIM_FAULT_KEYS:
            raise SuiteError(f"{where}: bridge.simulator: unknown fault {k!r} "
                             f"(allowed: {', '.join(sorted(SIM_FAULT_KEYS))})")
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise SuiteError(f"{where}: bridge.simulator.{k} = {v!r} is not a number")
    second = b.get("second_client")
    if second is not None:
        from hilrig.runtime.units import parse_quantity
        try:
            second = parse_quantity(second, "s", where=f"{where}: bridge.second_client")
        except ValueError as exc:
            raise SuiteError(str(exc)) from None
        if not (0.0 <= second <= 60.0):
            raise SuiteError(f"{where}: bridge.second_client = {second:g} s is outside [0, 60] s "
                             f"(wall time after the session started)")
    return {"mode": mode, "transport": transport, "simulator": dict(sim),
            "second_client": second}


# ---- running -------------------------------------------------------------------------------

def _slug(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "-", name).strip("-")[:60] or "case"


def _scenario(case: Case):
    from hilrig.runtime.scenario import parse_scenario
    return parse_scenario(case.text, name=f"[{case.name}]", path=case.scenario_path)


def run_case(case: Case, folder: Path) -> CaseResult:
    """Run one case into ``folder`` and judge it."""
    t0 = time.perf_counter()
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "case.toml").write_text(case.text)
    try:
        sc = _scenario(case)
        if case.bridge is None:
            from hilrig.runtime.run import run_scenario
            summary = run_scenario(sc, folder / "run", overwrite=True).summary
            fault_s = _earliest(_first_fault_s(summary), _unit_fault_s(sc))
        else:
            summary, fault_s = _run_bridge_case(case, sc, folder)
        res = judge(case, sc, summary, folder / "run", fault_s)
    except Exception as exc:  # a case that cannot run fails; the suite goes on
        res = CaseResult(name=case.name, passed=False, expect=case.expect,
                         outcome=f"error: {type(exc).__name__}: {exc}",
                         reasons=[f"the case did not run: {exc}"])
    res.folder = str(folder)
    res.seconds = time.perf_counter() - t0
    return res


def _first_fault_s(summary: dict) -> float | None:
    starts = [f["active_from_s"] for f in summary.get("faults", []) if f["active_from_s"] is not None]
    return min(starts) if starts else None


def _unit_fault_s(sc) -> float | None:
    """The earliest fault of a paralleled unit ([[units.faults]]: lost or trip), or None."""
    if getattr(sc, "units", None) is None:
        return None
    starts = [float(f[0]) for f in sc.controller.values.get("faults", [])]
    return min(starts) if starts else None


def _earliest(*times: float | None) -> float | None:
    known = [t for t in times if t is not None]
    return min(known) if known else None


def _commands(sc) -> list[str]:
    """The recorded commands that the safe output sets: the plant's inputs, or for paralleled
    units each unit's command unitK_u (their enable, trip and correction columns are not
    commands)."""
    if getattr(sc, "units", None) is not None:
        return [f"unit{k}_u" for k in range(1, sc.units.count + 1)]
    return [s.name for s in sc.plant.plugin.declaration.inputs] or ["u"]


def _free_port(kind: int) -> int:
    import socket
    with socket.socket(socket.AF_INET, kind) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _run_bridge_case(case: Case, sc, folder: Path) -> tuple[dict, float | None]:
    """Start a stand-in simulator with the case's faults, run the bridge session, stop it."""
    import socket

    from hilrig.bridge.session import run_bridge
    import shutil
    import tempfile
    b = case.bridge
    sock_dir = None
    if b["transport"] == "ipc":
        # a Unix socket path is limited to about 107 bytes: keep it short, outside the run folder
        sock_dir = tempfile.mkdtemp(prefix="hilrig-")
        address = f"ipc://{sock_dir}/sim.sock"
    elif b["transport"] == "tcp":
        address = f"tcp://127.0.0.1:{_free_port(socket.SOCK_STREAM)}"
    else:
        address = f"udp://127.0.0.1:{_free_port(socket.SOCK_DGRAM)}"
    scen = folder / "case.toml"
    cmd = [sys.executable, "-m", "hilrig.runtime.cli", "serve-sim", "--scenario", str(scen),
           "--bind", address, "--mode", b["mode"], "--sessions", "1", "--idle-timeout", "60"]
    flags = {"drop": "--drop", "delay": "--delay", "jitter": "--jitter",
             "freeze_after": "--freeze-after", "disconnect_after": "--disconnect-after",
             "corrupt_every": "--corrupt-every", "fault_seed": "--fault-seed"}
    for k, v in b["simulator"].items():
        cmd += [flags[k], str(v)]
    log = open(folder / "simulator.log", "w")
    sim = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, text=True)
    intruder = None
    try:
        _wait_listening(folder / "simulator.log", sim)
        if b.get("second_client") is not None:
            intruder = _SecondClient(sc, address, folder / "run", b["second_client"])
        res = run_bridge(sc, address, folder / "run", mode=b["mode"], timeout_s=30.0,
                         overwrite=True)
        if intruder is not None:
            res.summary["second_client"] = intruder.result()
    finally:
        if sim.poll() is None:
            try:
                sim.wait(timeout=5)
            except subprocess.TimeoutExpired:
                sim.kill()
                sim.wait(timeout=30)
        log.close()
        if sock_dir:
            shutil.rmtree(sock_dir, ignore_errors=True)
    ticks = [b["simulator"][k] for k in ("freeze_after", "disconnect_after") if k in b["simulator"]]
    starts = [t * sc.Ts for t in ticks]
    if b["simulator"] and not ticks:
        starts.append(0.0)  # drops, delays, corruption: from the start
    # the scenario's own faults, link faults included, and paralleled units' faults
    scheduled = _earliest(_first_fault_s(res.summary), _unit_fault_s(sc))
    if scheduled is not None:
        starts.append(scheduled)
    return res.summary, (min(starts) if starts else None)


class _SecondClient:
    """Another client that sends a valid HELLO to the stand-in ``after_s`` seconds (wall time)
    after the session's recording appeared, and keeps the answer: a session in progress must
    refuse it with ERROR (docs/protocol.md) and go on untouched."""

    def __init__(self, sc, address: str, run_folder: Path, after_s: float):
        import threading
        from hilrig.bridge import protocol as P
        from hilrig.bridge.session import signal_maps
        meas, act = signal_maps(sc)
        self.hello = P.encode(P.Hello(P.PROTOCOL_VERSION, sc.Ts, sc.mode if sc.mode in (
            "lockstep", "free-running") else "lockstep", meas, act, P.map_hash(meas, act)))
        self.address, self.folder, self.after_s = address, Path(run_folder), after_s
        self.answer: Any = None
        self.error: str | None = None
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self) -> None:
        try:
            end = time.monotonic() + 120.0
            while not (self.folder / "recording.h5").exists() and time.monotonic() < end:
                time.sleep(0.01)
            time.sleep(self.after_s)
            self.answer = self._ask()
        except Exception as exc:  # reported by the judge as the case's failure
            self.error = f"{type(exc).__name__}: {exc}"

    def _ask(self):
        import msgpack
        if self.address.startswith("udp://"):
            import socket
            host, port = self.address[len("udp://"):].rsplit(":", 1)
            with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
                s.settimeout(10.0)
                s.sendto(self.hello, (host, int(port)))
                return msgpack.unpackb(s.recv(1 << 17), raw=False)
        import zmq
        ctx = zmq.Context()
        s = ctx.socket(zmq.REQ)
        s.setsockopt(zmq.LINGER, 0)
        try:
            s.connect(self.address)
            s.send(self.hello)
            return msgpack.unpackb(s.recv(), raw=False) if s.poll(10_000) else None
        finally:
            s.close()
            ctx.term()

    def result(self) -> dict[str, Any]:
        self.thread.join(timeout=30.0)
        from hilrig.bridge import protocol as P
        a = self.answer
        refused = isinstance(a, list) and len(a) >= 2 and a[0] == P.ERROR
        return {"answer": None if a is None else repr(a)[:200], "refused": refused,
                "error": self.error}


def _wait_listening(log_path: Path, proc, limit_s: float = 120.0) -> None:
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        if "listening on" in log_path.read_text():
            return
        if proc.poll() is not None:
            raise RuntimeError(f"the stand-in simulator exited: {log_path.read_text()[-500:]}")
        time.sleep(0.05)
    raise RuntimeError(f"the stand-in simulator did not start within {limit_s:g} s")


def judge(case: Case, sc, summary: dict, run_folder: Path, fault_s: float | None) -> CaseResult:
    """Compare a run's summary and recording with what the case expects."""
    trip = summary.get("trip")
    res = CaseResult(name=case.name, passed=True, expect=case.expect,
                     outcome=f"trip: {trip['cause_id']}" if trip else "no trip", fault_s=fault_s)
    why = res.reasons
    second = summary.get("second_client")
    if second is not None and not second.get("refused"):
        why.append(f"a second client's HELLO during the session was not refused with ERROR "
                   f"(answer {second.get('answer')}, {second.get('error') or 'no error'})")
    if case.expect == "no trip":
        if trip:
            why.append(f"tripped on {trip['cause']} at t = {trip['time_s']:.6g} s")
        elif not summary.get("completed"):
            why.append(f"no trip, but the run ended early: {judge_outcome(summary)['text']}")
        res.passed = not why
        return res
    if not trip:
        why.append(f"no trip (run {judge_outcome(summary)['text']})")
        res.passed = False
        return res
    res.cause_id = trip["cause_id"]
    res.trip_tick = int(trip["tick"])
    if case.cause is not None and trip["cause_id"] != case.cause:
        why.append(f"first cause {trip['cause_id']!r}, expected {case.cause!r}")
    if fault_s is not None:
        res.latency_s = trip["time_s"] - fault_s
        res.latency_ticks = int(round(res.latency_s / sc.Ts))
        stale = [e for e in summary.get("events", []) if e.get("event") == "bridge stale"
                 and "detected_after_s" in e]
        if trip["cause_id"] == "watchdog stale" and stale:
            res.latency_s = float(stale[0]["detected_after_s"])
            res.latency_clock = "wall"
        if res.latency_ticks < 0:
            why.append(f"tripped {-res.latency_ticks} ticks before the fault: a nuisance trip")
        if case.within_ticks is not None and res.latency_ticks > case.within_ticks:
            why.append(f"tripped {res.latency_ticks} ticks after the fault; limit {case.within_ticks}")
        if case.within_s is not None and res.latency_s > case.within_s * (1 + 1e-9):
            why.append(f"tripped {res.latency_s * 1e3:.4g} ms after the fault; limit "
                       f"{case.within_s * 1e3:.4g} ms")
    elif case.within_s is not None or case.within_ticks is not None:
        why.append("the case has no fault to measure the latency from")
    if case.hold:
        why.extend(_hold_problems(sc, run_folder, res.trip_tick))
    res.passed = not why
    return res


def _hold_problems(sc, run_folder: Path, k: int) -> list[str]:
    """The safe output and the latch on every recorded tick from the trip to the end."""
    from hilrig.runtime.recording import open_run
    run = open_run(run_folder)
    names = _commands(sc)
    word = run.signals["interlock_word"][k:].astype(np.int64)
    out = []
    if word.size == 0:
        return ["the trip tick is not in the recording"]
    if not np.all((word >> BIT_LATCHED) & 1):
        first = int(np.argmin((word >> BIT_LATCHED) & 1))
        out.append(f"the latch was cleared at tick {k + first}")
    for n in names:
        u = run.signals[n][k:]
        bad = np.flatnonzero(u != sc.safe_u)
        if bad.size:
            out.append(f"{n} = {u[bad[0]]:g} at tick {k + int(bad[0])}, not the safe {sc.safe_u:g}")
    return out


def run_suite(suite: Suite, out: Path, *, workers: int | None = None,
              progress: Callable[[CaseResult, int, int], None] | None = None) -> list[CaseResult]:
    """Run every case (SIL cases in parallel, then bridge cases one by one)."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    folders = {c.name: out / f"{i:02d}-{_slug(c.name)}" for i, c in enumerate(suite.cases)}
    sil = [c for c in suite.cases if c.bridge is None]
    bridged = [c for c in suite.cases if c.bridge is not None]
    results: dict[str, CaseResult] = {}
    total = len(suite.cases)

    def done(r: CaseResult) -> None:
        results[r.name] = r
        if progress:
            progress(r, len(results), total)

    if sil:
        _warm_up(sil)
        workers = max(1, min(workers or os.cpu_count() or 1, len(sil)))
        if workers == 1:
            for c in sil:
                done(run_case(c, folders[c.name]))
        else:
            import multiprocessing as mp
            from concurrent.futures import ProcessPoolExecutor, as_completed
            methods = mp.get_all_start_methods()
            ctx = mp.get_context("fork" if "fork" in methods else "spawn")
            with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
                futs = [pool.submit(run_case, c, folders[c.name]) for c in sil]
                for f in as_completed(futs):
                    done(f.result())
    for c in bridged:
        done(run_case(c, folders[c.name]))
    ordered = [results[c.name] for c in suite.cases]
    (out / "results.json").write_text(dumps_json({
        "suite": str(suite.path), "title": suite.title, "demo_data": suite.demo_data,
        "passed": sum(r.passed for r in ordered), "failed": sum(not r.passed for r in ordered),
        "cases": [asdict(r) for r in ordered]}, indent=2) + "\n")
    return ordered


def _warm_up(cases: list[Case]) -> None:
    """Compile (or load) each plugin combination once in this process: forked workers inherit
    it, and workers never compile the same loop side by side."""
    from hilrig.runtime.run import _call, compile_loop, first_call, prepare
    seen = set()
    for c in cases:
        sc = _scenario(c)
        key = (sc.plant.plugin.origin, sc.controller.plugin.origin, sc.reference.plugin.origin)
        if key in seen:
            continue
        seen.add(key)
        fn, _, _ = compile_loop(sc)
        prep = prepare(sc)
        first_call(sc, lambda: _call(fn, 0, 0, np.zeros((1, len(prep.signals))), prep.args))


def junit_xml(suite: Suite, results: list[CaseResult]) -> str:
    """The results as JUnit XML (one testsuite, a testcase per case)."""
    ts = ET.Element("testsuite", name=suite.title, tests=str(len(results)),
                    failures=str(sum(not r.passed for r in results)), errors="0",
                    time=f"{sum(r.seconds for r in results):.3f}")
    for r in results:
        tc = ET.SubElement(ts, "testcase", classname=f"hilrig.interlock.{_slug(suite.path.stem)}",
                           name=r.name, time=f"{r.seconds:.3f}")
        props = ET.SubElement(tc, "properties")
        for k, v in (("expect", r.expect), ("outcome", r.outcome),
                     ("latency_s", "" if r.latency_s is None else repr(r.latency_s)),
                     ("latency_ticks", "" if r.latency_ticks is None else str(r.latency_ticks)),
                     ("latency_clock", r.latency_clock), ("folder", r.folder)):
            ET.SubElement(props, "property", name=k, value=v)
        if not r.passed:
            f = ET.SubElement(tc, "failure", message="; ".join(r.reasons)[:500], type="interlock")
            f.text = "\n".join(r.reasons)
    ET.indent(ts)
    return '<?xml version="1.0" encoding="utf-8"?>\n' + ET.tostring(ts, encoding="unicode") + "\n"


def latency_text(r: CaseResult) -> str:
    if r.latency_s is None:
        return "-"
    if r.latency_clock == "wall":
        return f"{r.latency_s * 1e3:.1f} ms (wall)"
    return f"{r.latency_s * 1e3:.3g} ms ({r.latency_ticks} ticks)"


__all__ = ["Case", "CaseResult", "Suite", "SuiteError", "judge", "junit_xml", "latency_text",
           "load_suite", "run_case", "run_suite"]
