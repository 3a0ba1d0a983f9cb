"""Printable tank labels: the code in large type and a QR code that opens the tank page.

segno makes the QR code (pure Python, SVG output, no image library needed). Error correction
level M survives a splash of water or a scratched corner better than L at a small size.

Encoding a QR code costs a few milliseconds, so a sheet of 400 labels took seconds. The SVG is a pure
function of its URL and scale, so each worker process keeps the latest ones in memory keyed by exactly
that (never stale: another URL is another key). Not in Django's cache: 400 labels would push the
cached figures out of it.
"""
import functools
import io

import segno


QR_CACHE_SIZE = 2048  # labels kept per process (a few KB each)


@functools.lru_cache(maxsize=QR_CACHE_SIZE)
def qr_svg(url: str, *, scale: int = 3) -> str:
    """An inline SVG element (no XML declaration) encoding `url`."""
    buffer = io.BytesIO()
    segno.make(url, error="m").save(buffer, kind="svg", scale=scale, border=1, xmldecl=False, svgns=True,
                                    title=url)
    return buffer.getvalue().decode("ascii")
