"""Tables that stack on a phone (class "stack", static/css/vermilog.css) keep every column's name.

Below 40rem a stacked table hides its header row and shows each cell's data-label beside the value,
so a cell without a label, or with another column's name, would lose what the column said. Every
list page of the demo is checked: each body cell carries the name of the column it sits in.
"""
import re
from html.parser import HTMLParser

import pytest
from django.core.management import call_command
from django.test import Client

from colonies import demo

DEMO_DAYS = 30  # the trials part of the demo needs a census in every LV tank


class _Tables(HTMLParser):
    """Collects the stacked tables of a page: [(header texts, [[(data-label, colspan)] per row])]."""

    def __init__(self):
        super().__init__()
        self.tables, self._depth, self._cell, self._in_head, self._stacked = [], 0, None, False, False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "table":
            self._depth += 1
            if self._depth == 1:
                self._stacked = "stack" in (attrs.get("class") or "").split()
                if self._stacked:
                    self.tables.append(([], []))
        if not self._stacked or self._depth != 1:
            return
        heads, rows = self.tables[-1]
        if tag == "thead":
            self._in_head = True
        elif tag == "tr" and not self._in_head:
            rows.append([])
        elif tag == "th" and self._in_head:
            self._cell = []
        elif tag == "td" and rows:
            rows[-1].append((attrs.get("data-label"), int(attrs.get("colspan") or 1)))

    def handle_endtag(self, tag):
        if tag == "table":
            self._depth -= 1
        elif tag == "thead":
            self._in_head = False
        elif tag == "th" and self._cell is not None:
            self.tables[-1][0].append(" ".join("".join(self._cell).split()))
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _same(label: str, heading: str) -> bool:
    # "Temp (°C)" labels the column headed "Temp" over "°C": compare without spaces and brackets.
    return re.sub(r"[\s()]", "", label) == re.sub(r"[\s()]", "", heading)


@pytest.mark.django_db
def test_every_cell_of_a_stacked_table_is_labelled_with_its_column(monkeypatch):
    monkeypatch.setattr(demo, "DAYS", DEMO_DAYS)
    call_command("load_demo", stdout=open("/dev/null", "w"))
    from colonies.models import Check, Deviation, Species
    from experiments.models import Cohort, Protocol, Study

    check = Check.objects.order_by("-observed_at").first()
    species, cohort = Species.objects.order_by("pk").first().pk, Cohort.objects.order_by("pk").first().pk
    pages = {
        "tamsin": ["/", "/tanks/", "/tanks/LV-03/", f"/checks/{check.pk}/", "/species/", f"/species/{species}/",
                   f"/deviations/{Deviation.objects.order_by('pk').first().pk}/", "/health/", "/tanks/LV-03/history/",
                   "/tanks/LV-03/health/"],
        "ravi": ["/experiments/", "/experiments/bookings/calendar/", "/experiments/protocols/"]
                + [f"/experiments/studies/{s.code}/" for s in Study.objects.all()],
        "morwen": ["/deviations/", "/experiments/ledger/", f"/species/{species}/edit/", f"/experiments/cohorts/{cohort}/"]
                  + [f"/experiments/protocols/{pk}/" for pk in Protocol.objects.values_list("pk", flat=True)],
    }
    client, seen = Client(), 0
    for username, paths in pages.items():
        from django.contrib.auth.models import User
        client.force_login(User.objects.get(username=username))
        for path in paths:
            response = client.get(path)
            assert response.status_code == 200, path
            parser = _Tables()
            parser.feed(response.content.decode())
            for heads, rows in parser.tables:
                for row in rows:
                    if len(row) == 1 and row[0][1] > 1:
                        continue  # "No … yet." spanning the table
                    assert len(row) == len(heads), f"{path}: row of {len(row)} cells under {len(heads)} headings {heads}"
                    for (label, _), heading in zip(row, heads):
                        assert label and _same(label, heading), f"{path}: cell labelled {label!r} under {heading!r}"
                        seen += 1
    assert seen > 500  # the pages above did have stacked tables with rows
