"""The worked example of docs/plugins.md runs as written, loaded by file path from a scenario."""
import re
from pathlib import Path

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

DOC = Path(__file__).resolve().parents[2] / "docs" / "plugins.md"


def example_files() -> dict[str, str]:
    text = DOC.read_text()
    pat = re.compile(r"<!-- example-file: (\S+) -->\n```\w*\n(.*?)```", re.S)
    return {name: body for name, body in pat.findall(text)}


def test_docs_worked_example_runs(tmp_path):
    files = example_files()
    assert set(files) == {"voltage_pi.py", "example.toml"}
    for name, body in files.items():
        (tmp_path / name).write_text(body)
    sc = load_scenario(tmp_path / "example.toml")
    assert sc.controller.plugin.name == "voltage_pi"
    res = run_scenario(sc, tmp_path / "run")
    s = res.summary
    assert s["completed"] and s["trip"] is None
    run = open_run(res.folder)
    v, t = run.signals["v_out"], run.time
    # bumpless start: the first command is the steady-state one, so v_out holds its start value
    # within a fraction of a volt over the first 10 ms (before the 20 V step at 20 ms)
    assert abs(v[t < 0.01] - 400.0).max() < 0.5
    # after the 400 -> 420 V step the integral action removes the error (end of the run)
    assert abs(v[-1] - 420.0) < 0.05
