"""Helpers for files people open in spreadsheets."""

FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(value):
    """Free text that a spreadsheet would run as a formula (=, +, -, @ first) gets a leading apostrophe.

    Numbers pass unchanged; only strings are touched (OWASP's advice on CSV injection).
    """
    if isinstance(value, str) and value.startswith(FORMULA_START):
        return "'" + value
    return value
