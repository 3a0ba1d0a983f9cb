import statistics
import time

from django.core.cache import cache
from django.core.management.base import BaseCommand, CommandError

from colonies import health_plots, health_views
from colonies.models import Tank


class Command(BaseCommand):
    help = ("Time the colony-health plots: first render (cache entry removed) against cached re-renders, for one "
            "tank's figure and the facility overview. Reads only; removes just the cache entries it measures.")

    def add_arguments(self, parser):
        parser.add_argument("--tank", help="Tank code (default: the tank in use with the most checks).")
        parser.add_argument("--days", type=int, default=health_views.DEFAULT_PLOT_DAYS,
                            choices=health_views.PERIOD_DAYS, help="Plot period in days (default 120).")
        parser.add_argument("--format", default="png", choices=["png", "svg"])
        parser.add_argument("--repeat", type=int, default=5, help="Cached re-renders to time (default 5).")

    def handle(self, *args, tank, days, format, repeat, **options):
        target = self._tank(tank)
        fmt = format
        tank_first, tank_cached, size = self._measure(
            lambda: health_plots.tank_plot_key(target, days, fmt),
            lambda: health_plots.render_tank_plot(target, days, fmt), repeat)
        self._line(f"Tank {target.code}, {days} days, {fmt}", tank_first, tank_cached, size)
        over_days = health_views.DEFAULT_MORTALITY_DAYS
        over_first, over_cached, size = self._measure(
            lambda: health_plots.overview_plot_key(over_days, fmt),
            lambda: health_plots.render_overview_plot(over_days, fmt), repeat)
        n = Tank.objects.in_use().count()
        self._line(f"Overview, {n} tanks, {over_days} days, {fmt}", over_first, over_cached, size)

    def _tank(self, code):
        if code:
            found = Tank.objects.select_related("room", "species").prefetch_related(
                "species__targets", "target_overrides").filter(code=code).first()
            if found is None:
                raise CommandError(f"Tank {code!r} does not exist.")
            return found
        from django.db.models import Count
        found = (Tank.objects.in_use().select_related("room", "species")
                 .prefetch_related("species__targets", "target_overrides")
                 .annotate(n=Count("check")).order_by("-n", "code").first())
        if found is None:
            raise CommandError("No tank in use; load the demo first (manage.py load_demo).")
        return found

    def _measure(self, key, render, repeat):
        cache.delete(key())
        started = time.perf_counter()
        body, hit = render()
        first = time.perf_counter() - started
        if hit:
            raise CommandError("The first render came from the cache; is another process filling it?")
        times = []
        for _ in range(max(1, repeat)):
            started = time.perf_counter()
            _, hit = render()
            times.append(time.perf_counter() - started)
            if not hit:
                raise CommandError("A re-render missed the cache; is a cache backend configured (CACHES)?")
        return first, statistics.median(times), len(body)

    def _line(self, what, first, cached, size):
        self.stdout.write(f"{what}: first render {first * 1000:.0f} ms, cached {cached * 1000:.1f} ms "
                          f"(median), {first / cached:.0f}x faster; {size / 1024:.0f} KiB")
