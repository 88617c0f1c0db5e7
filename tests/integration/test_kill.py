"""A run killed with SIGKILL leaves a recording that is readable up to its last flushed chunk
(each chunk is written and flushed before the loop goes on)."""
import os
import re
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from hilrig.runtime.recording import open_run


def _start_long_run(tmp_path, demo_path):
    """A 600 s demo run with 50 ms chunks, started headless; returns (process, run folder)
    once its progress lines say 20 000 ticks (1 s) ran (the HDF5 file is locked while it is
    being written, so the tests do not open it before they stop the run)."""
    text = Path(demo_path).read_text().replace('duration = "1.5 s"', 'duration = "600 s"')
    text += '\n[recording]\nchunk = "50 ms"\n'
    scen = tmp_path / "long.toml"
    scen.write_text(text)
    out = tmp_path / "r"
    proc = subprocess.Popen([sys.executable, "-m", "hilrig.runtime.cli", "run", str(scen),
                             "--out", str(out), "--headless"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300
    done = 0
    while time.monotonic() < deadline and done < 20 * 1000:
        ready, _, _ = select.select([proc.stdout], [], [], 1.0)
        if ready:
            m = re.match(r"progress: (\d+)/", proc.stdout.readline())
            if m:
                done = int(m.group(1))
    if done < 20 * 1000:
        proc.kill()
        proc.communicate(timeout=60)
    assert done >= 20 * 1000, "the run did not get going"
    return proc, out


def test_sigkill_mid_run_leaves_a_readable_recording(tmp_path, demo_path):
    proc, out = _start_long_run(tmp_path, demo_path)
    try:
        os.kill(proc.pid, signal.SIGKILL)
        proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    run = open_run(out)  # readable after the kill
    n = run.time.shape[0]
    assert n >= 20 * 1000 and n % 1000 == 0      # whole 50 ms chunks of 1000 ticks
    assert not run.attrs["complete"]
    for name in ("v_out", "i_out", "i_L1", "v_ref", "u"):
        assert run.signals[name].shape == (n,) and np.all(np.isfinite(run.signals[name]))
    assert np.array_equal(run.time, np.arange(n, dtype=np.int64) * 50e-6)
    assert not (out / "summary.json").exists()


def test_ctrl_c_mid_run_closes_the_recording_marked_incomplete(tmp_path, demo_path):
    """SIGINT (Ctrl-C): the runtime closes the recording in order, marked not complete, with an
    'interrupted' event, and exits with its interrupted code."""
    proc, out = _start_long_run(tmp_path, demo_path)
    try:
        os.kill(proc.pid, signal.SIGINT)
        stdout, _ = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate(timeout=60)
    from hilrig.runtime.cli import EXIT_INTERRUPTED
    assert proc.returncode == EXIT_INTERRUPTED, stdout
    run = open_run(out)
    assert not run.attrs["complete"]
    assert "interrupted" in run.attrs["events"]
    assert run.time.shape[0] >= 20 * 1000
