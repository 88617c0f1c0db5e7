"""Controllers in C (runtime/cplugin.py): the shipped PI in C (examples/c_controller/pi.c) gives
the same command as the same PI written as a numba plugin (pi_numba.py) on every tick of a run
with a reference step and a load change; the compiled library is cached; compile errors, missing
symbols, a missing compiler and bad parameter values are refused with one message.

The bound of the comparison is zero (bit-equal). Both versions do the same IEEE 754 double
operations in the same order; each basic operation is correctly rounded (IEEE 754-2008,
sec. 4.3 and 5.4, from memory), so equal inputs give equal results. hilrig compiles the C file
with -O2 -fno-fast-math -ffp-contract=off: without fast-math the compiler may not reassociate
or assume finite values, and without contraction it may not fuse a * b + c into one FMA (one
rounding instead of two), which numba's LLVM does not do either without its fastmath flags.
x86-64 and AArch64 compute doubles in SSE2/NEON registers (no x87 extended precision).
"""
import os
import shutil
import subprocess
import sys
import uuid
from pathlib import Path

import numpy as np
import pytest

from hilrig.runtime.errors import PluginError, ScenarioError
from hilrig.runtime.recording import open_run
from hilrig.runtime.run import run_scenario
from hilrig.runtime.scenario import load_scenario

EXAMPLE = Path(__file__).resolve().parents[2] / "examples" / "c_controller"

pytestmark = pytest.mark.skipif(shutil.which(os.environ.get("HILRIG_CC") or "cc") is None,
                                reason="no C compiler on this machine")


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """The C and the numba PI on the same scenario (each one loop compile per session)."""
    out = tmp_path_factory.mktemp("cctl")
    res = {}
    for name in ("pi_c", "pi_numba"):
        sc = load_scenario(EXAMPLE / f"{name}.toml")
        res[name] = (sc, run_scenario(sc, out / name))
    return res


def test_c_controller_equals_numba_controller_tick_for_tick(runs):
    sc_c, res_c = runs["pi_c"]
    sc_n, res_n = runs["pi_numba"]
    assert sc_c.controller.plugin.name == "pi_c" and sc_n.controller.plugin.name == "pi_numba"
    rc, rn = open_run(res_c.folder), open_run(res_n.folder)
    assert res_c.summary["completed"] and res_n.summary["completed"]
    np.testing.assert_array_equal(rc.time, rn.time)
    # the run has the reference step (10 ms) and the load ramp (30-35 ms) the comparison is about
    assert np.ptp(rc.signals["v_ref_raw"]) == pytest.approx(20.0)
    assert np.ptp(rc.signals["P_load"]) == pytest.approx(40e3)
    # the command moves (the controller acts on both), then: equal bit for bit (see the top)
    u_c, u_n = rc.signals["u"], rn.signals["u"]
    assert np.ptp(u_c) > 10.0
    np.testing.assert_array_equal(u_c, u_n)
    for sig in ("v_out", "i_L1", "ctrl_code"):
        np.testing.assert_array_equal(rc.signals[sig], rn.signals[sig])
    # the run records how the C file was compiled
    rec = res_c.summary["versions"]["c_controller"]
    assert "-O2" in rec and "-fno-fast-math" in rec and "pi.c ->" in rec, rec
    assert "c_controller" not in res_n.summary["versions"]


def test_c_controller_tracks_the_step(runs):
    """Independent of the numba twin: integral action removes the error after the step and the
    load ramp (a PI's zero steady-state error to a step, common practice, no source)."""
    _, res = runs["pi_c"]
    run = open_run(res.folder)
    v, t = run.signals["v_out"], run.time
    # the run starts 1 V below the reference (the default excitation, [initial] v_out_offset):
    # removed before the step at 10 ms
    assert abs(v[0] - 399.0) < 1e-9
    assert abs(v[(t > 0.005) & (t < 0.0095)] - 400.0).max() < 0.05
    assert abs(v[-1] - 420.0) < 0.5


def _copy_example(d: Path, body: str | None = None) -> Path:
    text = (EXAMPLE / "pi.c").read_text() if body is None else body
    (d / "pi.c").write_text(text)
    (d / "pi_c.toml").write_text((EXAMPLE / "pi_c.toml").read_text())
    return d / "pi.c"


