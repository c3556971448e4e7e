"""Numbers as text for people: summaries, check reports, the window's panel."""
from __future__ import annotations


def fixed(v, nd=3) -> str:
    """``v`` with ``nd`` decimals, never as '-0.000'."""
    s = f"{float(v):.{nd}f}"
    return s[1:] if s.startswith("-") and float(s) == 0.0 else s
