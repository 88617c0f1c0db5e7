"""Build the test FMU of the two-stage LC plant (two_stage_lc.c, modelDescription.xml.in; for
FMI 3.0 modelDescription3.xml.in) with the system C compiler: no binary FMU is kept in the
repository.

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
TEMPLATE = {2: HERE / "modelDescription.xml.in", 3: HERE / "modelDescription3.xml.in"}
IDENTIFIER = "two_stage_lc"
INTERFACES = {
    2: {"me": f'  <ModelExchange modelIdentifier="{IDENTIFIER}" completedIntegratorStepNotNeeded="true"/>',
        "cs": f'  <CoSimulation modelIdentifier="{IDENTIFIER}" canHandleVariableCommunicationStepSize="true"/>'},
    3: {"me": f'  <ModelExchange modelIdentifier="{IDENTIFIER}" needsCompletedIntegratorStep="false"/>',
        "cs": f'  <CoSimulation modelIdentifier="{IDENTIFIER}" canHandleVariableCommunicationStepSize="true"/>'},
}
#: where each FMI version keeps the binary for Linux on x86-64
BINARY_DIR = {2: "binaries/linux64", 3: "binaries/x86_64-linux"}


def compiler() -> str | None:
    """The system C compiler (cc, gcc or clang), or None."""
    for name in ("cc", "gcc", "clang"):
        path = shutil.which(name)
        if path:
            return path
    return None


def compile_library(folder: Path, version: int = 2) -> Path:
    """The FMU's shared library (FMI ``version`` 2 or 3), compiled into ``folder``. No
    contraction of a*b+c into one fused operation (-ffp-contract=off): the arithmetic must
    round as the plugin's does."""
    folder = Path(folder) / f"fmi{version}"
    folder.mkdir(parents=True, exist_ok=True)
    out = folder / f"{IDENTIFIER}.so"
    cc = compiler()
    if cc is None:
        raise RuntimeError("no C compiler (cc, gcc or clang) on PATH")
    flags = ["-DHILRIG_TEST_FMI3"] if version == 3 else []
    subprocess.run([cc, "-shared", "-fPIC", "-O2", "-ffp-contract=off", *flags, "-o", str(out),
                    str(SOURCE), "-lm"], check=True, capture_output=True, text=True)
    return out


def model_description(interfaces=("me", "cs"), edit: dict[str, str] | None = None,
                      version: int = 2) -> str:
    text = TEMPLATE[version].read_text()
    text = text.replace("@GUID@", "{" + str(uuid.uuid5(uuid.NAMESPACE_URL, "hilrig-test-fmu")) + "}")
    text = text.replace("@INTERFACES@", "\n".join(INTERFACES[version][i] for i in interfaces))
    for old, new in (edit or {}).items():
        if old not in text:
            raise ValueError(f"edit: {old!r} is not in the model description")
        text = text.replace(old, new)
    return text


def pack(folder: Path, library: Path, name: str = "two_stage_lc.fmu", interfaces=("me", "cs"),
         edit: dict[str, str] | None = None, version: int = 2) -> Path:
    """Zip the library (compiled for FMI ``version``) and a model description into
    ``folder/name``; its path."""
    path = Path(folder) / name
    with zipfile.ZipFile(path, "w") as z:
        z.writestr("modelDescription.xml", model_description(interfaces, edit, version))
        z.write(library, f"{BINARY_DIR[version]}/{IDENTIFIER}.so")
        z.write(SOURCE, f"sources/{SOURCE.name}")
    return path


def build_fmu(folder: Path, interfaces=("me", "cs"), edit=None, name="two_stage_lc.fmu",
              version: int = 2) -> Path:
    return pack(folder, compile_library(Path(folder) / "build", version), name, interfaces, edit,
                version)


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
