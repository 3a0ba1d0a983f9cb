"""Timing one case: a request through django.test.Client, or a batch job, with its queries and SQL time.

Each case runs `repeats` times; we keep the median and the maximum wall time, the query count and
SQL time of the median run, and for exports a separate run under tracemalloc for the peak memory
(tracemalloc slows Python down, so it never overlaps a timed run). A case may also measure a floor: the
cost of the library that writes its file, alone on the same rows (no Django), once after the timed runs. Writes (round saves, rule runs)
happen inside a transaction that is rolled back, so every repeat starts from the same data.
"""
import logging
import re
import statistics
import time
import tracemalloc
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Callable

from django.db import connection, transaction

from .template_floor import template_alone_ms


@dataclass
class Case:
    name: str
    role: str
    run: Callable[[], dict]  # performs the work once; returns facts ({"status", "bytes", "rows", ...})
    kind: str = "page"  # page | figure | export | job
    before: Callable[[], None] | None = None  # untimed preparation before each repeat (e.g. clear the cache)
    rollback: bool = False
    expect: tuple[int, ...] = (200,)
    notes: str = ""
    repeats: int | None = None  # None: the command's --repeats
    warm_up: bool | None = None  # an untimed first run (imports, template loading); default: pages and figures
    floor: Callable[[], dict] | None = None  # the library alone on the same rows: {"rows", "seconds", "cpu_s", "what"}


@dataclass
class SqlTimer:
    """Counts a run's queries and times their execute calls; keeps the SELECTs to replay them.

    The execute call alone under-states a read's cost: SQLite returns from it at the first row and
    steps through the rest (with every correlated subquery) while the ORM fetches, outside the
    wrapper. `replayed_ms()` runs the kept SELECTs again and reads every row, which is the database's
    full share of the page.
    """
    queries: int = 0
    seconds: float = 0.0
    selects: list = field(default_factory=list)
    other_seconds: float = 0.0

    def __call__(self, execute, sql, params, many, context):
        started = time.perf_counter()
        try:
            return execute(sql, params, many, context)
        finally:
            took = time.perf_counter() - started
            self.seconds += took
            self.queries += 1
            if not many and sql.lstrip()[:6].upper() in ("SELECT", "WITH ", "WITH\n"):
                self.selects.append((sql, params))
            else:
                self.other_seconds += took

    def replayed_ms(self) -> float:
        """SQL time with every row fetched: the SELECTs run again (read-only), plus the other statements' time."""
        total = self.other_seconds
        with connection.cursor() as cursor:
            for sql, params in self.selects:
                started = time.perf_counter()
                cursor.execute(sql, params)
                cursor.fetchall()
                total += time.perf_counter() - started
        return total * 1000


@dataclass
class Result:
    name: str
    role: str
    kind: str
    runs_ms: list = field(default_factory=list)
    cpu_ms: list = field(default_factory=list)  # process CPU time: less sensitive to a busy machine
    queries: int | None = None
    sql_ms: float | None = None
    status: int | None = None
    ok: bool = True
    error: str = ""
    notes: str = ""
    rows: int | None = None
    bytes: int | None = None
    peak_mib: float | None = None
    streaming: bool | None = None  # the response streamed its body (memory independent of rows)
    floor_rows_per_s: float | None = None  # the library alone (Case.floor), wall time as rows_per_s
    floor_cpu_rows_per_s: float | None = None
    floor_what: str = ""
    template_ms: float | None = None  # pages: the template engine alone on the page's context (template_floor.py)

    @property
    def median_ms(self):
        return statistics.median(self.runs_ms) if self.runs_ms else None

    @property
    def max_ms(self):
        return max(self.runs_ms) if self.runs_ms else None

    @property
    def rows_per_s(self):
        if self.rows and self.median_ms:
            return self.rows / (self.median_ms / 1000)
        return None

    def as_dict(self) -> dict:
        out = {k: v for k, v in self.__dict__.items()}
        out.update(median_cpu_ms=statistics.median(self.cpu_ms) if self.cpu_ms else None, median_ms=self.median_ms, max_ms=self.max_ms, rows_per_s=self.rows_per_s, repeats=len(self.runs_ms))
        return out