def test_library_is_compiled_once_and_again_after_a_change(tmp_path):
    from hilrig.runtime import cplugin
    src = _copy_example(tmp_path)
    # a local header the file includes: a change of it alone rebuilds too
    (tmp_path / "gains.h").write_text("#define GAIN_SCALE 1.0\n")
    text = src.read_text().replace('#include "hilrig_controller.h"',
                                   '#include "hilrig_controller.h"\n#include "gains.h"')
    text = text.replace("u[0] = uc;", "u[0] = uc * GAIN_SCALE;")
    # a source no earlier session compiled (the cache may be a warm one)
    text = f"/* {uuid.uuid4().hex} */\n" + text
    src.write_text(text)
    first = cplugin.compile_library(src)
    assert first.compiled and first.path.is_file()
    mtime = first.path.stat().st_mtime_ns
    again = cplugin.compile_library(src)
    assert not again.compiled and again.path == first.path
    assert again.path.stat().st_mtime_ns == mtime
    # the recorded command: the fixed flags, the header forced in
    assert all(f in again.command for f in ("-O2", "-fPIC", "-shared", "-fno-fast-math",
                                             "-ffp-contract=off"))
    assert str(cplugin.HEADER) in again.command
    # a new process takes it from the cache as well
    code = ("import sys; from hilrig.runtime import cplugin; "
            f"lib = cplugin.compile_library({str(src)!r}); print(lib.compiled, lib.path)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120, check=True).stdout.split()
    assert out == ["False", str(first.path)]
    # the included header changes: rebuilt into a new file, and this process calls the new code
    (tmp_path / "gains.h").write_text("#define GAIN_SCALE 2.0\n")
    rebuilt = cplugin.compile_library(src)
    assert rebuilt.compiled and rebuilt.path != first.path
    assert first.path.stat().st_mtime_ns == mtime
    assert _command(first) * 2.0 == _command(rebuilt) != 0.0
    # the source changes: a new library
    src.write_text(text + "\n/* edited */\n")
    changed = cplugin.compile_library(src)
    assert changed.compiled and changed.path != first.path


def _command(lib) -> float:
    """u[0] of one step of a compiled library (through ctypes, as with NUMBA_DISABLE_JIT)."""
    from hilrig.runtime import cplugin
    p = np.array([q["default"] for q in lib.info["params"]] + [50e-6, 0.0, 1e4]
                 + [float(lib.init_address), float(lib.step_address)])
    y, r = np.array([400.0, 50.0, 50.0, 400.25, 50.0]), np.array([401.0, 0.0, 0.0, 0.0, 0.0])
    xc, u = np.zeros(2), np.zeros(1)
    cplugin.python_init(p, xc, y, r)
    assert cplugin.python_step(0.0, p, xc, y, r, u) == 0
    return float(u[0])


def _run_cli(cwd: Path, *args, env=None):
    return subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "run", "pi_c.toml",
                           "--headless", "--out", "run", *args], cwd=cwd, capture_output=True,
                          text=True, timeout=600, env=env)


def _one_error(p) -> str:
    assert p.returncode == 2, p.stdout + p.stderr
    out = p.stdout + p.stderr
    assert "Traceback" not in out, out
    err = [ln for ln in out.splitlines() if ln.startswith("error:")]
    assert len(err) == 1, out
    return err[0]


def test_compile_error_names_the_file_and_line(tmp_path):
    body = (EXAMPLE / "pi.c").read_text()
    lines = body.splitlines()
    k = next(i for i, ln in enumerate(lines) if "double ei = i_sat - y[Y_IL1];" in ln)
    lines[k] = lines[k].replace(";", "")  # a missing semicolon
    _copy_example(tmp_path, "\n".join(lines) + "\n")
    p = _run_cli(tmp_path)
    err = _one_error(p)
    # GCC and clang report a missing ';' on the line of the next token (the next statement)
    assert f"controller C file {tmp_path / 'pi.c'}, line " in err, err
    line = int(err.split("pi.c, line ")[1].split()[0].rstrip(",:"))
    assert line in (k + 1, k + 2), err
    assert "expected" in err, err
    assert not (tmp_path / "run").exists()  # nothing ran


def test_missing_symbol_is_named(tmp_path):
    body = (EXAMPLE / "pi.c").read_text().replace("int hilrig_step(", "int hilrig_stepp(")
    _copy_example(tmp_path, body)
    err = _one_error(_run_cli(tmp_path))
    assert "does not define hilrig_step" in err, err
    assert not (tmp_path / "run").exists()


def test_no_compiler_is_said_plainly(tmp_path):
    _copy_example(tmp_path)
    env = dict(os.environ, HILRIG_CC="no-such-cc-on-this-machine")
    err = _one_error(_run_cli(tmp_path, env=env))
    assert "need a C compiler" in err and "HILRIG_CC" in err, err


