"""What a round POST carries: the plain per-input fields, or the page script's one JSON field.

A browser with the page script sends the filled inputs of every row as ONE hidden field
(``ROWS_FIELD``: a JSON object of input name to value, e.g. ``{"A-01-ph": "7.2"}``) and disables the
row inputs, so a round of any size stays far under DATA_UPLOAD_MAX_NUMBER_FIELDS (the body is still
bounded by DATA_UPLOAD_MAX_MEMORY_SIZE). Without the script the same names arrive as plain fields.
Both end up as one QueryDict, validated the same way.
"""
import json

from django.http import QueryDict

ROWS_FIELD = "rows_json"


class PayloadError(ValueError):
    """The JSON field is not an object of input names to text (a broken or forged page)."""


def round_data(post: QueryDict) -> QueryDict:
    """The submitted round as form data: the plain fields plus the decoded JSON rows, if any."""
    if ROWS_FIELD not in post:
        return post
    try:
        rows = json.loads(post[ROWS_FIELD])
    except ValueError as exc:
        raise PayloadError(f"Round rows ({ROWS_FIELD}): not valid JSON ({exc}).") from None
    if not isinstance(rows, dict):
        raise PayloadError(f"Round rows ({ROWS_FIELD}): expected an object of input names to values.")
    data = post.copy()
    del data[ROWS_FIELD]
    for name, value in rows.items():
        if not isinstance(value, (str, bool)):
            raise PayloadError(f"Round rows ({ROWS_FIELD}): the value of '{name}' must be text or true/false.")
        if value is False:
            continue  # an unticked box is simply absent, as in a plain form post
        data[name] = "on" if value is True else value
    return data


def filled_codes(data: QueryDict, fields: frozenset[str], defaults: dict[str, str] | None = None) -> set[str]:
    """Tank codes (field prefixes) with at least one non-blank round field: the rows to validate and save.

    A row whose every field is blank makes no check and cannot fail validation (blank is allowed
    everywhere), so it needs no form. A field left at its default (`defaults`: the observations the page
    shows as "looks normal") does not make a row filled on its own.
    """
    defaults = defaults or {}
    codes = set()
    for key, values in data.lists():
        prefix, _, field = key.rpartition("-")
        if prefix and field in fields and any(str(v).strip() and v != defaults.get(field) for v in values):
            codes.add(prefix)
    return codes
