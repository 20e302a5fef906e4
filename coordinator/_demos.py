"""Built-in demo scenarios: invented teams of our own, shipped as TOML beside this module."""

from __future__ import annotations

from pathlib import Path

__all__ = ["DEFAULT_DEMO", "demo_path", "list_demos"]

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
    p = _DIR / f"{name}.toml"
    return p if p.is_file() else None
