"""A controller that declares its own linear model (docs/plugins.md, ``linear_model``): the
analysis uses it instead of finite differences.

The worked example of docs/plugins.md (a voltage-mode PI) with its exact Jacobians written by
hand from its ``step``: xc' = xc + Ki Ts (v_ref - v_out), u = v_ref + Kp (v_ref - v_out) + xc -
R_d (i_L1 - i_out), so Ac = 1, Bc = [-Ki Ts, 0, 0], Cc = 1, Dc = [-Kp, R_d, -R_d] over the reads
(v_out, i_out, i_L1). Checks: the declared model gives the finite differences' poles (both are
exact for this affine law), and a declared model that differs (no damping term) moves them, so
the declared one is the one used.
"""
import numpy as np

from hilrig.runtime.analysis import linear
from hilrig.runtime.scenario import load_scenario
from tests.integration.test_plugin_example import example_files

MODEL = '''

@njit(cache=True)
def linear_model(p, xc, y, r, Ac, Bc, Cc, Dc):
    Ac[0, 0] = 1.0
    Bc[0, Y_VOUT] = -p[KI] * p[TS]
    Cc[0, 0] = 1.0
    Dc[0, Y_VOUT] = -p[KP]
    Dc[0, Y_IOUT] = {rd_iout}
    Dc[0, Y_IL1] = {rd_il1}
'''


def _model(tmp_path, name, extra):
    folder = tmp_path / name
    folder.mkdir()
    files = example_files()
    (folder / "voltage_pi.py").write_text(files["voltage_pi.py"] + extra)
    (folder / "example.toml").write_text(files["example.toml"])
    sc = load_scenario(folder / "example.toml")
    return linear.model_at(sc, 400.0, 50e3)


def test_a_declared_linear_model_is_used(tmp_path):
    fd = _model(tmp_path, "fd", "")
    exact = _model(tmp_path, "declared", MODEL.format(rd_iout="p[RD]", rd_il1="-p[RD]"))
    other = _model(tmp_path, "undamped", MODEL.format(rd_iout="0.0", rd_il1="0.0"))
    assert fd.controller_model == "finite differences"
    assert exact.controller_model == "declared"
    np.testing.assert_allclose(exact.Dc, fd.Dc, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(exact.Bc, fd.Bc, rtol=1e-7, atol=1e-12)
    z_fd = np.sort_complex(np.linalg.eigvals(fd.Acl))
    z_ex = np.sort_complex(np.linalg.eigvals(exact.Acl))
    np.testing.assert_allclose(z_ex, z_fd, rtol=1e-7, atol=1e-9)
    z_other = np.sort_complex(np.linalg.eigvals(other.Acl))
    # without the damping term the LC resonance of the loaded filter is barely damped or
    # undamped: the largest pole moves well away
    assert abs(np.abs(z_other).max() - np.abs(z_fd).max()) > 1e-3
