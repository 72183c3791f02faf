"""Benchmarks: curate against the baseline a user would otherwise write, measured in one run.

    python -m bench [--quick]

Every case times ours and its baseline in this same process (medians of repetitions; the
machines are noisy), prints a table and writes bench/results.json as
{"CASE": {"ratio", "target", "ours_s", "baseline_s", "n", ...}}. A ratio below its target
meets it. Data are synthetic and made here.
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import os
import sqlite3
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

import curate  # noqa: E402
from bench import folder as folder_intake  # noqa: E402
from bench import petab_problems, workbook  # noqa: E402
from bench.peak import report_peak, streamed_export_peak  # noqa: E402
from bench.timing import median_time  # noqa: E402
from curate import fit as fitting  # noqa: E402
from curate.export.table import table_bytes  # noqa: E402
from curate.fit import sensitivity  # noqa: E402

POINTS_PER_SERIES = 100


def synthetic_series(
    n_series: int, seed: int = 0
) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(seed)
    t = np.arange(POINTS_PER_SERIES, dtype=float) * 30.0
    return [(t, 20 * (1 - np.exp(-t / 900.0)) + rng.normal(0, 0.5, POINTS_PER_SERIES), np.full(POINTS_PER_SERIES, 0.5))
            for _ in range(n_series)]  # fmt: skip


def ours_intake(folder: Path, series: list, tag: str) -> Path:
    path = folder / f"ours_{tag}.db"
    with curate.open_catalog(path, actor="bench") as catalog:
        drafts = [catalog.draft(t, y, sd=sd, observable="velarin_conc", unit="nM", time_unit="s", lab=f"Lab {k % 8}",
                                conditions={"dose": float(k % 50), "temperature": 37.0}) for k, (t, y, sd) in enumerate(series)]  # fmt: skip
        catalog.add_drafts(drafts)
    return path


def batch_intake(folder: Path, series: list, tag: str) -> tuple[Path, float]:
    """The same drafts through ``add_drafts(batch=True)``; give the file and the seconds the
    drafts alone took (built one by one: the column-wise draft builder is not written yet)."""
    path = folder / f"batch_{tag}.db"
    with curate.open_catalog(path, actor="bench") as catalog:
        started = time.perf_counter()
        drafts = [catalog.draft(t, y, sd=sd, observable="velarin_conc", unit="nM", time_unit="s", lab=f"Lab {k % 8}",
                                conditions={"dose": float(k % 50), "temperature": 37.0}) for k, (t, y, sd) in enumerate(series)]  # fmt: skip
        drafting = time.perf_counter() - started
        catalog.add_drafts(drafts, batch=True)
    return path, drafting


def floor_intake(folder: Path, series: list, tag: str) -> Path:
    path = folder / f"floor_{tag}.db"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE points (series INTEGER, time REAL, value REAL, sd REAL)")
    rows = (
        (k, float(t_), float(y_), float(s_))
        for k, (t, y, sd) in enumerate(series)
        for t_, y_, s_ in zip(t, y, sd, strict=True)
    )
    with conn:
        conn.executemany("INSERT INTO points VALUES (?, ?, ?, ?)", rows)
    conn.close()
    return path


def blob_intake(folder: Path, series: list, tag: str) -> Path:
    path = folder / f"blob_{tag}.db"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE series (id INTEGER PRIMARY KEY, time BLOB, value BLOB, sd BLOB)")
    with conn:
        conn.executemany("INSERT INTO series VALUES (?, ?, ?, ?)",
                         ((k, t.tobytes(), y.tobytes(), sd.tobytes()) for k, (t, y, sd) in enumerate(series)))  # fmt: skip
    conn.close()
    return path


def fresh(folder: Path, *names: str) -> None:
    for name in names:
        for suffix in ("", "-wal", "-shm"):
            Path(str(folder / name) + suffix).unlink(missing_ok=True)


def case_intake(folder: Path, n_series: int, repeats: int) -> tuple[dict[str, Any], dict[str, Any]]:
    series = synthetic_series(n_series)
    tag = str(n_series)

    def ours() -> Path:
        fresh(folder, f"ours_{tag}.db")
        return ours_intake(folder, series, tag)

    def floor() -> Path:
        fresh(folder, f"floor_{tag}.db")
        return floor_intake(folder, series, tag)

    def blob() -> Path:
        fresh(folder, f"blob_{tag}.db")
        return blob_intake(folder, series, tag)

    drafting: list[float] = []

    def batch() -> Path:
        fresh(folder, f"batch_{tag}.db")
        path, seconds = batch_intake(folder, series, tag)
        drafting.append(seconds)
        return path

    ours_s, _ = median_time(ours, repeats)
    floor_s, _ = median_time(floor, repeats)
    blob_s, _ = median_time(blob, repeats)
    batch_s, _ = median_time(batch, repeats)
    draft_s = float(np.median(drafting))
    intake = {"ratio": ours_s / floor_s, "target": 0.5, "ours_s": ours_s, "baseline_s": floor_s, "n": n_series * POINTS_PER_SERIES,
              "blob_s": blob_s, "ours_vs_blob": ours_s / blob_s, "blob_vs_floor": blob_s / floor_s}  # fmt: skip
    batched = {"ratio": batch_s / floor_s, "target": 0.5, "ours_s": batch_s, "baseline_s": floor_s, "n": n_series * POINTS_PER_SERIES,
               "drafts_s": draft_s, "writing_s": batch_s - draft_s, "writing_vs_floor": (batch_s - draft_s) / floor_s,
               "one_event_per_dataset_s": ours_s}  # fmt: skip
    return intake, batched


def streamed_parquet(catalog_path: Path, out: Path) -> int:
    """The table export's way: record batches from the stored arrays into pyarrow's Parquet
    writer (the weight summary worked out in a first pass); gives the rows written."""
    import pyarrow.parquet as pq

    from curate.weighting import Selection, resolve_policy
    from curate.weighting.stream import weighted_stream

    rows = 0
    with curate.open_catalog(catalog_path) as catalog:
        stream = weighted_stream(catalog, resolve_policy(None), Selection())
        with pq.ParquetWriter(out, stream.schema, compression="zstd") as writer:
            for batch in stream.batches():
                writer.write_batch(batch)
                rows += batch.num_rows
    return rows


def case_export(folder: Path, n_series: int, repeats: int) -> dict[str, Any]:
    tag = str(n_series)
    catalog_path, floor_path = folder / f"ours_{tag}.db", folder / f"floor_{tag}.db"

    def whole() -> int:  # before streaming: the whole weighted frame, then one write
        with curate.open_catalog(catalog_path) as catalog:
            table = catalog.weighted_table()
        data = table_bytes(table, "parquet")
        (folder / "whole.parquet").write_bytes(data)
        return len(table)

    def export_folder() -> int:  # what `curate export table` does: CSV, Parquet, README, manifest
        with curate.open_catalog(catalog_path) as catalog:
            result = catalog.export("table", folder / "export_table", force=True)
        return result.summary.n_points

    def baseline() -> int:
        conn = sqlite3.connect(floor_path)
        frame = pd.read_sql("SELECT * FROM points", conn)
        conn.close()
        frame.to_parquet(folder / "baseline.parquet")
        return len(frame)

    ours_s, rows = median_time(lambda: streamed_parquet(catalog_path, folder / "ours.parquet"), repeats)
    baseline_s, _ = median_time(baseline, repeats)
    whole_s, _ = median_time(whole, repeats)
    folder_s, _ = median_time(export_folder, repeats)
    return {"ratio": ours_s / baseline_s, "target": 0.5, "ours_s": ours_s, "baseline_s": baseline_s, "n": rows,
            "whole_frame_s": whole_s, "whole_frame_ratio": whole_s / baseline_s,
            "export_folder_s": folder_s, "export_folder_ratio": folder_s / baseline_s}  # fmt: skip


def long_series_catalog(folder: Path, n_series: int, points: int) -> Path:
    """Log ``n_series`` series of ``points`` points each (added 100 at a time); give the file."""
    path = folder / f"long_{n_series}x{points}.db"
    fresh(folder, path.name)
    rng = np.random.default_rng(1)
    t = np.arange(points, dtype=float) * 3.0
    with curate.open_catalog(path, actor="bench") as catalog:
        for start in range(0, n_series, 100):
            catalog.add_drafts([
                catalog.draft(t, 20 * (1 - np.exp(-t / 900.0)) + rng.normal(0, 0.5, points), sd=np.full(points, 0.5),
                              observable="velarin_conc", unit="nM", time_unit="s", lab=f"Lab {k % 8}",
                              conditions={"dose": float(k % 50), "temperature": 37.0})
                for k in range(start, min(start + 100, n_series))
            ])  # fmt: skip
    return path


def case_export_memory(folder: Path, catalogs: list[Path], whole_up_to: int) -> dict[str, Any]:
    """Peak memory of the streamed Parquet export against the raw float64 data (time, value,
    sd), each size in a fresh process; today's whole-frame way beside it up to
    ``whole_up_to`` points. The ratio is the largest size's resident-set growth over raw."""
    context = multiprocessing.get_context("spawn")

    def measure(path: Path, whole: bool) -> dict[str, Any]:
        queue = context.Queue()
        child = context.Process(target=streamed_export_peak,
                                args=(str(path), str(folder / "peak.parquet"), whole, queue))  # fmt: skip
        child.start()
        found = queue.get(timeout=3600)
        child.join()
        return found

    rows: list[dict[str, Any]] = []
    for path in catalogs:
        with curate.open_catalog(path) as catalog:
            points = sum(v.record.n_points for v in catalog.list())
        raw = points * 3 * 8
        streamed = measure(path, whole=False)
        row = {"points": points, "raw_data_bytes": raw, **{f"stream_{k}": v for k, v in streamed.items()},
               "stream_over_raw": streamed["resident_growth"] / raw}  # fmt: skip
        if points <= whole_up_to:
            old = measure(path, whole=True)
            row.update({f"whole_{k}": v for k, v in old.items()})
            row["whole_over_raw"] = old["resident_growth"] / raw
        rows.append(row)
    last = rows[-1]
    return {"ratio": last["stream_over_raw"], "target": 3.0, "ours_s": last["stream_seconds"],
            "baseline_s": last.get("whole_seconds", float("nan")), "n": last["points"], "sizes": rows}  # fmt: skip


