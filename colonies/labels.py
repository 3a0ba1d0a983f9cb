"""Printable tank labels: the code in large type and a QR code that opens the tank page.

segno makes the QR code (pure Python, SVG output, no image library needed). Error correction
level M survives a splash of water or a scratched corner better than L at a small size.
"""
import io

import segno


def qr_svg(url: str, *, scale: int = 3) -> str:
    """An inline SVG element (no XML declaration) encoding `url`."""
    buffer = io.BytesIO()
    segno.make(url, error="m").save(buffer, kind="svg", scale=scale, border=1, xmldecl=False, svgns=True,
                                    title=url)
    return buffer.getvalue().decode("ascii")