@pytest.mark.parametrize("key,value,words", [
    ("Kp_v", -1.0, ("controller.Kp_v", "outside [0, 1000] A/V")),
    ("I_max", 0.0, ("controller.I_max", "(0, 100000]")),
    ("Kp_i", "2 V", ("controller.Kp_i",)),
    ("Kp_x", 1.0, ("Kp_x",)),
])
def test_bad_parameter_value_is_refused(key, value, words):
    with pytest.raises(ScenarioError) as info:
        load_scenario(EXAMPLE / "pi_c.toml", overrides={f"controller.{key}": value})
    for w in words:
        assert w in str(info.value), str(info.value)


def test_bad_descriptor_is_refused(tmp_path):
    from hilrig.runtime import cplugin
    body = (EXAMPLE / "pi.c").read_text().replace('{"Kp_v", "A/V", 5.0,', '{"Kp_v", "A/V", -5.0,')
    src = _copy_example(tmp_path, body)
    with pytest.raises(PluginError, match=r"params\[0\] \(Kp_v\): default -5.0 A/V is outside"):
        cplugin.compile_library(src)


def test_checked_build_runs_the_c_controller_and_its_fault_code_trips(tmp_path, runs):
    """--checked compiles the loop with bounds checks and calls the C code the same way: the
    recording equals the normal build's up to the trip. hilrig_step's return value is the
    contract's fault code: a code from t = 10 ms on trips the run on that tick with the code
    named (as a Python kernel's return value does). One loop build for both checks."""
    body = (EXAMPLE / "pi.c").read_text()
    end = "            xc[X_V] += p[KI_V] * ts * ev;\n    }\n    return 0;"
    assert end in body
    body = body.replace(end, end.replace("return 0;", "if (t >= 0.01)\n        return 7;\n    return 0;"))
    _copy_example(tmp_path, body)
    env = {k: v for k, v in os.environ.items() if k not in ("HILRIG_CHECKED", "NUMBA_BOUNDSCHECK")}
    p = subprocess.run([sys.executable, "-m", "hilrig.runtime.cli", "run", "pi_c.toml",
                        "--checked", "--headless", "--out", "run"],
                       cwd=tmp_path, capture_output=True, text=True, timeout=900, env=env)
    assert "Traceback" not in p.stdout + p.stderr, p.stdout + p.stderr
    run = open_run(tmp_path / "run")
    trip = run.summary["trip"]
    Ts = 50e-6  # pi_c.toml's control period
    k = int(round(0.01 / Ts))
    assert trip["cause"] == "controller fault code 7" and trip["value"] == 7.0, trip
    assert trip["tick"] == k, trip
    assert run.signals["ctrl_code"][k] == 7.0
    assert not run.signals["ctrl_code"][:k].any()
    normal = open_run(runs["pi_c"][1].folder)
    # up to the trip tick (which records the safe state's command)
    np.testing.assert_array_equal(run.signals["u"][:k], normal.signals["u"][:k])


def test_compiler_reports_are_read_from_gcc_and_clang_lines(tmp_path):
    """The first error line of either compiler's report gives file and line; a link error
    names the missing symbol. (The line formats are GCC's and clang's usual ones, from
    memory: FILE:LINE:COL: error: MESSAGE; ld: ... undefined reference to `SYMBOL'.)"""
    from hilrig.runtime.cplugin import compile_error_text
    src = tmp_path / "ctl.c"
    gcc = (f"{src}: In function 'hilrig_step':\n"
           f"{src}:42:17: error: 'x' undeclared (first use in this function)\n"
           f"{src}:50:1: error: expected ';' before '}}' token\n")
    text = compile_error_text(src, gcc, ["cc"])
    assert f"controller C file {src}, line 42, column 17: 'x' undeclared" in text, text
    clang = (f"In file included from {src}:3:\n{tmp_path}/gains.h:7:9: error: unknown type name "
             f"'dbl'\n1 error generated.\n")
    text = compile_error_text(src, clang, ["clang"])
    assert f"controller C file {tmp_path / 'gains.h'}, line 7, column 9: unknown type name" in text
    ld = ("/usr/bin/ld: /tmp/ccA1.o: in function `hilrig_step':\n"
          "ctl.c:(.text+0x2a): undefined reference to `my_filter'\n"
          "collect2: error: ld returned 1 exit status\n")
    text = compile_error_text(src, ld, ["cc"])
    assert "it calls my_filter, which nothing defines" in text, text