def case_csv_writer(folder: Path, n_series: int, repeats: int) -> dict[str, Any]:
    with curate.open_catalog(folder / f"ours_{n_series}.db") as catalog:
        table = catalog.weighted_table()
    ours_s, _ = median_time(
        lambda: (folder / "ours.csv").write_bytes(table_bytes(table, "csv")), repeats
    )
    baseline_s, _ = median_time(lambda: table.to_csv(folder / "pandas.csv", index=False), repeats)
    return {
        "ratio": ours_s / baseline_s,
        "target": 0.3,
        "ours_s": ours_s,
        "baseline_s": baseline_s,
        "n": len(table),
    }


def sensitivity_problem(n_datasets: int) -> tuple[pd.DataFrame, fitting.ParameterSpec]:
    from bench.ode_model import TRUTH, predict

    rng = np.random.default_rng(7)
    conditions = [(1000.0, 37.0), (10000.0, 37.0), (10000.0, 30.0), (3000.0, 33.0)]
    frames = []
    for k in range(n_datasets):
        dose, temperature = conditions[k % len(conditions)]
        t = np.sort(rng.uniform(0, 120 * 60, 50))
        frame = pd.DataFrame({"time": t, "dose": dose, "temperature": temperature})
        clean = predict(TRUTH, frame) * (30 + 10 * k)
        frame["value"] = clean + rng.normal(0, 0.03 * np.abs(clean).max(), 50)
        frame["weight"] = 1.0 / (0.03 * np.abs(clean).max()) ** 2
        frame["relative"] = True
        frame["dataset_id"] = f"d{k:02d}"
        frame["calibration_group"] = f"d{k:02d}"
        frames.append(frame)
    spec = fitting.spec_from_dict({"parameters": {
        "k_on": {"start": 0.1, "lower": 1e-3, "upper": 10, "log": True},
        "K_d": {"start": 1000.0, "lower": 10, "upper": 1e6, "log": True},
        "k_off": {"start": 0.05, "lower": 1e-3, "upper": 10, "log": True},
        "k_deg": {"start": 0.1, "lower": 1e-3, "upper": 10, "log": True},
        "q10": {"start": 2.0, "lower": 1.0, "upper": 5.0},
    }})  # fmt: skip
    return pd.concat(frames, ignore_index=True), spec


