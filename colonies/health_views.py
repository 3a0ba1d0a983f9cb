"""Colony-health pages: a tank's population figure and data, the facility overview, splits and
lineage. Thin views: the rows come from health_series.py / health_overview.py / lineage.py, the
numbers from growth.py and population.py, the pictures (cached) from health_plots.py.
"""
from django.contrib import messages
from django.http import Http404, HttpResponse, StreamingHttpResponse
from django.shortcuts import get_object_or_404, redirect, render
from django.views.decorators.http import require_GET, require_http_methods, require_POST

from . import charts, growth, health_overview, health_plots, health_series, lineage, population, services
from .forms import ReasonForm
from .health_forms import split_forms
from .idempotency import once_per_submission
from .models import Split, Tank
from .roles import RESEARCHER, TECHNICIAN, role_required
from .views import _tank_page_ctx

READ_ROLES = (TECHNICIAN, RESEARCHER)
PERIOD_DAYS = (30, 60, 120, 365)  # the period chooser's allow-list
DEFAULT_PLOT_DAYS = 120
DEFAULT_MORTALITY_DAYS = growth.DEFAULT_MORTALITY_DAYS


def _period(request, default: int) -> int:
    raw = request.GET.get("days", "")
    if raw == "":
        return default
    try:
        days = int(raw)
    except ValueError:
        raise Http404(f"Period: '{raw}' is not one of {', '.join(map(str, PERIOD_DAYS))} days.") from None
    if days not in PERIOD_DAYS:
        raise Http404(f"Period: {days} days is not one of {', '.join(map(str, PERIOD_DAYS))} days.")
    return days


def _format(request) -> str:
    fmt = request.GET.get("format", "svg")
    if fmt not in charts.FORMATS:
        raise Http404(f"Format: '{fmt}' is not one of {', '.join(charts.FORMATS)}.")
    return fmt


def _layout(request) -> str:
    layout = request.GET.get("layout", "wide")
    if layout not in charts.LAYOUTS:
        raise Http404(f"Layout: '{layout}' is not one of {', '.join(charts.LAYOUTS)}.")
    return layout


def _page(request) -> int:
    raw = request.GET.get("page", "") or "1"
    if not raw.isdigit():
        raise Http404(f"Page: '{raw}' is not a page number (1, 2, ...).")
    return int(raw)


def _image(body: bytes, fmt: str, filename: str) -> HttpResponse:
    response = HttpResponse(body, content_type=charts.FORMATS[fmt])
    response["Content-Disposition"] = f'inline; filename="{filename}.{fmt}"'
    response["Cache-Control"] = "private, max-age=300"
    return response


def _csv(chunks, filename: str) -> StreamingHttpResponse:
    response = StreamingHttpResponse(chunks, content_type="text/csv; charset=utf-8")
    response["Content-Disposition"] = f'attachment; filename="{filename}.csv"'
    return response


# ---------------------------------------------------------------------------------------------
# One tank
# ---------------------------------------------------------------------------------------------
def _tank_for_plot(code: str) -> Tank:
    return get_object_or_404(Tank.objects.select_related("room", "species")
                             .prefetch_related("species__targets", "target_overrides"), code=code)


@require_GET
@role_required(*READ_ROLES)
def tank_health(request, code):
    """The tank's health figure with a period chooser and the population numbers for that period."""
    tank = _tank_for_plot(code)
    days = _period(request, DEFAULT_PLOT_DAYS)
    summary = health_series.tank_summary(tank, mortality_days=days)
    return render(request, "colonies/health_tank.html", {"tank": tank, "days": days, "periods": PERIOD_DAYS,
                                                          "summary": summary})


@require_GET
@role_required(*READ_ROLES)
def tank_plot(request, code):
    tank = _tank_for_plot(code)
    fmt = _format(request)
    days, layout = _period(request, DEFAULT_PLOT_DAYS), _layout(request)
    body, _ = health_plots.render_tank_plot(tank, days, fmt, layout)
    return _image(body, fmt, f"vermilog-{tank.code}-{days}d{'-' + layout if layout != 'wide' else ''}")


@require_GET
@role_required(*READ_ROLES)
def tank_plot_csv(request, code):
    tank = _tank_for_plot(code)
    days = _period(request, DEFAULT_PLOT_DAYS)
    return _csv(health_plots.tank_csv_chunks(tank, days), f"vermilog-{tank.code}-{days}d")


