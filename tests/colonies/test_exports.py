from colonies.exports import spreadsheet_safe


def test_spreadsheet_safe_prefixes_formula_starts_and_leaves_the_rest():
    # OWASP "CSV Injection" guidance (from memory): cells starting with = + - @ are run as formulas.
    assert spreadsheet_safe("=1+1") == "'=1+1"
    assert spreadsheet_safe("+31 6 000") == "'+31 6 000"
    assert spreadsheet_safe("@SUM(A1)") == "'@SUM(A1)"
    assert spreadsheet_safe("-3 dead") == "'-3 dead"
    assert spreadsheet_safe("Heater replaced") == "Heater replaced"
    assert spreadsheet_safe(-3.5) == -3.5  # numbers are data, not text
    assert spreadsheet_safe("") == ""

