"""Colour contrast by WCAG 2.1 (W3C): relative luminance and contrast ratio.

The site's colours (CSS and figures) are checked with these in the tests: text needs 4.5:1
against its background (AA), large text and graphics 3:1.
"""

from __future__ import annotations

TEXT_MIN = 4.5
GRAPHICS_MIN = 3.0


def _channel(c: int) -> float:
    s = c / 255
    return s / 12.92 if s <= 0.04045 else ((s + 0.055) / 1.055) ** 2.4


def luminance(colour: str) -> float:
    """Relative luminance of a '#rrggbb' (or '#rgb') colour."""
    h = colour.lstrip("#")
    if len(h) == 3:
        h = "".join(ch * 2 for ch in h)
    r, g, b = (int(h[i : i + 2], 16) for i in (0, 2, 4))
    return 0.2126 * _channel(r) + 0.7152 * _channel(g) + 0.0722 * _channel(b)


def ratio(a: str, b: str) -> float:
    """Contrast ratio between two colours, from 1 to 21."""
    la, lb = sorted((luminance(a), luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)