def hand_written_loop(points: pd.DataFrame, spec: fitting.ParameterSpec) -> list[np.ndarray]:
    """The loop a modeller writes by hand: scale factors as free parameters, every refit from
    the original start, one after another."""
    from scipy.optimize import least_squares

    from bench.ode_model import predict

    names = [p.name for p in spec.parameters]
    logs = [p.log for p in spec.parameters]
    ids = sorted(points["dataset_id"].unique())

    def fit(frame: pd.DataFrame) -> np.ndarray:
        present = sorted(frame["dataset_id"].unique())
        index = {d: k for k, d in enumerate(present)}
        group = frame["dataset_id"].map(index).to_numpy()
        y, w = frame["value"].to_numpy(), np.sqrt(frame["weight"].to_numpy())

        def residual(x: np.ndarray) -> np.ndarray:
            params = {
                n: (math.exp(v) if lg else v) for n, v, lg in zip(names, x[:5], logs, strict=True)
            }
            return w * (y - x[5:][group] * predict(params, frame))

        x0 = np.array(
            [math.log(p.start) if p.log else p.start for p in spec.parameters]
            + [1.0] * len(present)
        )
        lower = [math.log(p.lower) if p.log else p.lower for p in spec.parameters] + [0.0] * len(
            present
        )
        upper = [math.log(p.upper) if p.log else p.upper for p in spec.parameters] + [np.inf] * len(
            present
        )
        return least_squares(residual, x0, bounds=(lower, upper), x_scale="jac").x

    results = [fit(points)]
    for left_out in ids:
        results.append(fit(points[points["dataset_id"] != left_out]))
    return results


