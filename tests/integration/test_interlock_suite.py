"""`hilrig interlock-test`: the shipped example suite passes case by case, its JUnit XML is
well-formed, a case whose expectation is wrong fails with its reason and a non-zero exit, and a
malformed suite is one clear error. Trip semantics (first tick beyond the limit, safe output on
that tick, latched until a reset) are common practice, no source; JUnit XML is read with the
standard library's xml.etree parser."""
import json
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
SUITE = ROOT / "examples" / "interlock_suite.toml"


@pytest.fixture(scope="module")
def shipped(tmp_path_factory):
    out = tmp_path_factory.mktemp("suite")
    p = subprocess.run(CLI + ["interlock-test", str(SUITE), "--out", str(out / "r"),
                              "--junit", str(out / "junit.xml"), "--headless"],
                       capture_output=True, text=True, timeout=900)
    return p, out


def test_shipped_suite_passes_every_case(shipped):
    p, out = shipped
    assert p.returncode == 0, p.stdout[-4000:] + p.stderr[-2000:]
    res = json.loads((out / "r" / "results.json").read_text())
    assert res["failed"] == 0 and res["passed"] == len(res["cases"]) >= 18
    assert "not safety-rated" in p.stdout


def test_shipped_suite_covers_every_interlock_kind_and_watchdog(shipped):
    _, out = shipped
    res = json.loads((out / "r" / "results.json").read_text())
    causes = {c["cause_id"] for c in res["cases"] if c["cause_id"]}
    for needed in ("v_out above", "v_out below", "i_L1 above", "i_out above", "p_out above",
                   "dv_out_dt magnitude_above", "v_out frozen", "v_out cross_check", "u above",
                   "non-finite v_out",
                   "non-finite u", "watchdog overrun", "watchdog stale", "watchdog peer lost",
                   "watchdog sequence gap", "watchdog protocol error"):
        assert needed in causes, needed
    assert sum(c["expect"] == "no trip" for c in res["cases"]) >= 2
    # the bridge's second-client case: another client's HELLO mid-run refused, no trip
    assert any("second client" in c["name"] and c["passed"] for c in res["cases"])


def test_latencies_are_measured_from_the_fault(shipped):
    _, out = shipped
    cases = {c["name"]: c for c in json.loads((out / "r" / "results.json").read_text())["cases"]}
    # a limit on a measured value trips on the fault's own tick
    assert cases["over-voltage: v_out sensor reads 100 V high"]["latency_ticks"] == 0
    # a stuck v_out while the command sits at V_dc: the frozen check's 41st frozen tick is 40
    # ticks after the fault's (every tick from the fault's own counts)
    sat = "frozen measurement under saturation: v_out sensor stuck as the reference steps 100 V"
    assert cases[sat]["latency_ticks"] == 40
    # three ticks of forced overrun against a 3-tick watchdog: each tick's overrun is known
    # when it is over, so the third trips one tick after it, 3 ticks after the fault's start
    assert cases["overrun watchdog: 200 us compute for 3 ticks against a 40 us budget"]["latency_ticks"] == 3
    # the staleness watchdog is judged on the wall clock, from the last sample: at its limit
    stale = cases["staleness watchdog: the simulator freezes (lockstep, ipc)"]
    assert stale["latency_clock"] == "wall" and 0.1 <= stale["latency_s"] < 0.25
    # corruption acts from the start; the 300th reply is the sample of tick 298 (2 handshake
    # replies before it), and that tick trips
    bad = cases["protocol-error watchdog: the simulator mangles its 300th reply (lockstep, ipc)"]
    assert bad["latency_ticks"] == 298


def test_junit_xml_has_one_testcase_per_case_and_no_failures(shipped):
    _, out = shipped
    root = ET.parse(out / "junit.xml").getroot()
    assert root.tag == "testsuite" and root.get("failures") == "0"
    cases = root.findall("testcase")
    assert len(cases) == int(root.get("tests")) >= 18
    assert not root.findall(".//failure")
    props = {p.get("name"): p.get("value") for p in cases[0].find("properties")}
    assert props["expect"] == "trip" and props["outcome"] == "trip: v_out above"


def _strict_loads(text: str):
    # RFC 8259, section 6: JSON numbers have no NaN or Infinity
    def refuse(token):
        raise ValueError(f"not JSON (RFC 8259, sec. 6): {token}")
    return json.loads(text, parse_constant=refuse)


