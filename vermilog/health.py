"""GET /healthz/: is this app server able to serve? For a load balancer or a monitor, without login.

One cheap query on the database and a set/get on the shared cache. 200 with {"status": "ok", ...}
when both answer, 503 naming the part that failed. The body never carries an error message (it could
name a host, a user or a path); the exception goes to the server's log instead.
"""
import logging
import uuid

from django.contrib.auth.decorators import login_not_required
from django.core.cache import cache
from django.db import connection
from django.http import JsonResponse
from django.views.decorators.cache import never_cache
from django.views.decorators.http import require_safe

log = logging.getLogger(__name__)
PROBE_KEY = "vermilog:healthz"


def _database() -> bool:
    with connection.cursor() as cursor:
        cursor.execute("SELECT 1")
        return cursor.fetchone() == (1,)


def _cache() -> bool:
    token = uuid.uuid4().hex  # a fresh value, so an old entry cannot pass for a working cache
    cache.set(PROBE_KEY, token, 30)
    return cache.get(PROBE_KEY) == token


CHECKS = {"database": _database, "cache": _cache}


def _run(name, check) -> str:
    try:
        return "ok" if check() else "fail"
    except Exception:
        log.exception("Health check: the %s failed", name)
        return "fail"


@login_not_required
@require_safe
@never_cache
def healthz(request):
    parts = {name: _run(name, check) for name, check in CHECKS.items()}
    healthy = all(v == "ok" for v in parts.values())
    return JsonResponse({"status": "ok" if healthy else "fail", **parts}, status=200 if healthy else 503)
