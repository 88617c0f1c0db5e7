"""Bad input that used to get through, run as a user would: each is one clear line naming the
file or key and the fix, exit status 2, no traceback, nothing written."""
import os
import re
from pathlib import Path

import pytest

from tests.integration.test_cli import HILRIG, run_cli


def _demo_with(demo_path, old: str, new: str) -> str:
    text = Path(demo_path).read_text()
    assert old in text
    return text.replace(old, new, 1)


CASES = {
    # an empty file would run the defaults (800 V DC link, 1 s, no interlocks) unannounced
    "empty": (lambda d: "", r"empty\.toml: the scenario is empty \(no keys\)"),
    # 5000 nested arrays: beyond the TOML reader's recursion (was a RecursionError traceback)
    "nested": (lambda d: 'title = "x"\nx = ' + "[" * 5000 + "]" * 5000 + "\n",
               r"nested\.toml: arrays or inline tables are nested too deeply"),
    # terminal escape codes in the title (ESC [2J clears the screen)
    "escape": (lambda d: _demo_with(d, 'title = "', 'title = "\\u001b[2J\\u001b[31m'),
               r"escape\.toml: title holds the control character U\+001B at position 0"),
    # a start excitation far beyond a small offset (docs/scenarios.md, [initial])
    "offset": (lambda d: Path(d).read_text() + '\n[initial]\nv_out_offset = "-30 %"\n',
               r"offset\.toml: initial\.v_out_offset = '-30 %' is outside \[-10, 10\] % of the "
               r"start voltage; write a percentage"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_scenario_is_one_clear_line(tmp_path, demo_path, case):
    make, pattern = CASES[case]
    path = tmp_path / f"{case}.toml"
    path.write_text(make(demo_path))
    p = run_cli("run", path, "--out", tmp_path / "r", "--headless")
    assert p.returncode == 2, p.stdout + p.stderr
    errors = [line for line in p.stdout.splitlines() if line.startswith("error:")]
    assert len(errors) == 1 and re.search(pattern, errors[0]), p.stdout
    assert "Traceback" not in p.stdout + p.stderr and "\x1b[2J" not in p.stdout
    assert not (tmp_path / "r").exists()


def test_a_run_whose_recording_exceeds_the_free_space_is_refused(tmp_path, demo_path):
    # 1e5 s at the demo's Ts = 50 us: 2e9 rows of 8-byte values, hundreds of GB
    path = tmp_path / "long.toml"
    path.write_text(re.sub(r'(?m)^duration = .*$', 'duration = "1e5 s"', Path(demo_path).read_text()))
    # safety net should the check ever be missing: the run may write at most 50 MB (a larger
    # file ends it with SIGXFSZ) instead of filling the disk
    import resource
    import subprocess

    def cap():
        resource.setrlimit(resource.RLIMIT_FSIZE, (50_000_000, 50_000_000))
    p = subprocess.run(HILRIG + ["run", str(path), "--out", str(tmp_path / "r"), "--headless"],
                       capture_output=True, text=True, timeout=300, preexec_fn=cap,
                       env=dict(os.environ, COLUMNS="120"))
    out = " ".join(p.stdout.split())
    import shutil
    free_gb = shutil.disk_usage(tmp_path).free / 1e9
    if free_gb > 1000:
        pytest.skip(f"{free_gb:.0f} GB free: the demo's recording would fit")
    assert p.returncode == 2, p.stdout + p.stderr
    m = re.search(r"error: the recording of this run would take ([0-9.]+) GB \(2000000000 rows x "
                  r"(\d+) columns x 8 bytes\) and .* has ([0-9.]+) GB free", out)
    assert m, out
    # the projection is rows x columns x 8 bytes (arithmetic)
    assert float(m.group(1)) == pytest.approx(2e9 * int(m.group(2)) * 8 / 1e9, abs=0.05)
    assert float(m.group(3)) == pytest.approx(free_gb, rel=0.05)
    assert "Traceback" not in p.stdout + p.stderr and not (tmp_path / "r").exists()