def case_sensitivity(
    n_datasets: int, repeats: int
) -> tuple[dict[str, Any], dict[str, Any], dict[str, Any]]:
    points, spec = sensitivity_problem(n_datasets)
    model = fitting.PythonFunction.from_reference(f"{HERE / 'ode_model.py'}:predict")
    problem = fitting.FitProblem(points, model, spec)
    labels = points["dataset_id"].to_numpy()

    def exact() -> sensitivity.SensitivityResult:
        full = fitting.fit(problem)
        return sensitivity.leave_one_group_out(
            problem, full, labels, by="dataset", method="exact", workers=2
        )

    def one_step() -> sensitivity.SensitivityResult:
        full = fitting.fit(problem)
        return sensitivity.leave_one_group_out(
            problem, full, labels, by="dataset", method="one-step"
        )

    def auto() -> sensitivity.SensitivityResult:
        full = fitting.fit(problem)
        return sensitivity.leave_one_group_out(
            problem, full, labels, by="dataset", method="auto", workers=2
        )

    exact_s, exact_result = median_time(exact, repeats)
    auto_s, auto_result = median_time(auto, repeats)
    baseline_s, _ = median_time(lambda: hand_written_loop(points, spec), 1)
    one_step_s, one_step_result = median_time(one_step, repeats)
    full_s, _ = median_time(lambda: fitting.fit(problem), repeats)
    errors = []
    for a, b in zip(exact_result.groups, one_step_result.groups, strict=True):
        for name in a.parameters:
            errors.append(abs(a.parameters[name]["shift_se"] - b.parameters[name]["shift_se"]))
    n = len(points)
    return (
        {"ratio": exact_s / baseline_s, "target": 0.12, "ours_s": exact_s, "baseline_s": baseline_s, "n": n, "datasets": n_datasets},
        {"ratio": one_step_s / full_s, "target": 1.2, "ours_s": one_step_s, "baseline_s": full_s, "n": n, "datasets": n_datasets,
         "max_error_se": max(errors), "error_target_se": 0.05},
        {"ratio": auto_s / exact_s, "target": 0.4, "ours_s": auto_s, "baseline_s": exact_s, "n": n, "datasets": n_datasets,
         "same_flags": sorted(auto_result.flags()) == sorted(exact_result.flags()),
         "refitted": len((auto_result.auto or {}).get("refitted", {}))},
    )  # fmt: skip


