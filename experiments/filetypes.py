"""Which files a trial may carry, told by their first bytes (never by the name or the browser's type).

Pure module (no Django). Signatures from each format's specification: PNG (ISO/IEC 15948 §5.2),
JPEG (ITU-T T.81 SOI marker FF D8, then a marker FF), TIFF (TIFF 6.0 §2 header "II*\\0"/"MM\\0*"),
PDF (ISO 32000-1 §7.5.2 "%PDF-"), MP4/QuickTime (ISO/IEC 14496-12 §4.3: a box of type "ftyp" first),
AVI (RIFF header with form type "AVI "). Plain text and CSV have no signature: UTF-8 without NUL or
other control characters than tab, line feed, form feed and carriage return, and not markup.
"""
from __future__ import annotations

SNIFF_BYTES = 8192

# type key -> (label, content type served on download)
TYPES = {
    "png": ("PNG image", "image/png"),
    "jpeg": ("JPEG image", "image/jpeg"),
    "tiff": ("TIFF image", "image/tiff"),
    "pdf": ("PDF document", "application/pdf"),
    "mp4": ("MP4/QuickTime video", "video/mp4"),
    "avi": ("AVI video", "video/x-msvideo"),
    "text": ("plain text or CSV", "text/plain; charset=utf-8"),
}

# Attachment kind -> the file types it accepts.
ALLOWED_BY_KIND = {
    "photo": ("png", "jpeg", "tiff"),
    "video": ("mp4", "avi"),
    "other": ("pdf", "text", "png", "jpeg", "tiff"),
}

_TEXT_CONTROLS_OK = {0x09, 0x0A, 0x0C, 0x0D}


def _is_text(head: bytes) -> bool:
    if not head or b"\x00" in head:
        return False
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError as error:
        if error.start < len(head) - 3:  # only a character cut at the end of the sample is forgiven
            return False
        text = head[:error.start].decode("utf-8")
    if text.lstrip("\ufeff \t\r\n").startswith("<"):
        return False  # markup (HTML, SVG, XML) is not a note or a table, and a browser might run it
    return not any(ord(ch) < 0x20 and ord(ch) not in _TEXT_CONTROLS_OK or ord(ch) == 0x7F for ch in text)


def sniff(head: bytes) -> str | None:
    """The type key of a file from its first bytes, or None when it is none of the allowed types."""
    if head.startswith(b"\x89PNG\r\n\x1a\n"):
        return "png"
    if head.startswith(b"\xff\xd8\xff"):
        return "jpeg"
    if head.startswith((b"II*\x00", b"MM\x00*")):
        return "tiff"
    if head.startswith(b"%PDF-"):
        return "pdf"
    if len(head) >= 12 and head[4:8] == b"ftyp":
        return "mp4"
    if head.startswith(b"RIFF") and head[8:12] == b"AVI ":
        return "avi"
    if _is_text(head):
        return "text"
    return None


def allowed_text(kind: str) -> str:
    return ", ".join(TYPES[t][0] for t in ALLOWED_BY_KIND.get(kind, ()))
