"""colonies/widgets.py: QuickSelect writes exactly what Django's Select writes."""
import pytest
from django import forms

from colonies.widgets import QuickSelect

CHOICES = [("", "---------"), (1, "LV-01"), (2, "A & B <tank>"), ("x\"y", "quote"), (None, "none")]


@pytest.mark.parametrize("value", [None, "", 1, "2", "x\"y", "missing", [2]])
@pytest.mark.parametrize("attrs", [None, {"id": "id_tank"}, {"id": "id_t", "required": True, "disabled": False}])
def test_quick_select_writes_what_djangos_select_writes(value, attrs):
    # Reference: Django's own forms.Select rendered through its templates (django/forms/widgets/select.html).
    expected = forms.Select(choices=CHOICES, attrs={"class": "narrow"}).render("tank", value, attrs)
    assert QuickSelect(choices=CHOICES, attrs={"class": "narrow"}).render("tank", value, attrs) == expected


def test_quick_select_groups_and_multiple_keep_djangos_rendering():
    grouped = [("Room 1", [(1, "LV-01"), (2, "LV-02")]), (3, "LV-03")]
    assert QuickSelect(choices=grouped).render("t", 2) == forms.Select(choices=grouped).render("t", 2)
    multiple = type("QuickMultiple", (QuickSelect,), {"allow_multiple_selected": True})
    assert multiple(choices=CHOICES).render("t", [1, 2]) == forms.SelectMultiple(choices=CHOICES).render("t", [1, 2])


def test_quick_select_in_a_model_choice_field(db):
    from tests.factories import make_tank
    from colonies.models import Tank
    make_tank(code="LV-01"), make_tank(code="LV-02")
    quick = forms.ModelChoiceField(queryset=Tank.objects.all(), widget=QuickSelect)
    plain = forms.ModelChoiceField(queryset=Tank.objects.all())
    pk = Tank.objects.get(code="LV-02").pk
    assert quick.widget.render("tank", pk) == plain.widget.render("tank", pk)
