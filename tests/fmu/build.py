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