@contextmanager
def _maybe_rollback(rollback: bool):
    if not rollback:
        yield
        return
    with transaction.atomic():
        yield
        transaction.set_rollback(True)


def _once(case: Case) -> tuple[float, SqlTimer, dict]:
    if case.before:
        case.before()
    timer = SqlTimer()
    with _maybe_rollback(case.rollback), connection.execute_wrapper(timer):
        started, cpu = time.perf_counter(), time.process_time()
        facts = case.run()
        elapsed = time.perf_counter() - started
        facts["cpu_s"] = time.process_time() - cpu
    return elapsed, timer, facts


@contextmanager
def quiet_request_logs():
    """The 4xx/5xx warnings Django logs per request: the table reports failures, the log would repeat them."""
    loggers = [logging.getLogger(name) for name in ("django.request", "django.security")]
    levels = [logger.level for logger in loggers]
    for logger in loggers:
        logger.setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        for logger, level in zip(loggers, levels):
            logger.setLevel(level)


def measure(case: Case, repeats: int, memory: bool = True) -> Result:
    """Run a case; a failure (exception or unexpected status) is reported in the result, not raised."""
    result = Result(case.name, case.role, case.kind, notes=case.notes)
    samples = []
    if case.warm_up if case.warm_up is not None else case.kind in ("page", "figure"):
        try:
            _once(case)
        except Exception:
            pass  # the timed run below reports it
    for _ in range(max(1, case.repeats or repeats)):
        try:
            elapsed, timer, facts = _once(case)
        except Exception as exc:  # reported in the table: that is what the benchmark is for
            result.ok, result.error = False, f"{type(exc).__name__}: {exc}"[:300]
            break
        result.status = facts.get("status")
        if result.status is not None and result.status not in case.expect:
            result.ok = False
            result.error = facts.get("error") or f"HTTP {result.status}, expected {'/'.join(map(str, case.expect))}"
        result.rows, result.bytes = facts.get("rows"), facts.get("bytes")
        result.streaming = facts.get("streaming")
        samples.append((elapsed, timer))
        result.cpu_ms.append(facts["cpu_s"] * 1000)
    if samples:
        result.runs_ms = [s[0] * 1000 for s in samples]
        median = sorted(samples, key=lambda s: s[0])[len(samples) // 2]
        result.queries, result.sql_ms = median[1].queries, median[1].seconds * 1000
        if case.kind in ("page", "figure") and not case.rollback:
            try:
                result.sql_ms = median[1].replayed_ms()
            except Exception:  # a statement that cannot be replayed alone: keep the execute time
                pass
    if case.kind == "page" and result.ok and not case.rollback:
        try:
            result.template_ms = template_alone_ms(case.run)
        except Exception:  # the floor is information; a page that cannot be re-rendered keeps none
            result.template_ms = None
    if memory and case.kind == "export" and result.ok:
        result.peak_mib = _peak_mib(case)
    if case.floor and result.ok:
        floor = case.floor()
        result.floor_what = floor["what"]
        result.floor_rows_per_s = floor["rows"] / floor["seconds"]
        result.floor_cpu_rows_per_s = floor["rows"] / floor["cpu_s"]
    return result


def _peak_mib(case: Case) -> float | None:
    tracemalloc.start()
    try:
        _once(case)
        return tracemalloc.get_traced_memory()[1] / 2**20
    except Exception:
        return None
    finally:
        tracemalloc.stop()


def consume(response) -> dict:
    """Read a response as a browser would (streamed bodies chunk by chunk) and count its bytes and lines."""
    size = lines = 0
    chunks = response.streaming_content if response.streaming else [response.content]
    for chunk in chunks:
        size += len(chunk)
        lines += chunk.count(b"\n")
    facts = {"status": response.status_code, "bytes": size, "lines": lines, "streaming": response.streaming}
    if response.status_code >= 400 and not response.streaming:
        text = response.content.decode(errors="replace")
        title = re.search(r"<title>(.*?)</title>", text, re.S)
        summary = " ".join((title.group(1) if title else text[:160]).split())
        facts["error"] = f"HTTP {response.status_code}: {summary}"
    return facts
