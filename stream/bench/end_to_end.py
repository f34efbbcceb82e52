"""The end-to-end and memory suites: ``sapwood learn`` as a child process on generated CSV
files, against a bare ``pandas.read_csv`` of the same file, and its peak memory."""

from __future__ import annotations

import dataclasses
import importlib.util
import json
import math
import os
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Callable, Iterable

import numpy as np

from stream.child_env import CODE_ROOT, same_code_env
from stream.errors import SapwoodError

from .common import (MB, Bench, Check, Column, SuiteResult, fmt_count, fmt_mb, fmt_pct,
                     fmt_ratio, register)


def write_sea_csv(path: Path, rows: int, seed: int, chunk: int = 250_000,
                  tag: bool = False) -> Path:
    """Write a CSV of the SEA concept (Street & Kim 2001), drawn with numpy in chunks.

    Columns x0, x1, x2 uniform in [0, 10] with 4 decimals, ``label`` ``yes`` when
    x0 + x1 <= 8, flipped for 10 % of the rows. With ``tag``, a first column ``tag``
    holds a different text value in every row (a category with as many values as rows).
    """
    import pandas as pd

    rng = np.random.default_rng(seed)
    tags = np.random.default_rng(seed + 1).permutation(rows) if tag else None
    with open(path, "w", encoding="utf-8", newline="") as out:
        out.write(("tag," if tag else "") + "x0,x1,x2,label\n")
        for first in range(0, rows, chunk):
            k = min(chunk, rows - first)
            X = rng.uniform(0.0, 10.0, (k, 3))
            positive = (X[:, 0] + X[:, 1] <= 8.0) ^ (rng.random(k) < 0.1)
            columns = {"x0": X[:, 0], "x1": X[:, 1], "x2": X[:, 2],
                       "label": np.where(positive, "yes", "no")}
            if tags is not None:
                columns = {"tag": np.char.add("t", tags[first:first + k].astype(str)),
                           **columns}
            out.write(pd.DataFrame(columns).to_csv(index=False, header=False,
                                                   float_format="%.4f"))
    return path


