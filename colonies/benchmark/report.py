"""The benchmark's table and JSON file."""
import json
import os
import statistics
import platform

import django
from django.db import connection

from .targets import target_for, verdict

HEADER = ("page", "role", "median ms", "max ms", "queries", "SQL ms", "target", "verdict", "notes")


def bare_page_ms(results) -> float | None:
    """The bare page's median (targets.verdict's floor for the 3x SQL rule); None when it was not timed."""
    return next((r.median_ms for r in results if r.kind == "floor" and r.ok), None)


def judged(r, bare_ms: float | None = None) -> dict:
    """The result's target and verdict, as the table and the JSON show them."""
    target = target_for(r.name, r.kind)
    outcome, detail = verdict(r, target, bare_ms)
    return {"target": target.describe() if target else "", "target_ms": target.ms if target else None,
            "target_sql_factor": target.sql_factor if target else None,
            "target_rows_per_s": target.rows_per_s if target else None, "verdict": outcome, "verdict_detail": detail}


def _notes(r) -> str:
    parts = []
    if not r.ok:
        parts.append(f"FAILED: {r.error}")
    if r.cpu_ms:
        parts.append(f"CPU {statistics.median(r.cpu_ms):,.0f} ms")
    if r.rows is not None and r.rows_per_s:
        parts.append(f"{r.rows} rows, {r.rows_per_s:,.0f} rows/s")
    if r.bytes is not None and r.kind == "export":
        parts.append(f"{r.bytes / 2**20:.1f} MiB")
    if r.peak_mib is not None:
        parts.append(f"peak {r.peak_mib:.0f} MiB")
    if r.template_ms is not None:
        parts.append(f"template alone {r.template_ms:,.1f} ms")
    if r.floor_rows_per_s:
        parts.append(f"floor: {r.floor_what} alone {r.floor_rows_per_s:,.0f} rows/s "
                     f"({r.floor_cpu_rows_per_s:,.0f} rows/s of CPU)")
    if r.notes:
        parts.append(r.notes)
    return "; ".join(parts)


def _num(value, fmt="{:,.0f}") -> str:
    return "" if value is None else fmt.format(value)


def _verdict_cell(r, bare_ms) -> str:
    j = judged(r, bare_ms)
    return f"{j['verdict']}: {j['verdict_detail']}" if j["verdict_detail"] else j["verdict"]


def table(results) -> str:
    bare_ms = bare_page_ms(results)
    rows = [HEADER] + [(r.name, r.role, _num(r.median_ms, "{:,.1f}"), _num(r.max_ms, "{:,.1f}"), _num(r.queries),
                        _num(r.sql_ms, "{:,.1f}"), judged(r)["target"], _verdict_cell(r, bare_ms), _notes(r))
                       for r in results]
    widths = [max(len(row[i]) for row in rows) for i in range(len(HEADER) - 1)]
    lines = []
    for n, row in enumerate(rows):
        lines.append("| " + " | ".join(cell.ljust(w) for cell, w in zip(row, widths)) + f" | {row[-1]} |")
        if n == 0:
            lines.append("|" + "|".join("-" * (w + 2) for w in widths) + "|---|")
    return "\n".join(lines)


def document(*, options: dict, build: dict, results, seconds: float) -> dict:
    return {
        "engine": connection.vendor, "django": django.get_version(), "python": platform.python_version(),
        "load_average": os.getloadavg(), "options": options, "build": build, "total_seconds": round(seconds, 1),
        "results": [{**r.as_dict(), **judged(r, bare_page_ms(results))} for r in results],
    }


def write_json(path: str, doc: dict) -> None:
    with open(path, "w") as handle:
        json.dump(doc, handle, indent=1, default=str)