def close_rates_problem() -> fitting.FitProblem:
    """A closed-form fit along a flat valley: two decays with close rates and a small drift,
    data rounded to 3 significant digits (as tests/flat_valley.py's CloseRates)."""
    t = np.linspace(0.0, 300.0, 41)
    truth = 820 * np.exp(-0.013 * t) + 260 * np.exp(-0.019 * t) + 2.5e-6 * t**2
    noisy = truth * (1 + np.random.default_rng(7).normal(0, 0.004, len(t)))
    points = pd.DataFrame({"time": t, "value": [float(f"{v:.2e}") for v in noisy], "weight": 1.0})

    def model(p: dict[str, float], frame: pd.DataFrame) -> np.ndarray:
        x = frame["time"].to_numpy()
        return p["a1"] * np.exp(-p["k1"] * x) + p["a2"] * np.exp(-p["k2"] * x) + p["d"] * x * x

    starts = {"a1": 700.0, "k1": 0.012, "a2": 350.0, "k2": 0.022, "d": 2.0e-6}
    spec = fitting.spec_from_dict({"parameters": {n: {"start": v} for n, v in starts.items()}})
    return fitting.FitProblem(points, model, spec)


def case_fit_polish(n_datasets: int, repeats: int) -> tuple[dict[str, Any], dict[str, Any]]:
    """The polish's cost: a fit with it against the same fit without it (FitOptions(polish=
    False)), on the ODE problem of the sensitivity case (differences, no complex step) and on
    a closed-form flat-valley problem (complex step). Target 1.3 for the ODE fit (our own: the
    polish must not slow an ordinary fit much), 2.0 for the closed form (milliseconds)."""
    points, spec = sensitivity_problem(n_datasets)
    model = fitting.PythonFunction.from_reference(f"{HERE / 'ode_model.py'}:predict")
    rows = []
    for make, target in ((lambda: fitting.FitProblem(points, model, spec), 1.3),
                         (close_rates_problem, 2.0)):  # fmt: skip
        found = {}
        for polish in (True, False):
            options = fitting.FitOptions(polish=polish)
            seconds, result = median_time(
                lambda make=make, options=options: fitting.fit(make(), options), repeats
            )
            found[polish] = (seconds, result)
        (ours_s, ours), (base_s, base) = found[True], found[False]
        rows.append({"ratio": ours_s / base_s, "target": target, "ours_s": ours_s,
                     "baseline_s": base_s, "n": ours.n_points,
                     "evaluations": ours.evaluations, "baseline_evaluations": base.evaluations,
                     "chi2": ours.chi2, "baseline_chi2": base.chi2,
                     "polished": ours.options.get("polished")})  # fmt: skip
    return rows[0], rows[1]


def case_scaling(folder: Path, sizes: list[int]) -> dict[str, Any]:
    intake_times, export_times, peaks = [], [], []
    context = multiprocessing.get_context("spawn")
    for n_series in sizes:
        series = synthetic_series(n_series, seed=n_series)
        tag = f"scale{n_series}"
        fresh(folder, f"ours_{tag}.db")
        started = time.perf_counter()
        path = ours_intake(folder, series, tag)
        intake_times.append(time.perf_counter() - started)
        started = time.perf_counter()
        streamed_parquet(path, folder / "scale.parquet")
        export_times.append(time.perf_counter() - started)
        queue = context.Queue()
        child = context.Process(  # tracemalloc's peak of the streamed export (Python and numpy)
            target=streamed_export_peak, args=(str(path), str(folder / "peak.parquet"), False, queue)
        )
        child.start()
        peaks.append(queue.get(timeout=3600)["traced_peak"])
        child.join()
    points = np.array(sizes) * POINTS_PER_SERIES
    exponent = lambda times: float(np.polyfit(np.log(points), np.log(times), 1)[0])  # noqa: E731
    raw_bytes = points * 3 * 8  # time, value, sd as float64
    return {
        "ratio": max(exponent(intake_times), exponent(export_times)), "target": 1.1,
        "ours_s": intake_times[-1], "baseline_s": export_times[-1], "n": int(points[-1]),
        "intake_exponent": exponent(intake_times), "export_exponent": exponent(export_times),
        "points": points.tolist(), "intake_s": intake_times, "export_s": export_times,
        "export_peak_bytes": peaks, "raw_data_bytes": raw_bytes.tolist(),
        "peak_over_data": [p / b for p, b in zip(peaks, raw_bytes, strict=True)],
    }  # fmt: skip


