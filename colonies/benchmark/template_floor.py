"""How long Django's template engine alone takes to write a page's HTML: the page's second floor.

The 3x SQL rule asks that a page's own work be SQL-bound. Two costs are not the page's own: what every
request pays (the bare page: session, login, middleware, base template) and what the template engine
spends writing this page's HTML. The second is measured here: one extra request records the outermost
template render (its template, context and request); that render is then repeated on the same context,
with its SQL (context processors, querysets the template evaluates) timed and taken out. The context's
querysets were evaluated by the recorded request and keep their rows, so what is left is the engine's
own work on this page's content.
"""
import statistics
import time
from contextlib import contextmanager

from django.db import connection
from django.template.backends.django import Template


@contextmanager
def _record_outermost_render(store: list):
    original = Template.render
    depth = [0]

    def render(self, context=None, request=None):
        if depth[0] == 0 and not store:
            store.append((self, context, request))
        depth[0] += 1
        try:
            return original(self, context, request)
        finally:
            depth[0] -= 1

    Template.render = render
    try:
        yield
    finally:
        Template.render = original


def template_alone_ms(run, repeats: int = 5) -> float | None:
    """Median ms the outermost template render of `run()` takes on its recorded context, less its SQL;
    None when the run renders no template (a redirect, a file)."""
    from .timing import SqlTimer

    recorded: list = []
    with _record_outermost_render(recorded):
        run()
    if not recorded:
        return None
    template, context, request = recorded[0]
    samples = []
    for _ in range(repeats):
        timer = SqlTimer()
        with connection.execute_wrapper(timer):
            started = time.perf_counter()
            template.render(context, request)
            elapsed = time.perf_counter() - started
        samples.append(max(0.0, elapsed - timer.seconds) * 1000)
    return statistics.median(samples)
