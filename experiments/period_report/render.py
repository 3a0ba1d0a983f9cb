"""The period report's files: one CSV per section, a ZIP with a MANIFEST of SHA-256 sums, and a PDF.

Reproducible by construction: the CSVs hold no generation time, their rows come in the sections' fixed
order and every number is written by `cell()` (floats to six significant digits), so the same period
and scope on unchanged records gives byte-identical CSVs, and the ZIP's entries carry a fixed date.
"""
from __future__ import annotations

import csv
import hashlib
import io
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass

from colonies.exports import spreadsheet_safe

from .sections import HEADINGS, NOTES, exposure_page_row

ZIP_DATE = (2000, 1, 1, 0, 0, 0)  # every entry's timestamp: the ZIP's bytes depend on the contents only


@dataclass
class Section:
    number: str  # "1a"
    name: str  # the CSV's file name without ".csv"
    title: str
    rows: list[dict]
    columns: Sequence[str] = ()

    def __post_init__(self):
        if not self.columns:
            self.columns = list(self.rows[0]) if self.rows else []

    @property
    def note(self) -> str:
        return NOTES.get(self.number, "")

    def page_rows(self) -> list[dict]:
        return [exposure_page_row(r) for r in self.rows] if self.number == "5b" else self.rows

    def table(self) -> list[list[tuple[str, str]]]:
        """The rows as the page shows them, (heading, text) per cell: empty cells as a dash, text as it is."""
        rows = self.page_rows()
        keys = list(rows[0]) if self.number == "5b" and rows else self.columns
        return [[(h, shown(row.get(c))) for h, c in zip(self._headings(keys), keys)] for row in rows]

    def headings(self) -> list[str]:
        rows = self.page_rows()
        return self._headings(list(rows[0]) if self.number == "5b" and rows else self.columns)

    @staticmethod
    def _headings(keys) -> list[str]:
        return [HEADINGS.get(c, c.replace("_", " ")) for c in keys]

    @property
    def filename(self) -> str:
        return f"{self.number}-{self.name}.csv"


def shown(value) -> str:
    if value is None or value == "":
        return "–"
    return cell(value) if isinstance(value, (bool, int, float)) else str(value)


def cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return format(value, ".6g")
    if isinstance(value, int):
        return str(value)
    return spreadsheet_safe(str(value))


def section_csv(section: Section) -> bytes:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 line ends, as the other exports
    writer.writerow(section.columns)
    for row in section.rows:
        writer.writerow([cell(row.get(c)) for c in section.columns])
    return out.getvalue().encode("utf-8")


def manifest(files: dict[str, bytes]) -> str:
    """`sha256sum`'s format: "<hex>  <name>" per line, names sorted; `sha256sum -c MANIFEST` checks it."""
    return "".join(f"{hashlib.sha256(data).hexdigest()}  {name}\n" for name, data in sorted(files.items()))


def csv_files(sections: Sequence[Section]) -> dict[str, bytes]:
    return {s.filename: section_csv(s) for s in sections}


def zip_bytes(sections: Sequence[Section]) -> tuple[bytes, str]:
    """The ZIP (CSVs and MANIFEST) and the manifest's text."""
    files = csv_files(sections)
    text = manifest(files)
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        for name, data in [*sorted(files.items()), ("MANIFEST", text.encode("utf-8"))]:
            info = zipfile.ZipInfo(name, date_time=ZIP_DATE)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, data)
    return buffer.getvalue(), text


def manifest_sha256(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def pdf_bytes(html: str, base_url: str, url_fetcher) -> bytes:
    """The printable page as PDF (WeasyPrint lays out the page's own @media print rules); `url_fetcher` reads
    what the page links (the stylesheet)."""
    from weasyprint import HTML  # imported here: loading Pango costs ~0.3 s, only the PDF needs it

    return HTML(string=html, base_url=base_url, url_fetcher=url_fetcher).write_pdf()
