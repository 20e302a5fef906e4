"""Built-in demo scenarios: invented teams of our own, shipped as TOML beside this module."""

from __future__ import annotations

import difflib
from pathlib import Path

__all__ = ["DEFAULT_DEMO", "closest_demo", "demo_path", "list_demos"]

_DIR = Path(__file__).with_name("demos")
DEFAULT_DEMO = "tidal-buoys"


def list_demos() -> list[tuple[str, str]]:
    """(name, first comment line) of every demo."""
    out = []
    for p in sorted(_DIR.glob("*.toml")):
        first = next(
            (ln[1:].strip() for ln in p.read_text().splitlines() if ln.startswith("#")), ""
        )
        out.append((p.stem, first))
    return out


def demo_path(name: str) -> Path | None:
    """The demo's file, or None when no demo has that name."""
    if name not in {stem for stem, _ in list_demos()}:
        return None
    return _DIR / f"{name}.toml"


def closest_demo(name: str) -> str | None:
    """The demo name a typo most likely meant, or None (difflib's similarity ratio)."""
    close = difflib.get_close_matches(name, [stem for stem, _ in list_demos()], n=1, cutoff=0.6)
    return close[0] if close else None
