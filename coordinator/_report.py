"""report.html: one self-contained page for a run or a study directory.

Figures are embedded as base64 PNG, tables come from the directory's files, and the page
loads nothing from anywhere else (no scripts, no fonts, no style sheets from outside).
"""

from __future__ import annotations

import base64
import csv
import html
import json
from collections import Counter
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

__all__ = ["SAFETY", "write_report"]

SAFETY = (
    "A swarmrig run is a simulation of the network and of the algorithm, on one or a few"
    " computers. It is not a safety case, not evidence that a robot team is safe to operate,"
    " and not a substitute for testing on the real hardware. Your lab's own safety procedures"
    " and the local regulations govern every field trial with real robots, drones or grid"
    " equipment."
)

_STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 1100px; color: #222; }
h1 { font-size: 1.5em; } h2 { font-size: 1.15em; margin-top: 1.6em; }
table { border-collapse: collapse; font-size: 0.82em; margin: 0.5em 0; }
td, th { border: 1px solid #ccc; padding: 2px 6px; text-align: right; }
th { background: #f0f0f0; } td.l, th.l { text-align: left; }
.caution { border-left: 4px solid #c60; background: #fff4e8; padding: 0.6em 1em; }
.verdict { font-weight: bold; } pre { background: #f6f6f6; padding: 0.8em; overflow-x: auto;
 font-size: 0.8em; } figure { margin: 1em 0; } img { max-width: 100%; }
figcaption { font-size: 0.85em; color: #555; }
"""


def _esc(v: Any) -> str:
    return html.escape("" if v is None else str(v))


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    try:
        f = float(v)
        if isinstance(v, str) and v.strip() and not v.strip().lstrip("-").isalpha():
            return f"{f:.6g}" if any(c in v for c in ".e") else v
    except (TypeError, ValueError):
        pass
    return "" if v is None else str(v)


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]], left: int = 1) -> str:
    head = "".join(
        f'<th class="{"l" if i < left else ""}">{_esc(h)}</th>' for i, h in enumerate(header)
    )
    body = "".join(
        "<tr>"
        + "".join(
            f'<td class="{"l" if i < left else ""}">{_esc(_fmt(v))}</td>' for i, v in enumerate(r)
        )
        + "</tr>"
        for r in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _figure(png: Path, caption: str) -> str:
    data = base64.b64encode(png.read_bytes()).decode()
    return (
        f'<figure><img alt="{_esc(caption)}" src="data:image/png;base64,{data}">'
        f"<figcaption>{_esc(caption)} ({_esc(png.name)}; SVG beside it)</figcaption></figure>"
    )


_CAPTIONS = {
    "value-vs-gap": "final gap (average and worst agent) and consensus error against the varied"
    " value: median over seeds, quartiles as a band",
    "success-rate": "success rate against the varied value with 95% Wilson intervals; the break"
    " point and its interval where a search found one",
    "median-runs": "gap and consensus error against time for the median run of each point,"
    " fault windows shaded",
    "front": "reference Pareto front (centralized optimum of each weighting) and the reached points",
    "link-delivered-share": "delivered share of each directed link for one run",
    "gap-vs-time": "gap and consensus error against time, fault windows shaded",
}


def _figures_html(folder: Path) -> str:
    parts = []
    for png in sorted(folder.glob("*.png")):
        parts.append(_figure(png, _CAPTIONS.get(png.stem, png.stem)))
    return "".join(parts) or "<p>No figures.</p>"


def _read_csv(path: Path) -> tuple[list[str], list[list[str]]]:
    if not path.exists() or path.stat().st_size == 0:
        return [], []
    with path.open() as f:
        r = list(csv.reader(f))
    return (r[0], r[1:]) if r else ([], [])


def _page(title: str, body: str) -> str:
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>{_esc(title)}</title><style>{_STYLE}</style></head><body>"
        f"<h1>{_esc(title)}</h1>"
        f'<p class="caution"><b>Safety.</b> {_esc(SAFETY)}</p>{body}</body></html>'
    )


def write_report(directory: str | Path) -> Path:
    """Write <directory>/report.html for a study directory or a run directory."""
    d = Path(directory)
    text = _study_page(d) if (d / "study.json").exists() else _run_page(d)
    tmp = d / ".report.html.tmp"
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(d / "report.html")
    return d / "report.html"


def _study_page(d: Path) -> str:
    meta = json.loads((d / "study.json").read_text())
    st = meta["resolved"]["study"]
    body = [
        _table(
            ["study", "value"],
            [
                ["kind", st["kind"]],
                ["seeds", ", ".join(map(str, st["seeds"]))],
                ["success means", " or ".join(st["success"])],
                ["engine (asked)", st["engine"]],
                ["study file", meta.get("source")],
            ],
        )
    ]
    hdr, rows = _read_csv(d / "runs.csv")
    if hdr:
        v = hdr.index("verdict") if "verdict" in hdr else None
        e = hdr.index("engine") if "engine" in hdr else None
        counts = Counter(r[v] for r in rows) if v is not None else Counter()
        engines = Counter(r[e] for r in rows) if e is not None else Counter()
        body.append("<h2>Verdicts</h2>")
        body.append(
            _table(["verdict", "runs"], sorted(counts.items(), key=lambda kv: -kv[1]))
            + f"<p>{len(rows)} runs; engines: "
            + _esc(", ".join(f"{k} ({n})" for k, n in engines.items()))
            + "</p>"
        )
    if (d / "breakpoint.json").exists():
        bp = json.loads((d / "breakpoint.json").read_text())
        body.append("<h2>Break point</h2>")
        body.append(f'<p class="verdict">{_esc(bp["statement"])}</p>')
        if bp.get("note"):
            body.append(f"<p>{_esc(bp['note'])}</p>")
        body.append(
            _table(
                ["value", "runs", "successes", "success rate", "Wilson low", "Wilson high"],
                [
                    [
                        p["value"],
                        p["runs"],
                        p["successes"],
                        p["success_rate"],
                        p["wilson_low"],
                        p["wilson_high"],
                    ]
                    for p in bp["points"]
                ],
            )
        )
    if (d / "front.json").exists():
        fr = json.loads((d / "front.json").read_text())
        body.append("<h2>Priority front</h2>")
        body.append(
            f"<p>{fr['lattice_points']} weightings ({_esc(fr['lattice_formula'])}), groups "
            f"{_esc(fr['groups'])}.</p>"
        )
        body.append(
            _table(
                [
                    "seed",
                    "faults",
                    "hypervolume reached",
                    "hypervolume reference",
                    "ratio",
                    "dominated points",
                    "reference point",
                ],
                [
                    [
                        f["seed"],
                        f["faults"],
                        f["hypervolume_reached"],
                        f["hypervolume_reference"],
                        f["hypervolume_ratio"],
                        f"{f['reached_dominated']} of {f['points']}",
                        f"{[round(v, 6) for v in f['reference_point']]} ({f['reference_point_rule']})",
                    ]
                    for f in fr["fronts"]
                ],
            )
        )
    hdr, rows = _read_csv(d / "points.csv")
    if hdr:
        keep = [i for i, h in enumerate(hdr) if not h.endswith(("_q1", "_q3"))]
        body.append("<h2>Points</h2>")
        body.append(_table([hdr[i] for i in keep], [[r[i] for i in keep] for r in rows]))
    body.append("<h2>Figures</h2>" + _figures_html(d / "figures"))
    body.append("<h2>Study and base scenario (resolved)</h2>")
    toml = (d / "study.toml").read_text() if (d / "study.toml").exists() else ""
    body.append(f"<pre>{_esc(toml)}</pre>")
    return _page(f"swarmrig study · {st['name']}", "".join(body))


def _scalars(summary: Mapping[str, Any], prefix: str = "") -> list[list[Any]]:
    out = []
    for k, v in summary.items():
        if isinstance(v, Mapping):
            out += _scalars(v, f"{prefix}{k}.")
        elif not isinstance(v, list):
            out.append([f"{prefix}{k}", v])
    return out


def _run_page(d: Path) -> str:
    from coordinator._figures import run_figures

    summary = json.loads((d / "summary.json").read_text())
    run_figures(d)
    body = [
        f'<p class="verdict">verdict: {_esc(summary.get("verdict"))}'
        f" · exit: {_esc(summary.get('exit'))}</p>",
        "<h2>Summary</h2>",
        _table(["key", "value"], _scalars(summary)),
        "<h2>Figures</h2>",
        _figures_html(d / "figures"),
    ]
    hdr, rows = _read_csv(d / "links.csv")
    if hdr:
        body.append("<h2>Links</h2>" + _table(hdr, rows, left=0))
    scen = (d / "scenario.toml").read_text() if (d / "scenario.toml").exists() else ""
    body.append(f"<h2>Scenario (resolved)</h2><pre>{_esc(scen)}</pre>")
    return _page(f"swarmrig run · {summary.get('scenario')}", "".join(body))
