"""Build the test FMUs at test time: C sources written for the tests (tests/fmu/), compiled
with the system C compiler against the FMI headers in fmpy's wheel, zipped with their
modelDescription.xml (FMI 2.0 layout: binaries/<platform>/<id>.so)."""

from __future__ import annotations

import os
import shutil
import subprocess
import zipfile
from pathlib import Path

import fmpy

SOURCES = Path(__file__).resolve().parent / "fmu"
GUID = "{8c4e810f-3df3-4a00-8276-176fa3c9f017}"
PARAMETERS = [("R", 1.2), ("L", 0.02), ("Ke", 0.08), ("Jm", 3e-4), ("bm", 1e-5), ("bc", 0.01),
              ("g", 200.0), ("M", 20.0), ("bl", 15.0)]


def model_description(voltage_causality: str = "input") -> str:
    """modelDescription.xml of the conveyor FMU (value references as in conveyor.c)."""
    states = [("current", 2), ("motor_speed", 4), ("belt_speed", 6)]
    start = '<Real start="0"/>' if voltage_causality == "input" else "<Real/>"
    rows = [f'  <ScalarVariable name="voltage" valueReference="1" causality='
            f'"{voltage_causality}" variability="continuous">{start}</ScalarVariable>']
    for name, vr in states:
        causality = "output" if name == "belt_speed" else "local"
        rows.append(f'  <ScalarVariable name="{name}" valueReference="{vr}" causality='
                    f'"{causality}" variability="continuous" initial="exact">'
                    f'<Real start="0"/></ScalarVariable>')
        rows.append(f'  <ScalarVariable name="der({name})" valueReference="{vr + 1}" '
                    f'causality="local" variability="continuous"><Real derivative='
                    f'"{len(rows)}"/></ScalarVariable>')
    for k, (name, value) in enumerate(PARAMETERS):
        rows.append(f'  <ScalarVariable name="{name}" valueReference="{8 + k}" causality='
                    f'"parameter" variability="fixed" initial="exact"><Real start="{value}"/>'
                    '</ScalarVariable>')
    rows.append('  <ScalarVariable name="motor_current" valueReference="17" causality="output" '
                'variability="continuous" initial="calculated"><Real/></ScalarVariable>')
    rows.append('  <ScalarVariable name="cs_substeps" valueReference="18" causality="parameter" '
                'variability="fixed" initial="exact"><Real start="1"/></ScalarVariable>')
    index = {r.split('name="')[1].split('"')[0]: i + 1 for i, r in enumerate(rows)}
    outputs = "".join(f'<Unknown index="{index[n]}"/>' for n in ("belt_speed", "motor_current"))
    ders = "".join(f'<Unknown index="{index[f"der({n})"]}"/>' for n, _ in states)
    return f"""<?xml version="1.0" encoding="UTF-8"?>
<fmiModelDescription fmiVersion="2.0" modelName="conveyor" guid="{GUID}"
  numberOfEventIndicators="0" generationTool="plantrig tests">
 <ModelExchange modelIdentifier="conveyor"/>
 <CoSimulation modelIdentifier="conveyor" canHandleVariableCommunicationStepSize="true"
   canGetAndSetFMUstate="true"/>
 <ModelVariables>
{chr(10).join(rows)}
 </ModelVariables>
 <ModelStructure>
  <Outputs>{outputs}</Outputs>
  <Derivatives>{ders}</Derivatives>
 </ModelStructure>
</fmiModelDescription>
"""


def build_fmu(folder: Path, name: str = "conveyor.fmu", platform: str = "linux64",
              voltage_causality: str = "input") -> Path:
    """Compile tests/fmu/conveyor.c and zip it as an FMU in ``folder``."""
    headers = Path(os.path.dirname(fmpy.__file__)) / "c-code"
    cc = shutil.which("cc")
    assert cc is not None, "the system C compiler (cc) is needed to build the test FMU"
    library = folder / "conveyor.so"
    subprocess.run([cc, "-std=c99", "-O2", "-shared", "-fPIC", "-I", str(headers), "-o",
                    str(library), str(SOURCES / "conveyor.c")], check=True)
    path = folder / name
    with zipfile.ZipFile(path, "w") as fmu:
        fmu.writestr("modelDescription.xml", model_description(voltage_causality))
        fmu.write(library, f"binaries/{platform}/conveyor.so")
    return path
