"""The results as text for the terminal, Markdown for the contributor guide, and JSON."""

from __future__ import annotations

import json
import math
import os
import platform
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .common import Bench, SuiteResult


def environment() -> dict:
    """Versions and machine facts printed above the tables and stored in the JSON."""
    import numba
    import pandas
    import river

    try:
        load = os.getloadavg()[0]
    except OSError:  # pragma: no cover - not on every platform
        load = None
    return {"started": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "python": platform.python_version(), "numpy": np.__version__,
            "pandas": pandas.__version__, "numba": numba.__version__,
            "river": river.__version__, "platform": platform.platform(),
            "cpus": os.cpu_count(), "load_average": load}


def _header_line(env: dict) -> str:
    load = "n/a" if env["load_average"] is None else f"{env['load_average']:.1f}"
    return (f"sapwood bench, {env['started']}: python {env['python']}, numpy {env['numpy']}, "
            f"pandas {env['pandas']}, numba {env['numba']}, river {env['river']}; "
            f"{env['cpus']} CPUs, load average {load} at start")


def _table(result: SuiteResult) -> list[str]:
    heads = [c.header for c in result.columns]
    cells = result.cells()
    widths = [max([len(h)] + [len(r[i]) for r in cells]) for i, h in enumerate(heads)]

    def line(values: list[str]) -> str:
        return "  ".join(v.ljust(w) if c.left else v.rjust(w)
                         for v, w, c in zip(values, widths, result.columns)).rstrip()
    return [line(heads), line(["-" * w for w in widths])] + [line(r) for r in cells]


def _verdicts(results: list[SuiteResult]) -> list[str]:
    checks = [c for r in results for c in r.checks]
    met = sum(1 for c in checks if c.met)
    missed = [c for c in checks if c.met is False]
    lines = [f"targets: {met} met, {len(missed)} missed, "
             f"{len(checks) - met - len(missed)} not measured"]
    lines += [f"  {c.describe()}" for c in missed]
    return lines


def render_text(results: list[SuiteResult], env: dict) -> str:
    """Aligned tables for a terminal, one per suite, then the target checks."""
    lines = [_header_line(env), ""]
    for result in results:
        lines.append(result.title)
        lines += _table(result)
        if result.name != "learners":
            lines += [f"  {c.describe()}" for c in result.checks]
        lines += [f"  note: {n}" for n in result.notes]
        lines.append("")
    return "\n".join(lines + _verdicts(results)) + "\n"


def render_markdown(results: list[SuiteResult], env: dict) -> str:
    """The same tables in Markdown, for a report or a ticket."""
    lines = [f"# {_header_line(env)}", ""]
    for result in results:
        lines += [f"## {result.title}", ""]
        lines.append("| " + " | ".join(c.header for c in result.columns) + " |")
        lines.append("|" + "|".join(":---" if c.left else "---:" for c in result.columns)
                     + "|")
        lines += ["| " + " | ".join(r) + " |" for r in result.cells()]
        lines.append("")
        lines += [f"- {c.describe()}" for c in result.checks]
        lines += [f"- note: {n}" for n in result.notes]
        lines.append("")
    return "\n".join(lines + _verdicts(results)) + "\n"


def _json_value(value):
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        return float(value) if math.isfinite(value) else None
    raise TypeError(f"cannot write {type(value).__name__} as JSON")


def results_payload(results: list[SuiteResult], env: dict, bench: Bench) -> dict:
    """Everything measured, as JSON-able data."""
    return {"environment": env, "settings": bench.to_dict(),
            "suites": {r.name: r.to_dict() for r in results}}


def write_outputs(path: str, results: list[SuiteResult], env: dict, bench: Bench) -> list[Path]:
    """Write ``path`` as JSON and the Markdown tables beside it (same name, ``.md``)."""
    target = Path(path)
    json_path = target if target.suffix != ".md" else target.with_suffix(".json")
    md_path = target.with_suffix(".md")
    json_path.parent.mkdir(parents=True, exist_ok=True)
    json_path.write_text(json.dumps(results_payload(results, env, bench), indent=2,
                                    default=_json_value) + "\n", encoding="utf-8")
    md_path.write_text(render_markdown(results, env), encoding="utf-8")
    return [json_path, md_path]
