"""Lab reports and MDF4 export. The report of a run that tripped names the trip, lists the
events and the metrics, and embeds readable PNG plots (PNG signature per the PNG
specification, ISO/IEC 15948, from memory); a paced run's report adds the timing histogram.
The MDF4 file is read back with asammdf, the reference reader of the format, and must hold
every signal bit for bit with its unit."""
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.errors import RecordingError
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import parse_scenario

CLI = [sys.executable, "-m", "hilrig.runtime.cli"]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _demo_with_fault(demo_path, tmp_path_factory, fault: str, name: str) -> Path:
    """The demo shortened to 0.3 s with one [[faults]] entry (``fault``: its keys); its folder."""
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "0.3 s"')
    text += f'\n[[faults]]\n{fault}start = "0.2 s"\n'
    sc = parse_scenario(text, name=f"{name}.toml")
    return run_scenario(sc, tmp_path_factory.mktemp(name) / "r").folder


@pytest.fixture(scope="module")
def tripped_run(demo_path, tmp_path_factory):
    return _demo_with_fault(demo_path, tmp_path_factory,
                            'kind = "offset"\nsignal = "v_out"\nvalue = "100 V"\n', "report")


def test_report_md_has_outcome_metrics_events_plots_scenario(tripped_run):
    p = subprocess.run(CLI + ["report", str(tripped_run)], capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stdout + p.stderr
    md = (tripped_run / "report.md").read_text()
    for part in ("# Run report:", "**Demo data**", "not safety-rated", "## Outcome",
                 "## Tracking metrics", "## Interlock and watchdog events", "## Plots",
                 "## Timing", "## Versions", "## Scenario", "```toml"):
        assert part in md, part
    assert "interlock v_out > 480 V at t = 0.2 s" in md
    # an 800 V scenario: the hazard's signal word is WARNING (death or serious injury; ANSI
    # Z535.4 / ISO 3864-2, from memory), not CAUTION (minor or moderate injury)
    assert "> **WARNING: HAZARDOUS VOLTAGE.** This scenario configures voltages above 60 V DC" in md
    assert "Caution" not in md and "CAUTION" not in md
    assert "| status | tripped |" in md and "| outcome | tripped at 200 ms: interlock v_out > 480 V, value " in md
    assert "| 4000 | 0.2 | trip | interlock v_out > 480 V |" in md
    assert "offset on v_out: active from 0.2 s" in md
    png = tripped_run / "report" / "overview.png"
    assert png.read_bytes()[:8] == PNG_MAGIC
    assert "](report/overview.png)" in md
    assert "no timing histogram" in md  # a SIL run has no per-tick wall clock
    assert "## Reference segments" in md and "| # | t_start_s | t_end_s |" in md


def test_paced_report_has_the_timing_histogram(demo_path, tmp_path):
    from hilrig.runtime.live.paced import run_paced
    from hilrig.runtime.trials.report import write_report
    from hilrig.runtime.scenario import load_scenario
    res = run_paced(load_scenario(demo_path, overrides={"timing.duration": 0.1}), tmp_path / "r")
    md = write_report(open_run(res.folder)).read_text()
    assert "](report/timing.png)" in md and "paced late_ticks" in md
    assert (res.folder / "report" / "timing.png").read_bytes()[:8] == PNG_MAGIC


def test_report_of_an_unfinished_run_is_refused(tmp_path, tripped_run):
    import shutil
    broken = tmp_path / "b"
    shutil.copytree(tripped_run, broken)
    (broken / "summary.json").unlink()
    (broken / "report.md").unlink(missing_ok=True)
    p = subprocess.run(CLI + ["report", str(broken)], capture_output=True, text=True, timeout=300)
    assert p.returncode == 2 and "did not finish" in p.stdout
    assert not (broken / "report.md").exists()


def test_mf4_export_reads_back_bit_for_bit_with_asammdf(tripped_run, tmp_path):
    asammdf = pytest.importorskip("asammdf")
    dest = tmp_path / "run.mf4"
    p = subprocess.run(CLI + ["export", str(tripped_run), "--mf4", "--out", str(dest)],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stdout + p.stderr
    run = open_run(tripped_run)
    with asammdf.MDF(dest) as mdf:
        assert mdf.version.startswith("4.")
        for name, v in run.signals.items():
            sig = mdf.get(name)
            assert np.array_equal(sig.samples, v, equal_nan=True), name
            assert np.array_equal(sig.timestamps, run.time), name
            assert sig.unit == run.units[name], name


def test_mf4_export_without_asammdf_says_how_to_get_it(tripped_run, tmp_path, monkeypatch):
    from hilrig.runtime.trials.report import export_mdf4
    monkeypatch.setitem(sys.modules, "asammdf", None)  # makes "import asammdf" fail
    with pytest.raises(RecordingError, match=r"pip install 'hilrig\[mdf\]'"):
        export_mdf4(open_run(tripped_run), tmp_path / "x.mf4")
    assert not (tmp_path / "x.mf4").exists()


@pytest.fixture(scope="module")
def dropout_run(demo_path, tmp_path_factory):
    """The demo with a v_out sensor dropout (NaN) at 0.2 s: the trip's value has no finite value."""
    return _demo_with_fault(demo_path, tmp_path_factory, 'kind = "dropout"\nsignal = "v_out"\n',
                            "dropout")


def _strict_loads(text: str):
    # RFC 8259, section 6: no NaN or Infinity in JSON
    import json

    def refuse(token):
        raise ValueError(f"not JSON (RFC 8259, sec. 6): {token}")
    return json.loads(text, parse_constant=refuse)


def test_report_and_report_json_of_a_run_with_null_values(dropout_run, tmp_path):
    """summary.json has null where a value is not finite (the trip's NaN, and here a metric set
    to null as a run with no finite sample would have it): the report, its summary table and
    --json all still work, showing n/a."""
    import json
    import shutil
    folder = tmp_path / "r"
    shutil.copytree(dropout_run, folder)
    s = _strict_loads((folder / "summary.json").read_text())
    assert s["trip"]["value"] is None
    for k in ("rms_error_V", "max_abs_error_V", "time_of_max_abs_error_s", "v_out_min_V"):
        s["metrics"][k] = None
    (folder / "summary.json").write_text(json.dumps(s, indent=2))
    import os
    wide = {**os.environ, "COLUMNS": "200"}       # rich: one table row per line
    p = subprocess.run(CLI + ["report", str(folder)], capture_output=True, text=True,
                       timeout=300, env=wide)
    assert p.returncode == 0, p.stdout + p.stderr
    assert "value n/a" in p.stdout and "n/a .. " in p.stdout
    md = (folder / "report.md").read_text()
    assert "non-finite value of v_out at t = 0.2 s (tick 4000), value n/a" in md
    assert "| rms_error_V | n/a |" in md
    assert "| 4000 | 0.2 | trip | non-finite value of v_out | n/a |" in md
    p = subprocess.run(CLI + ["report", str(folder), "--json"], capture_output=True, text=True,
                       timeout=300)
    assert p.returncode == 0, p.stdout + p.stderr
    assert _strict_loads(p.stdout)["metrics"]["rms_error_V"] is None
