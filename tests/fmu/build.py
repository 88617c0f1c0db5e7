"""Build the test FMU of the two-stage LC plant (two_stage_lc.c, modelDescription.xml.in) with
the system C compiler: no binary FMU is kept in the repository.

``compile_library(folder)`` compiles the shared library once; ``pack(folder, library, ...)``
zips it with a model description made from the template (``edit``: text replacements, for the
tests of mismatching model descriptions). ``build_fmu`` does both.
"""
from __future__ import annotations

import shutil
import subprocess
import uuid
import zipfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
SOURCE = HERE / "two_stage_lc.c"
TEMPLATE = HERE / "modelDescription.xml.in"
IDENTIFIER = "two_stage_lc"
INTERFACES = {
    "me": f'  <ModelExchange modelIdentifier="{IDENTIFIER}" completedIntegratorStepNotNeeded="true"/>',
    "cs": f'  <CoSimulation modelIdentifier="{IDENTIFIER}" canHandleVariableCommunicationStepSize="true"/>',
}


def compiler() -> str | None:
    """The system C compiler (cc, gcc or clang), or None."""
    for name in ("cc", "gcc", "clang"):
        path = shutil.which(name)
        if path:
            return path
    return None


def compile_library(folder: Path) -> Path:
    """The FMU's shared library, compiled into ``folder``. No contraction of a*b+c into one
    fused operation (-ffp-contract=off): the arithmetic must round as the plugin's does."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    out = folder / f"{IDENTIFIER}.so"
    cc = compiler()
    if cc is None:
        raise RuntimeError("no C compiler (cc, gcc or clang) on PATH")
    subprocess.run([cc, "-shared", "-fPIC", "-O2", "-ffp-contract=off", "-o", str(out),
                    str(SOURCE), "-lm"], check=True, capture_output=True, text=True)
    return out


def model_description(interfaces=("me", "cs"), edit: dict[str, str] | None = None) -> str:
    text = TEMPLATE.read_text()
    text = text.replace("@GUID@", "{" + str(uuid.uuid5(uuid.NAMESPACE_URL, "hilrig-test-fmu")) + "}")
    text = text.replace("@INTERFACES@", "\n".join(INTERFACES[i] for i in interfaces))
    for old, new in (edit or {}).items():
        if old not in text:
            raise ValueError(f"edit: {old!r} is not in the model description")
        text = text.replace(old, new)
    return text


def pack(folder: Path, library: Path, name: str = "two_stage_lc.fmu", interfaces=("me", "cs"),
         edit: dict[str, str] | None = None) -> Path:
    """Zip the library and a model description into ``folder/name``; its path."""
    path = Path(folder) / name
    with zipfile.ZipFile(path, "w") as z:
        z.writestr("modelDescription.xml", model_description(interfaces, edit))
        z.write(library, f"binaries/linux64/{IDENTIFIER}.so")
        z.write(SOURCE, f"sources/{SOURCE.name}")
    return path


def build_fmu(folder: Path, interfaces=("me", "cs"), edit=None, name="two_stage_lc.fmu") -> Path:
    return pack(folder, compile_library(Path(folder) / "build"), name, interfaces, edit)


#: the [plant] tables mapping hilrig's signals to the test FMU's variables
MAPPING = """[plant.inputs]
u = "u_conv"
P_load = "load_P"
G_load = "load_G"
I_load = "load_I"

[plant.outputs]
v_out = "y_vout"
i_out = "y_iout"
i_L1 = "y_iL1"
v_C1 = "y_vC1"
i_L2 = "y_iL2"
v_dc = "y_vdc"

[plant.states]
i_L1 = "filter.iL1"
v_C1 = "filter.vC1"
i_L2 = "filter.iL2"
v_out = "filter.vC2"
"""

#: a short scenario (invented demo data of the tests): the demo plant's defaults, a 100 V step
#: at 10 ms, a load step at 20 ms (20 kW to 50 kW with 100 ohm); the controller's declared
#: numbers and the fixed shaping (the same on every plant), fixed RK4 substeps (the embedded
#: plant's own rate bound would otherwise add substeps the FMU plant does not know of)
SCENARIO = """# DEMO DATA of hilrig's tests: invented, not measurements of any equipment
title = "FMU plant test"
demo_data = true

[timing]
Ts = "50 us"
substeps = 4
duration = "0.03 s"
integration = "fixed"

[controller]
plugin = "cascaded_pi"

[design]
defaults = "declared"

[reference]
plugin = "profile"
points = [["0 s", "400 V"], ["0.01 s", "400 V"], ["0.01 s", "500 V"], ["1 s", "500 V"]]

[shaping]
pole = "7500 rad/s"
slew_rate = "200 kV/s"

[load]
interpolation = "linear"
[[load.points]]
t = "0 s"
P = "20 kW"
[[load.points]]
t = "0.02 s"
P = "50 kW"
R = "100 ohm"

"""


def scenario(fmu: Path | None, interface: str = "model_exchange", plant_keys: str = "",
             mapping: str = MAPPING) -> str:
    """The test scenario's text with the FMU as its plant (or two_stage_lc when fmu is None)."""
    if fmu is None:
        return SCENARIO + '[plant]\nplugin = "two_stage_lc"\n'
    return (SCENARIO + f'[plant]\nfmu = "{fmu}"\ninterface = "{interface}"\n{plant_keys}\n'
            + mapping)