def _demo_generator():
    """demo/reefer_fleet.py of a source checkout, or None (it is not installed)."""
    path = CODE_ROOT / "demo" / "reefer_fleet.py"
    if not path.exists():
        return None
    spec = importlib.util.spec_from_file_location("sapwood_demo_reefer_fleet", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _write_reefer_csv(path: Path, rows: int, seed: int) -> Path:
    module = _demo_generator()
    if module is None:
        raise FileNotFoundError("demo/reefer_fleet.py (only in a source checkout)")
    return module.write_csv(path, rows, seed=seed)


@dataclasses.dataclass(frozen=True)
class CsvWorkload:
    """A CSV file the end-to-end suite writes, and the field to learn."""

    title: str
    target: str
    write: Callable[[Path, int, int], Path]


WORKLOADS: dict[str, CsvWorkload] = {
    "sea-numeric": CsvWorkload("SEA concept: 3 numeric columns (4 decimals) and a yes/no "
                               "label", "label", write_sea_csv),
    "reefer-telemetry": CsvWorkload("the demo's invented reefer fleet: id, ISO time, 3 "
                                    "categories, 7 readings with 2% gaps, yes/no label",
                                    "excursion_next_hour", _write_reefer_csv),
}
"""End-to-end files by name; each is checked against the >= 0.5 target."""


@dataclasses.dataclass
class ChildRun:
    """One ``sapwood learn -`` child: its summary, peak memory (MB) and wall time."""

    summary: dict
    peak_mb: float | None
    wall_seconds: float


def _vm_hwm_kb(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/status", "rb") as status:
            for line in status:
                if line.startswith(b"VmHWM:"):
                    return int(line.split()[1])
    except (OSError, ValueError, IndexError):
        pass
    return 0


def _feed(path: Path, pipe) -> None:
    try:
        with open(path, "rb") as source:
            shutil.copyfileobj(source, pipe, 1 << 20)
    except BrokenPipeError:  # the child stopped reading; its exit code tells why
        pass
    finally:
        try:
            pipe.close()
        except BrokenPipeError:
            pass


def learn_child(bench: Bench, path: Path | None, target: str, pipe: bool,
                poll_seconds: float = 0.005, source: str = "-",
                extra: Iterable[str] = ()) -> ChildRun:
    """Run ``sapwood learn SOURCE --target TARGET [EXTRA...]``; SOURCE ``-`` reads ``path``
    on stdin.

    ``pipe`` feeds the file through a pipe (a stream, as from another program) instead
    of handing the child the open file. Any other SOURCE (a file name, a broker URL) is
    read by the child itself, ``path`` is then None. The child is ``python -m
    stream.cli``, the program the ``sapwood`` script runs, with this interpreter and
    this copy of sapwood.
    """
    summary_path = bench.workdir / "child-summary.json"
    errors_path = bench.workdir / "child-stderr.txt"
    summary_path.unlink(missing_ok=True)
    command = [sys.executable, "-m", "stream.cli", "learn", source, "--target", target,
               "--summary", str(summary_path), "--quarantine",
               str(bench.workdir / "child-quarantine.jsonl"), "-q", *extra]
    pipe = pipe and path is not None
    measured = Path("/proc/self/status").exists()
    with open(errors_path, "wb") as errors, \
            open(path if path is not None else os.devnull, "rb") as source_file:
        start = bench.clock()
        child = subprocess.Popen(command, stdin=subprocess.PIPE if pipe else source_file,
                                 stdout=subprocess.DEVNULL, stderr=errors,
                                 cwd=bench.workdir, env=same_code_env())
        feeder = None
        if pipe:
            feeder = threading.Thread(target=_feed, args=(path, child.stdin), daemon=True)
            feeder.start()
        peak = 0
        while child.poll() is None:
            peak = max(peak, _vm_hwm_kb(child.pid))
            time.sleep(poll_seconds)
        wall = bench.clock() - start
        if feeder is not None:
            feeder.join()
    if child.returncode != 0 or not summary_path.exists():
        lines = errors_path.read_text(errors="replace").strip().splitlines()
        raise SapwoodError(f"sapwood learn exited with code {child.returncode}: "
                           f"{lines[-1] if lines else 'no message'}")
    summary = json.loads(summary_path.read_text())
    return ChildRun(summary, peak * 1024 / MB if measured and peak else None, wall)


def warm_child(bench: Bench) -> dict:
    """One small child run first, so that timed children load compiled kernels from the
    on-disk cache instead of compiling them (compiling takes about a minute and far
    more memory than learning)."""
    if bench._child_warm is None:
        path = write_sea_csv(bench.workdir / "warm-up.csv", 500, bench.seed)
        bench.say("child warm-up: sapwood learn on 500 rows (fills the kernel cache if empty)")
        run = learn_child(bench, path, "label", pipe=True)
        bench._child_warm = {"wall_seconds": run.wall_seconds, "peak_mb": run.peak_mb,
                             "startup_seconds": run.summary.get("startup_seconds")}
    return bench._child_warm


def warm_note(warm: dict) -> str:
    peak = "n/a" if warm["peak_mb"] is None else f"{warm['peak_mb']:,.0f} MB"
    return (f"A 500-row warm-up child ran first so timed children find the compiled "
            f"kernels on disk (warm-up: {warm['wall_seconds']:.1f} s wall, peak {peak}).")


@register("end-to-end")
def end_to_end_suite(bench: Bench) -> SuiteResult:
    """``sapwood learn -`` on a CSV on stdin against a bare ``pandas.read_csv``."""
    import pandas as pd

    result = SuiteResult(
        "end-to-end",
        f"end-to-end: sapwood learn - < FILE vs pandas.read_csv(FILE), {bench.csv_rows:,} "
        f"rows, best of {bench.repeats} each",
        [Column("workload", "file", left=True), Column("rows", "rows", fmt_count),
         Column("file_mb", "MB", fmt_mb),
         Column("pandas_rps", "read_csv rows/s", fmt_count),
         Column("sapwood_rps", "sapwood rec/s", fmt_count), Column("ratio", "ratio", fmt_ratio),
         Column("sapwood_wall_seconds", "child wall s", lambda v: f"{v:.2f}"),
         Column("accuracy", "accuracy", fmt_pct), Column("target", "target", left=True)])
    warm = warm_child(bench)
    for name, workload in WORKLOADS.items():
        path = bench.workdir / f"{name}.csv"
        start = bench.clock()
        bench.say(f"end-to-end: writing {name} ({bench.csv_rows:,} rows)")
        try:
            workload.write(path, bench.csv_rows, bench.seed)
        except FileNotFoundError as missing:
            result.notes.append(f"{name}: skipped, {missing} not found.")
            continue
        bench.say(f"end-to-end: {name} written in {bench.clock() - start:.1f} s")
        read_seconds, rows = math.inf, 0
        for _ in range(bench.repeats):
            start = bench.clock()
            frame = pd.read_csv(path)
            read_seconds = min(read_seconds, bench.clock() - start)
            rows = len(frame)
            del frame
        runs = []
        for k in range(bench.repeats):
            bench.say(f"end-to-end: {name}: sapwood learn run {k + 1} of {bench.repeats}")
            runs.append(learn_child(bench, path, workload.target, pipe=False))
        best = max(runs, key=lambda r: r.summary["records_per_second"] or 0.0)
        s = best.summary
        row = {"workload": name, "rows": rows, "file_mb": path.stat().st_size / MB,
               "pandas_rps": rows / read_seconds, "pandas_seconds": read_seconds,
               "sapwood_rps": s["records_per_second"], "sapwood_seconds": s["seconds"],
               "sapwood_records": s["records"], "sapwood_quarantined": s["quarantined"],
               "sapwood_wall_seconds": best.wall_seconds, "sapwood_peak_mb": best.peak_mb,
               "startup_seconds": s.get("startup_seconds"), "accuracy": s["accuracy"],
               "all_runs_rps": [r.summary["records_per_second"] for r in runs]}
        row["ratio"] = (row["sapwood_rps"] or 0.0) / row["pandas_rps"]
        check = Check(f"{name}: sapwood learn records/s / pandas.read_csv rows/s",
                      row["ratio"], 0.5, ">=", "x")
        row["target"] = check.verdict()
        result.rows.append(row)
        result.checks.append(check)
        if s["records"] != rows:
            result.notes.append(f"{name}: WARNING: sapwood counted {s['records']:,} records, "
                                f"pandas {rows:,} rows.")
        path.unlink()
    result.notes.append("sapwood's rate is the summary's records_per_second: from opening "
                        "stdin to the last record learned (parsing, encoding, scoring, "
                        "learning, metrics), without interpreter start and kernel loading; "
                        "'child wall s' is the whole process.")
    result.notes.append(warm_note(warm))
    for name, workload in WORKLOADS.items():
        result.notes.append(f"{name}: {workload.title}; seed {bench.seed}.")
    return result


@register("memory")
def memory_suite(bench: Bench) -> SuiteResult:
    """Peak memory of ``sapwood learn -`` on a short and a long stream through a pipe, and
    on the short one with a category holding a different value in every row."""
    small, large = bench.memory_rows
    result = SuiteResult(
        "memory",
        f"memory: peak of sapwood learn - reading {small:,} and {large:,} rows through a pipe",
        [Column("stream", "stream", left=True), Column("rows", "rows", fmt_count),
         Column("peak_mb", "peak MB", fmt_mb),
         Column("sapwood_rps", "sapwood rec/s", fmt_count),
         Column("wall_seconds", "child wall s", lambda v: f"{v:.2f}")])
    warm = warm_child(bench)
    peaks = {}
    for rows, tag in ((small, False), (large, False), (small, True)):
        path = bench.workdir / f"memory-{rows}{'-tag' if tag else ''}.csv"
        bench.say(f"memory: writing {rows:,} rows, then sapwood learn - through a pipe")
        write_sea_csv(path, rows, bench.seed, tag=tag)
        run = learn_child(bench, path, "label", pipe=True)
        path.unlink()
        peaks[rows, tag] = run.peak_mb
        result.rows.append({"stream": f"SEA + {rows:,}-value tag" if tag else "SEA",
                            "rows": rows, "peak_mb": run.peak_mb,
                            "sapwood_rps": run.summary["records_per_second"],
                            "wall_seconds": run.wall_seconds,
                            "sapwood_records": run.summary["records"]})
        if run.summary["records"] != rows:
            result.notes.append(f"WARNING: sapwood counted {run.summary['records']:,} of "
                                f"{rows:,} rows.")
    plain, long, tagged = peaks[small, False], peaks[large, False], peaks[small, True]
    growth = long / plain if long is not None and plain else None
    many = tagged / plain if tagged is not None and plain else None
    result.checks = [
        Check(f"peak memory, {large:,} rows on stdin", long, 300.0, "<=", "MB"),
        Check(f"peak memory, {large:,} rows / {small:,} rows", growth, 1.2, "<=", "x"),
        Check(f"peak memory, {small:,} rows with a {small:,}-value category", tagged, 500.0,
              "<=", "MB"),
        Check("peak memory with that category / without it", many, 2.0, "<=", "x"),
    ]
    result.notes.append("The tag column: a different text value in every row, read as a "
                        "category (its first 1,000 values kept apart, later ones pooled "
                        "as one: --category-cap).")
    result.notes.append("Peak = the child's VmHWM (Linux /proc, polled every 5 ms), whole "
                        "process: interpreter, numpy, pandas, numba and the loaded kernels "
                        "included; 1 MB = 10^6 bytes. Data: the SEA-concept CSV of the "
                        "end-to-end suite.")
    result.notes.append(warm_note(warm))
    return result