def test_results_and_every_case_summary_are_strict_json(shipped):
    """The dropout and non-finite-command cases trip on a NaN: their summaries hold null there,
    and no case's summary, events or the suite's results.json has a NaN or Infinity token."""
    import h5py
    _, out = shipped
    res = _strict_loads((out / "r" / "results.json").read_text())
    folders = [Path(c["folder"]) for c in res["cases"]]
    assert len(folders) == len(res["cases"]) >= 18
    nulls = 0
    for folder in folders:
        run = folder / "run"
        s = _strict_loads((run / "summary.json").read_text())
        with h5py.File(run / "recording.h5", "r") as f:
            _strict_loads(f.attrs["events"])
        nulls += bool(s["trip"]) and s["trip"].get("value", 0.0) is None
    assert nulls >= 3          # the two dropout cases and the non-finite command


def _suite(tmp_path, body: str) -> Path:
    base = ROOT / "examples" / "interlock_base.toml"
    f = tmp_path / "suite.toml"
    f.write_text(f'title = "test suite (test data)"\nscenario = "{base}"\n' + body)
    return f


def test_a_wrong_expectation_fails_with_its_reason_and_exit_one(tmp_path):
    f = _suite(tmp_path, '''
[[cases]]
name = "expects the wrong cause"
set = { "timing.duration" = "0.12 s" }
faults = [{ kind = "offset", signal = "v_out", value = "100 V", start = "0.1 s" }]
expect = "trip"
cause = "i_L1 above"

[[cases]]
name = "expects no trip but trips"
set = { "timing.duration" = "0.12 s" }
faults = [{ kind = "dropout", signal = "v_out", start = "0.1 s" }]
expect = "no trip"
''')
    p = subprocess.run(CLI + ["interlock-test", str(f), "--out", str(tmp_path / "r"),
                              "--junit", str(tmp_path / "j.xml"), "--headless", "--workers", "1"],
                       capture_output=True, text=True, timeout=600)
    assert p.returncode == 1, p.stdout + p.stderr
    assert "0 passed, 2 failed" in p.stdout
    root = ET.parse(tmp_path / "j.xml").getroot()
    fails = root.findall(".//failure")
    assert len(fails) == 2
    assert "first cause 'v_out above', expected 'i_L1 above'" in fails[0].get("message")
    assert "tripped on non-finite value of v_out" in fails[1].get("message")


@pytest.mark.parametrize("body, message", [
    ("", "needs at least one [[cases]]"),
    ('[[cases]]\nname = "a"\nexpect = "maybe"\n', "write \"trip\" or \"no trip\""),
    ('[[cases]]\nname = "a"\nexpect = "trip"\nfaults = [{ kind = "ofset", signal = "v_out", start = 0.1, value = 1 }]\n',
     "did you mean 'offset'"),
    ('[[cases]]\nname = "a"\nexpect = "trip"\nbogus = 1\n', "unknown key 'bogus'"),
    ('[[cases]]\nname = "a"\nexpect = "no trip"\ncause = "v_out above"\n', "no-trip case takes no cause"),
    ('[[cases]]\nname = "a"\nexpect = "trip"\nbridge = { mode = "sideways" }\n', "bridge mode 'sideways'"),
    ('[[cases]]\nname = "a"\nexpect = "no trip"\nbridge = { second_client = "120 s" }\n',
     "bridge.second_client = 120 s is outside [0, 60] s"),
    ('[[cases]]\nname = "a"\nexpect = "trip"\n[[cases]]\nname = "a"\nexpect = "trip"\n', "used twice"),
    # a no-trip case whose fault starts after its (shortened) run would pass without any fault
    ('[[cases]]\nname = "a"\nexpect = "no trip"\nset = { "timing.duration" = "0.1 s" }\n'
     'faults = [{ kind = "power_step", value = "60 kW", start = "0.15 s" }]\n',
     "faults[0].start = 0.15 s is after the run's last tick"),
])
def test_malformed_suite_is_one_clear_error(tmp_path, body, message):
    f = _suite(tmp_path, body)
    p = subprocess.run(CLI + ["interlock-test", str(f), "--out", str(tmp_path / "r"), "--headless"],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 2, p.stdout + p.stderr
    assert message in p.stdout and "Traceback" not in p.stdout + p.stderr
    assert not (tmp_path / "r").exists()


def test_a_second_client_that_is_not_refused_fails_its_case():
    """The judge of a bridge case with a second client: the case fails unless that client's
    HELLO was refused with ERROR, whatever the run did (a session replaced by an intruder is a
    failed proof, even if no interlock tripped)."""
    from hilrig.safety.suite import Case, judge
    case = Case(name="x", text="", scenario_path="", expect="no trip",
                bridge={"second_client": 0.1})
    summary = {"trip": None, "completed": True, "end_event": None, "events": [],
               "second_client": {"refused": False, "answer": "[2, ...]", "error": None}}
    res = judge(case, None, summary, Path("."), None)
    assert not res.passed and "not refused with ERROR" in res.reasons[0], res.reasons
    summary["second_client"] = {"refused": True, "answer": "[7, 6, ...]", "error": None}
    assert judge(case, None, summary, Path("."), None).passed