# ---------------------------------------------------------------------------------------------
# Facility overview: a room (or all rooms) at a time, PAGE_TANKS tanks per page, worst first
# ---------------------------------------------------------------------------------------------
def _selection(request, data: dict, page: int | None) -> dict:
    try:
        return health_overview.select(data, request.GET.get("room", ""), page)
    except ValueError as error:
        raise Http404(str(error)) from None


@require_GET
@role_required(*READ_ROLES)
def health_overview_page(request):
    days = _period(request, DEFAULT_MORTALITY_DAYS)
    data = health_overview.overview(days)
    shown = _selection(request, data, _page(request))
    return render(request, "colonies/health_overview.html", {**data, "shown": shown, "periods": PERIOD_DAYS})


@require_GET
@role_required(*READ_ROLES)
def health_overview_plot(request):
    fmt, days, page = _format(request), _period(request, DEFAULT_MORTALITY_DAYS), _page(request)
    room = request.GET.get("room", "")
    try:
        body, _ = health_plots.render_overview_plot(days, fmt, room, page)
    except ValueError as error:
        raise Http404(str(error)) from None
    return _image(body, fmt, f"vermilog-colony-health-{days}d{'-' + room if room else ''}-p{page}")


@require_GET
@role_required(*READ_ROLES)
def health_overview_csv(request):
    days = _period(request, DEFAULT_MORTALITY_DAYS)
    data = health_overview.overview(days)
    shown = _selection(request, data, None)
    return _csv(health_plots.overview_csv_chunks(data, shown["rows"]), f"vermilog-colony-health-{days}d")


# ---------------------------------------------------------------------------------------------
# Splits
# ---------------------------------------------------------------------------------------------
@require_POST
@role_required(TECHNICIAN)
@once_per_submission
def tank_split(request, code):
    tank = get_object_or_404(Tank.objects.select_related("room", "species"), code=code)
    form, parts = split_forms(tank, request.POST)
    if form.is_valid() & parts.is_valid():
        rows = [f.part() for f in parts if f.has_entry()]
        if not rows:
            form.add_error(None, "Destinations: enter at least one destination tank and the animals moved to it.")
        else:
            c = form.cleaned_data
            try:
                split = services.record_split(user=request.user, source=tank, source_before=c["source_before"],
                                              stayed=c["stayed"], parts=rows, split_at=c.get("split_at"),
                                              note=c.get("note", ""))
            except ValueError as error:
                form.add_error(None, str(error))
            else:
                balance = population.split_balance(split.source_before, [split.stayed] + [a for _, a in rows])
                messages.success(request, f"Split of {tank.code} saved: {split.stayed:.0f} stayed, "
                                          f"{balance.parts_total - split.stayed:.0f} moved to {len(rows)} tank"
                                          f"{'s' if len(rows) != 1 else ''}; books differ by {balance.difference:+.0f} "
                                          f"animals ({100 * balance.relative_difference:+.1f} %).")
                return redirect(tank)
    messages.error(request, "Split not saved. Correct the fields marked below.")
    ctx = _tank_page_ctx(request, tank, split_form=form, part_forms=parts)
    return render(request, "colonies/tank_detail.html", ctx, status=400)


@require_http_methods(["GET", "POST"])
@role_required(TECHNICIAN)
@once_per_submission
def split_void(request, pk):
    split = get_object_or_404(Split.objects.select_related("source"), pk=pk)
    if split.is_voided:
        messages.info(request, f"{split} is already voided.")
        return redirect(split.source)
    form = ReasonForm(request.POST or None)
    if request.method == "POST" and form.is_valid():
        services.void_split(user=request.user, split=split, reason=form.cleaned_data["reason"])
        messages.success(request, f"Voided: {split}. It stays in the tank's history.")
        return redirect(split.source)
    return render(request, "colonies/void.html", {"record": split, "form": form, "kind": "split"},
                  status=400 if request.method == "POST" else 200)


@require_GET
@role_required(*READ_ROLES)
def tank_lineage(request, code):
    tank = get_object_or_404(Tank.objects.select_related("room", "species"), code=code)
    rows, size = lineage.lineage_rows(tank)
    return render(request, "colonies/lineage.html", {"tank": tank, "rows": rows, "size": size})
