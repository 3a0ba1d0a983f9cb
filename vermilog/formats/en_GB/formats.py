"""The lab's one way of writing dates and times on every page (settings.FORMAT_MODULE_PATH).

Day, month name, year: "05 Dec 2026", "05 Dec 2026 14:30" (24-hour clock). It reads the same in
every country, unlike 05/12/2026, and does not follow the browser's locale. Times are in the lab's
time zone (settings.TIME_ZONE), named once in every page's footer. Files meant for programs (CSV,
spreadsheets, backups) keep ISO 8601 with the UTC offset instead.

Templates use the names: {{ d|date }} (DATE_FORMAT), {{ t|date:"DATETIME_FORMAT" }}, and
{{ t|date:"SHORT_DATETIME_FORMAT" }} in lists of recent records (same order, no year).
Python uses vermilog.lab_time.lab_date / lab_moment.
"""
DATE_FORMAT = "d M Y"
DATETIME_FORMAT = "d M Y H:i"
SHORT_DATE_FORMAT = "d M Y"
SHORT_DATETIME_FORMAT = "d M H:i"
TIME_FORMAT = "H:i"
MONTH_DAY_FORMAT = "d M"
YEAR_MONTH_FORMAT = "M Y"
FIRST_DAY_OF_WEEK = 1  # Monday, as the booking calendar draws weeks

# What forms read and write. First entry = how a widget writes a value back into its input: ISO, the
# only form an <input type="date"> accepts (en_GB's default, 05/12/2026, makes it show empty).
DATE_INPUT_FORMATS = ["%Y-%m-%d", "%d/%m/%Y", "%d/%m/%y"]
DATETIME_INPUT_FORMATS = ["%Y-%m-%dT%H:%M", "%Y-%m-%d %H:%M:%S", "%Y-%m-%d %H:%M", "%d/%m/%Y %H:%M"]
