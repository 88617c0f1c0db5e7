"""The whole loop also runs as plain Python (NUMBA_DISABLE_JIT=1), so a failure inside a kernel
shows a Python traceback; and it computes the same numbers as the compiled loop."""
import os
import subprocess
import sys

import numpy as np

from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

CHILD = r"""
import sys
from hilrig.runtime.scenario import load_scenario
from hilrig.runtime.run import run_scenario
sc = load_scenario(sys.argv[1], overrides={"timing.duration": "2 ms"})
res = run_scenario(sc, sys.argv[2])
print(res.summary["completed"])
"""


def test_plain_python_loop_matches_compiled(tmp_path, demo_path):
    env = dict(os.environ, NUMBA_DISABLE_JIT="1", HILRIG_CACHE_DIR=str(tmp_path / "cache"))
    p = subprocess.run([sys.executable, "-W", "error", "-c", CHILD, demo_path, str(tmp_path / "py")],
                       env=env, capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip().endswith("True")
    jit = run_scenario(load_scenario(demo_path, overrides={"timing.duration": "2 ms"}),
                       tmp_path / "jit")
    a, b = open_run(tmp_path / "py"), open_run(jit.folder)
    assert a.time.shape == b.time.shape == (40,)
    for name in a.signals:
        # No fastmath and no contraction into fused multiply-adds: the compiled loop performs
        # the same IEEE 754 operations in the same order as the interpreter (common practice,
        # no source); allow a few ulp for libm differences.
        np.testing.assert_allclose(a.signals[name], b.signals[name], rtol=1e-13, atol=1e-12,
                                   err_msg=name)