def case_report(folder: Path, n_points: int) -> dict[str, Any]:
    """The catalog report of one n-point dataset of pure noise with planted spikes (the hardest
    case to draw) beside a small one: seconds, and the peak memory of the report's process
    against the raw arrays (time, value, sd as float64); the baseline is reading the arrays."""
    path = folder / f"report_{n_points}.db"
    fresh(folder, path.name)
    rng = np.random.default_rng(3)
    value = rng.uniform(0, 1000, n_points)
    value[n_points // 3], value[2 * n_points // 3] = 9000.0, -4000.0
    with curate.open_catalog(path, actor="bench") as catalog:
        catalog.add_drafts([
            catalog.draft(np.arange(n_points, dtype=float), value, sd=rng.uniform(0, 300, n_points),
                          observable="velarin_conc", unit="nM", time_unit="s", lab="Big Lab"),
            catalog.draft(np.arange(10.0), np.arange(10.0) + 500, sd=np.full(10, 5.0),
                          observable="velarin_conc", unit="nM", time_unit="s", lab="Small Lab"),
        ])  # fmt: skip
        ident = catalog.list(lab="Big Lab")[0].id
        baseline_s, _ = median_time(lambda: catalog.arrays(ident), 3)
    queue = multiprocessing.get_context("spawn").Queue()
    child = multiprocessing.get_context("spawn").Process(
        target=report_peak, args=(str(path), str(folder / "report.html"), queue)
    )
    child.start()
    seconds, peak = queue.get(timeout=1800)
    child.join()
    raw = n_points * 3 * 8
    return {"ratio": peak / raw, "target": 16.0, "ours_s": seconds, "baseline_s": baseline_s, "n": n_points,
            "peak_bytes": peak, "raw_data_bytes": raw, "html_bytes": (folder / "report.html").stat().st_size}  # fmt: skip


def main() -> None:
    parser = argparse.ArgumentParser(prog="python -m bench", description=__doc__.split("\n")[0])
    parser.add_argument(
        "--quick", action="store_true", help="small sizes, under two minutes on two cores"
    )
    args = parser.parse_args()
    quick = args.quick
    n_series = 2000 if quick else 10000
    repeats = 3
    results: dict[str, Any] = {}
    with tempfile.TemporaryDirectory(prefix="curate-bench-") as name:
        folder = Path(name)
        print(
            f"curate benchmarks ({'quick' if quick else 'full'}; {os.cpu_count()} cores)",
            flush=True,
        )
        results["workbook_calamine"] = workbook.case_workbook_intake(folder, 10_000, repeats)
        print(f"  workbook done (ratio {results['workbook_calamine']['ratio']:.3f})", flush=True)
        results["folder_intake_scaling"] = folder_intake.case_folder_scaling(
            folder, [300, 3000] if quick else [1000, 10000]
        )
        exponent = results["folder_intake_scaling"]["ratio"]
        print(f"  folder intake done (exponent {exponent:.2f})", flush=True)
        results["intake"], results["intake_batch"] = case_intake(folder, n_series, repeats)
        print(f"  intake done ({results['intake']['ours_s']:.2f} s)", flush=True)
        results["export_parquet"] = case_export(folder, n_series, repeats)
        results["export_csv_writer"] = case_csv_writer(folder, n_series, repeats)
        print("  export done", flush=True)
        exact, one_step, auto = case_sensitivity(8 if quick else 20, 1)
        results["sensitivity_exact"] = exact
        results["sensitivity_one_step"] = one_step
        results["sensitivity_auto"] = auto
        print("  sensitivity done", flush=True)
        ode_fit, closed_fit = case_fit_polish(8 if quick else 20, repeats)
        results["fit_polish_ode"] = ode_fit
        results["fit_polish_closed_form"] = closed_fit
        print("  fit polish done", flush=True)
        results["scaling"] = case_scaling(
            folder, [100, 1000, 10000] if not quick else [100, 1000, 5000]
        )
        if not quick:
            results["scaling_1e7"] = case_scaling(folder, [10000, 100000])
        # 10^6 points: the scaling catalog of 10,000 series (built here in quick mode); 10^7:
        # the full run's scaling catalog of 100,000 series
        million = folder / "ours_scale10000.db"
        if not million.exists():
            ours_intake(folder, synthetic_series(10000, seed=10000), "scale10000")
        sizes = [million, long_series_catalog(folder, 100, 10_000)]
        if not quick:
            sizes += [folder / "ours_scale100000.db", long_series_catalog(folder, 1000, 10_000)]
        results["export_memory"] = case_export_memory(folder, sizes, whole_up_to=1_000_000)
        print("  export memory done", flush=True)
        results["report"] = case_report(folder, 1_000_000 if quick else 10_000_000)
        print(f"  report done ({results['report']['ours_s']:.1f} s)", flush=True)
        for name, short in (
            ("Boehm_JProteomeRes2014", "boehm"),
            ("Fujita_SciSignal2010", "fujita"),
        ):
            results[f"objective_{short}"] = petab_problems.case_objective(folder, name, repeats)
        results["loo_boehm_2_workers"] = petab_problems.case_sensitivity(folder, 1 if quick else 3)
        print("  PEtab problems done", flush=True)
    print()
    print(f"{'case':<22}{'n':>10}{'ours s':>10}{'base s':>10}{'ratio':>9}{'target':>8}  met")
    for case, row in results.items():
        met = row["ratio"] <= row["target"]
        print(
            f"{case:<22}{row['n']:>10}{row['ours_s']:>10.3f}{row['baseline_s']:>10.3f}{row['ratio']:>9.3f}{row['target']:>8}  {'yes' if met else 'NO'}"
        )
    one = results["sensitivity_one_step"]
    print(
        f"one-step largest error against exact refits: {one['max_error_se']:.3f} SE (target {one['error_target_se']})"
    )
    auto = results["sensitivity_auto"]
    print(f"sensitivity auto: {auto['refitted']} of {auto['datasets']} groups refitted exactly; "
          f"the flags of exact refits: {'yes' if auto['same_flags'] else 'NO'}")  # fmt: skip
    for case in ("fit_polish_ode", "fit_polish_closed_form"):
        row = results[case]
        print(f"{case}: model evaluations {row['evaluations']} with the polish, "
              f"{row['baseline_evaluations']} without; chi2 {row['chi2']:.10g} against "
              f"{row['baseline_chi2']:.10g}")  # fmt: skip
    scaling = results["scaling"]
    print(f"scaling exponents: intake {scaling['intake_exponent']:.2f}, export {scaling['export_exponent']:.2f}; "
          "streamed export's traced peak / raw data: " + ", ".join(f"{r:.1f}" for r in scaling["peak_over_data"]))  # fmt: skip
    export = results["export_parquet"]
    print(f"export: the whole weighted frame then one write (before streaming) {export['whole_frame_ratio']:.2f}x; "
          f"`export table` (CSV + Parquet + manifest) {export['export_folder_ratio']:.2f}x the baseline")  # fmt: skip
    for row in results["export_memory"]["sizes"]:
        whole = f", whole frame {row['whole_over_raw']:.1f}x" if "whole_over_raw" in row else ""
        print(f"export peak memory at {row['points']:,} points: resident growth {row['stream_over_raw']:.2f}x the raw "
              f"data (pyarrow pool peak {row['stream_arrow_pool_peak'] / row['raw_data_bytes']:.2f}x, "
              f"tracemalloc {row['stream_traced_peak'] / row['raw_data_bytes']:.2f}x){whole}")  # fmt: skip
    batched = results["intake_batch"]
    print(f"intake_batch: drafts {batched['drafts_s']:.2f} s (one by one), writing and sealing {batched['writing_s']:.2f} s "
          f"({batched['writing_vs_floor']:.2f}x the floor); one event per dataset: {batched['one_event_per_dataset_s']:.2f} s")  # fmt: skip
    print(
        f"intake vs one BLOB row per series: {results['intake']['ours_vs_blob']:.1f}x (BLOB rows are "
        f"{results['intake']['blob_vs_floor']:.2f}x the row-per-point floor)"
    )
    (HERE / "results.json").write_text(json.dumps(results, indent=2) + "\n")
    print(f"written: {HERE / 'results.json'}")


if __name__ == "__main__":
    main()
