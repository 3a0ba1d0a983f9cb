"""POST data for the protocol pages (new and amend), built from values as a browser would send them."""
from datetime import timedelta

from django.utils import timezone

from experiments.models import ALLOWANCE_FIELDS
from experiments.protocol_forms import NEW_ALLOWANCE_FORMS, TERM_FIELDS


def _text(value) -> str:
    return "" if value is None else str(value)


def terms(**overrides) -> dict:
    today = timezone.localdate()
    values = {"title": "Dispersal under blue light", "approver": "Dr Iona Fenwick, Quillmoor animal welfare body",
              "starts_on": today - timedelta(days=1), "expires_on": today + timedelta(days=200),
              "max_animals_per_trial": 12, "max_exposures_per_group": 3, "min_rest_hours": 24,
              "max_cumulative_dose_mj_cm2": 150, "notes": ""}
    values.update(overrides)
    return {k: _text(v) for k, v in values.items()}


def new_protocol(reference="QAW-T-101", allowances=(), **overrides) -> dict:
    data = {"reference": reference, **terms(**overrides)}
    data.update(_allowance_forms([], allowances))
    return data


def amend_protocol(protocol, changes: dict | None = None, allowance_changes: dict | None = None, *, new=(),
                   reason="Maxima lowered after the welfare review", password=None, **extra) -> dict:
    """The amend form as shown for `protocol`, with `changes` to its terms and `allowance_changes`
    ({kind: {field: value}}) to its allowances; `new` adds allowances."""
    data = {name: _text(getattr(protocol, name)) for name in TERM_FIELDS}
    data.update({k: _text(v) for k, v in (changes or {}).items()})
    rows = []
    for a in protocol.allowances.order_by("kind", "substance", "pk"):
        values = {name: getattr(a, name) for name in ALLOWANCE_FIELDS}
        values.update((allowance_changes or {}).get(a.kind, {}))
        rows.append((a.pk, values))
    data.update(_allowance_forms(rows, new))
    data.update({"reason": reason, "approval_reference": extra.pop("approval_reference", "")})
    if password is not None:
        data["password"] = password
    data.update(extra)
    return data


def _allowance_forms(existing: list, new) -> dict:
    data = {"allowance-TOTAL_FORMS": str(len(existing) + NEW_ALLOWANCE_FORMS),
            "allowance-INITIAL_FORMS": str(len(existing)), "allowance-MIN_NUM_FORMS": "0",
            "allowance-MAX_NUM_FORMS": "1000"}
    for i, (pk, values) in enumerate(existing):
        data[f"allowance-{i}-id"] = str(pk)
        data.update({f"allowance-{i}-{k}": _text(v) for k, v in values.items()})
    for j, values in enumerate(new):
        i = len(existing) + j
        data.update({f"allowance-{i}-{k}": _text(v) for k, v in values.items()})
    return data
