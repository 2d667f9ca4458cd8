"""Numbers for people: SI prefixes, and the one way every progress bar states a speed."""

from __future__ import annotations


def si(n: float) -> str:
    """``n`` with an SI prefix: 1234567 → "1.23 M"."""
    for unit, div in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(n) >= div:
            return f"{n / div:.2f} {unit}"
    return f"{n:.0f}"


def pixel_rate(pixels: float, seconds: float) -> str:
    """Pixels per second as every progress bar shows it ("9.26 kpx/s", "5.90 Mpx/s")."""
    text = si(pixels / max(seconds, 1e-9))
    return f"{text}px/s" if text[-1].isalpha() else f"{text} px/s"
