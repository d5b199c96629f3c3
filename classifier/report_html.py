"""The report as one static HTML page: figures embedded as data URIs, no network, no script.

The page opens from a disk, a mail attachment or an archive years later exactly as it
was written: every image is inside it (base64 PNG), styles are inline, and nothing is
fetched.
"""

from __future__ import annotations

import base64
import html
from pathlib import Path
from typing import Any

from .outputs import write_text

__all__ = ["report_page", "write_html"]

_CSS = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 64em; color: #111; line-height: 1.4; }
h1 { font-size: 1.4em; } h2 { font-size: 1.15em; margin-top: 1.8em; border-bottom: 1px solid #bbb; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.9em; }
th, td { border: 1px solid #999; padding: 0.2em 0.5em; text-align: left; vertical-align: top; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
figure { margin: 1.2em 0; } figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #333; }
.caution { border: 2px solid #111; padding: 0.6em 1em; font-weight: 600; }
.warn { background: #f2f2f2; padding: 0.4em 0.8em; border-left: 4px solid #555; }
"""


def _e(x: Any) -> str:
    return html.escape("" if x is None else str(x))


def _data_uri(path: Path) -> str:
    return "data:image/png;base64," + base64.b64encode(Path(path).read_bytes()).decode("ascii")


def _table(rows: list[dict], columns: list[tuple[str, str]]) -> str:
    head = "".join(f"<th>{_e(title)}</th>" for _, title in columns)

    def cell(v: Any) -> str:
        number = isinstance(v, int | float) and not isinstance(v, bool)
        return f'<td class="n">{_e(v)}</td>' if number else f"<td>{_e(v)}</td>"

    body = "".join("<tr>" + "".join(cell(r.get(k)) for k, _ in columns) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def report_page(report: dict[str, Any], figures: list[dict]) -> str:
    """The HTML text of the report page.

    Parameters
    ----------
    report : dict, the content of ``report.json``
    figures : list of dict, ``path`` (PNG), ``title`` and ``caption`` of each figure
    """
    r = report
    title = f"Monitoring report: {r['deployment']}, run {r['run_id']}"
    thresholds = [
        {"label": k, "threshold": v["threshold"], "source": v["source"], "reason": v["reason"]}
        for k, v in r["thresholds"].items()
    ]
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        # Nothing may be fetched: images only from data URIs, no scripts at all.
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; img-src data:; '
        "style-src 'unsafe-inline'\">",
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="caution">{_e(r["caution"])}</p>',
        "<h2>Deployment and effort</h2>",
        f"<p>Recorded from {_e(r['first_start_utc'])} to {_e(r['last_end_utc'])}: "
        f"{r['recorded_hours']:.2f} recorded hours; {r['files']['done']} files scored, {r['files']['failed']} "
        f"failed, {r['files']['unscored']} not scored. Tables in {_e(r['zones']['tables'])}; hour-of-day figure "
        f"in {_e(r['zones']['hour_of_day_figure'])}.</p>",
        "<h2>Operating threshold</h2>",
        _table(thresholds, [("label", "class"), ("threshold", "threshold"), ("source", "rule"), ("reason", "why")]),
        "<h2>Presence per class</h2>",
        _table(
            r["summary"],
            [
                ("label", "class"),
                ("recorded_hours", "recorded hours"),
                ("detections", "detections"),
                ("detection_positive_hours", "positive hours"),
                ("hours_with_effort", "hours recorded"),
                ("detection_positive_days", "positive days"),
                ("days_with_effort", "days recorded"),
                ("positive_10min_bins", "positive 10-min bins"),
                ("positive_1min_bins", "positive minutes"),
                ("detections_per_recorded_hour", "detections per recorded hour"),
                ("expected_true_positive_hours", "hours expected truly detected"),
            ],
        ),
    ]
    if r["warnings"]:
        parts.append("<h2>Warnings</h2>")
        parts += [f'<p class="warn">{_e(w)}</p>' for w in r["warnings"]]
    parts.append("<h2>Figures</h2>")
    for f in figures:
        parts.append(
            f'<figure><img src="{_data_uri(f["path"])}" alt="{_e(f["title"])}">'
            f"<figcaption><strong>{_e(f['title'])}.</strong> {_e(f['caption'])}</figcaption></figure>"
        )
    parts.append(
        "<h2>Files</h2><p>Tables, the soundscape array and every figure are beside this page: "
        + ", ".join(f"<code>{_e(name)}</code>" for name in r["outputs"])
        + ".</p>"
    )
    parts.append(f'<p class="caution">{_e(r["caution"])}</p></body></html>')
    return "\n".join(parts) + "\n"


def write_html(path: str | Path, report: dict[str, Any], figures: list[dict]) -> Path:
    """Write ``report_page`` to ``path`` (replaced whole, never half-written)."""
    return write_text(Path(path), report_page(report, figures))
