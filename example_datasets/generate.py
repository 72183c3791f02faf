"""Make the example data of the invented scenario (demo only; see model.py for the story).

    python example_datasets/generate.py [OUTDIR]

Four invented labs measure two observables of the scenario: velarin concentration (absolute,
nM) and the Glint reporter (arbitrary units, one scale factor per dataset), under several
lumatrope doses and temperatures. The ground truth is model.TRUTH. Planted on purpose:

- marrowby_velarin_37C_10uM is quietly wrong: its readout saturates at a detector ceiling,
  and it claims a small uncertainty;
- the Marrowby Group documents poorly (no method, instrument, date or contact);
- quillfen_velarin_37C_10uM is sampled unevenly; Quillfen reports means of 4 with their SEM;
- Glint from Harrow Point comes as an XLSX workbook in wide form (one column per replicate).

The RNG is seeded: running this again gives the same numbers.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from model import TRUTH, velarin

SEED = 20261202
GLINT_SCALE = {"harrow": 48.0, "quillfen": 31.0, "corvane": 55.0, "marrowby": 40.0}
LAB_NAMES = {
    "harrow": "Harrow Point Lab",
    "quillfen": "Quillfen Institute",
    "corvane": "Corvane Biophysics",
    "marrowby": "Marrowby Group",
}
REGULAR = [0, 5, 10, 15, 20, 30, 45, 60, 90, 120]


@dataclass
class Spec:
    name: str
    lab: str
    observable: str
    dose_uM: float
    temperature_C: float
    times: list[float] = field(default_factory=lambda: list(REGULAR))
    replicates: int = 1
    form: str = "long_csv"  # long_csv | long_tsv | wide_xlsx
    report_sd: str = "sd"  # sd | sem | none | round
    saturate_at: float | None = None
    claimed_sd: float | None = None


SPECS = [
    Spec("harrow_velarin_37C_1uM", "harrow", "velarin_conc", 1, 37, replicates=3),
    Spec("harrow_velarin_37C_10uM", "harrow", "velarin_conc", 10, 37, replicates=3),
    Spec("harrow_velarin_30C_10uM", "harrow", "velarin_conc", 10, 30, replicates=3),
    Spec(
        "harrow_glint_37C_10uM",
        "harrow",
        "glint",
        10,
        37,
        replicates=3,
        form="wide_xlsx",
        report_sd="none",
    ),
    Spec(
        "quillfen_velarin_37C_1uM",
        "quillfen",
        "velarin_conc",
        1,
        37,
        times=list(range(0, 121, 10)),
        form="long_tsv",
        report_sd="sem",
    ),
    Spec(
        "quillfen_velarin_37C_10uM",
        "quillfen",
        "velarin_conc",
        10,
        37,
        times=[0, 2, 3, 7, 12, 20, 33, 50, 75, 110],
        form="long_tsv",
        report_sd="sem",
    ),
    Spec(
        "quillfen_velarin_30C_1uM",
        "quillfen",
        "velarin_conc",
        1,
        30,
        times=list(range(0, 121, 10)),
        form="long_tsv",
        report_sd="sem",
    ),
    Spec(
        "quillfen_glint_37C_1uM",
        "quillfen",
        "glint",
        1,
        37,
        times=list(range(0, 121, 8)),
        report_sd="none",
    ),
    Spec("corvane_glint_37C_10uM", "corvane", "glint", 10, 37, replicates=2),
    Spec("corvane_glint_30C_10uM", "corvane", "glint", 10, 30, replicates=2),
    Spec("corvane_velarin_25C_10uM", "corvane", "velarin_conc", 10, 25),
    Spec(
        "marrowby_velarin_37C_10uM",
        "marrowby",
        "velarin_conc",
        10,
        37,
        saturate_at=14.0,
        claimed_sd=0.3,
    ),
    Spec("marrowby_glint_37C_1uM", "marrowby", "glint", 1, 37, report_sd="round"),
]


def _velarin_sd(mean: np.ndarray) -> np.ndarray:
    return np.sqrt(0.5**2 + (0.06 * mean) ** 2)


def _glint_sd(signal: np.ndarray) -> np.ndarray:
    return np.sqrt(15.0**2 + (0.05 * signal) ** 2)


def _series(spec: Spec, rng: np.random.Generator) -> dict[str, np.ndarray]:
    times = np.repeat(np.asarray(spec.times, dtype=float), spec.replicates)
    replicate = np.tile(np.arange(1, spec.replicates + 1), len(spec.times))
    mean = velarin(TRUTH, spec.dose_uM * 1000.0, spec.temperature_C, times)
    # a lab reporting SEM with n = 4 reports means of 4 measurements: each value scatters by
    # the SEM, sd / sqrt(4), while sd stays the single-measurement noise
    averaged = 2.0 if spec.report_sd == "sem" else 1.0
    if spec.observable == "glint":
        signal = GLINT_SCALE[spec.lab] * mean  # no offset: a pure scale
        sd = _glint_sd(signal)
        value = signal + rng.normal(0.0, sd / averaged)
    else:
        sd = _velarin_sd(mean)
        value = mean + rng.normal(0.0, sd / averaged)
        if spec.saturate_at is not None:
            value = np.minimum(value, spec.saturate_at + rng.normal(0.0, 0.15, len(value)))
            value = np.maximum(value, 0.0)
    reported = np.full(len(value), spec.claimed_sd) if spec.claimed_sd else sd
    return {"time": times, "value": value, "sd": reported, "replicate": replicate}


def _fmt(x: float) -> str:
    return f"{x:.5g}"


def _sidecar(spec: Spec, data_file: str) -> str:
    lab = LAB_NAMES[spec.lab]
    observable = {
        "velarin_conc": ("velarin_conc", "velarin concentration", "nM"),
        "glint": ("glint", "Glint reporter fluorescence", "a.u."),
    }[spec.observable]
    lines = [
        f"# {spec.name}: invented example data (see example_datasets/generate.py)",
        f'data_file = "{data_file}"',
        "",
        "[observable]",
        f'id = "{observable[0]}"',
        f'label = "{observable[1]}"',
        f'unit = "{observable[2]}"',
        "",
        "[time]",
        'unit = "min"',
        "",
        "[conditions]",
        f'temperature = "{spec.temperature_C:g} degC"',
        f'dose = "{spec.dose_uM:g} uM"',
        'cell_line = "KV-3"',
        "",
        "[source]",
        f'lab = "{lab}"',
    ]
    if spec.lab != "marrowby":  # the poorly documented lab sends no method, date or contact
        method = {"velarin_conc": "calibrated capture assay", "glint": "live-cell Glint imaging"}
        instrument = {
            "harrow": "plate reader HX-2",
            "quillfen": "plate reader QF-9",
            "corvane": "spinning-disk scope CV-1",
        }[spec.lab]
        lines += [
            f'method = "{method[spec.observable]}"',
            f'instrument = "{instrument}"',
            f"acquired = 2026-0{3 + len(spec.lab) % 5}-1{len(spec.name) % 9}",
            f'contact = "data desk, {lab}"',
            f'reference = "{spec.lab} notebook {len(spec.name) * 7}"',
        ]
    if spec.report_sd in ("sd", "round"):
        lines += ["", "[uncertainty]", 'type = "sd"']
    elif spec.report_sd == "sem":
        lines += ["", "[uncertainty]", 'type = "sem"', "n = 4"]
    if spec.lab == "harrow":
        lines += ["", "[[protocol.pretreatment]]", 'step = "serum starvation"', 'duration = "4 h"']
    if spec.observable == "glint":
        lines += ["", "[protocol]", f'calibration_group = "{spec.lab}_glint_run"']
    if spec.form == "wide_xlsx":
        lines += ["", 'layout = "wide"']
        # TOML: top-level keys must come before tables, so move it up
        lines.remove('layout = "wide"')
        lines.insert(2, 'layout = "wide"')
    return "\n".join(lines) + "\n"


# What the modeller could find out about each lab (checklist answers; see curate's default
# checklist). The Marrowby Group claims a linear readout: its saturation is not declared.
LAB_ANSWERS = {
    "harrow": {},
    "quillfen": {"raw_data_available": False, "blinded_analysis": False},
    "corvane": {"replicates_3": False, "instrument_precision": False},
    "marrowby": {"calibration_documented": False, "instrument_precision": False},
}
QUESTIONS = (
    "raw_data_available",
    "replicates_3",
    "calibration_documented",
    "same_conditions",
    "blinded_analysis",
    "instrument_precision",
    "readout_in_range",
)


def _answers(spec: Spec) -> str:
    answers = {q: True for q in QUESTIONS}
    answers.update(LAB_ANSWERS[spec.lab])
    if spec.replicates < 3 and spec.report_sd != "sem":
        answers["replicates_3"] = False
    lines = [f"# checklist answers for {spec.name} (invented example)", "[answers]"]
    lines += [f"{q} = {'true' if a else 'false'}" for q, a in answers.items()]
    if spec.lab == "marrowby":
        lines += ["", "[notes]", 'calibration_documented = "asked twice, no reply"']
    return "\n".join(lines) + "\n"


def write(outdir: Path) -> list[Path]:
    """Write every example data file and its sidecar into ``outdir``; give the paths."""
    rng = np.random.default_rng(SEED)
    outdir.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    for spec in SPECS:
        data = _series(spec, rng)
        if spec.form == "wide_xlsx":
            import openpyxl

            name = f"{spec.name}.xlsx"
            book = openpyxl.Workbook()
            sheet = book.active
            sheet.title = "glint"
            sheet.append(["time"] + [f"r{k}" for k in range(1, spec.replicates + 1)])
            for i, t in enumerate(spec.times):
                block = data["value"][i * spec.replicates : (i + 1) * spec.replicates]
                sheet.append([t] + [float(_fmt(v)) for v in block])
            book.properties.creator = "curate example generator"
            book.save(outdir / name)
        else:
            sep = "\t" if spec.form == "long_tsv" else ","
            name = f"{spec.name}.{'tsv' if spec.form == 'long_tsv' else 'csv'}"
            header = ["time", "value"]
            columns: list[Any] = [data["time"], data["value"]]
            if spec.report_sd == "sd":
                header.append("sd")
                columns.append(data["sd"])
            elif spec.report_sd == "sem":
                header += ["sd", "n"]
                columns += [data["sd"] / 2.0, np.full(len(data["sd"]), 4)]
            elif spec.report_sd == "round":
                header.append("sd")
                columns.append(np.full(len(data["sd"]), 5.0))
            if spec.replicates > 1:
                header.append("replicate")
                columns.append(data["replicate"])
            rows = [sep.join(header)]
            for row in zip(*columns, strict=True):
                rows.append(sep.join(_fmt(float(x)) for x in row))
            (outdir / name).write_text("\n".join(rows) + "\n", encoding="utf-8")
        sidecar = outdir / f"{spec.name}.toml"
        sidecar.write_text(_sidecar(spec, name), encoding="utf-8")
        checklists = outdir.parent / "checklists"
        checklists.mkdir(exist_ok=True)
        answers = checklists / f"{spec.name}.toml"
        answers.write_text(_answers(spec), encoding="utf-8")
        written += [outdir / name, sidecar, answers]
    return written


if __name__ == "__main__":
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent / "data"
    for path in write(target):
        print(path)
