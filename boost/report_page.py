"""One page a person opens: analysis/report.html, self-contained (plots inlined, no script).

Built from what ``boost analyze`` already wrote beside it: the summary dict that becomes
summary.json (so the page shows the same numbers) and the PNG plots. Every text that comes
from the user (title, names, the protocol) goes through :func:`html.escape`.
"""

import base64
import html
import math
from pathlib import Path

PAGE = "report.html"

#: The README's cautions, as the page shows them (tests/test_report_page.py checks the
#: README still says each of them).
CAUTIONS = (
    "Results depend on the force field, on sampling and on convergence.",
    "Check before you rely on a result: look at the window histograms and the overlap "
    "warnings, run longer and compare halves, repeat with another seed, and where you can, "
    "compare two independent routes (umbrella windows vs replica exchange).",
    "The uncertainties are statistical. They say nothing about force-field error.",
    "A verdict of `settled` means that the checks below found nothing wrong, not that the number is right",
)

# sections in reading order: (heading, plots that belong to it by file name)
_SECTIONS = (
    ("Free-energy profiles", lambda name: name.startswith("pmf-")),
    ("Umbrella windows", lambda name: name == "windows.png"),
    ("Overlap between conditions", lambda name: name == "overlap.png"),
    ("Exchange between walkers", lambda name: name in ("swap-acceptance.png", "walker-traces.png")),
    ("How the estimates settled", lambda name: name == "convergence.png"),
)

_STYLE = """
body { font-family: 'DejaVu Sans', Arial, sans-serif; margin: 2em auto; max-width: 70em; color: #1d2733; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; } h2 { border-bottom: 2px solid #2f6f8f; padding-bottom: 0.2em; }
.partial { background: #fff1c9; border: 1px solid #c99a00; padding: 0.5em 1em; font-weight: bold; }
table { border-collapse: collapse; margin: 0.5em 0 1em; } td, th { padding: 0.25em 0.7em; text-align: right; }
th { background: #e5eef3; } td.name, th.name { text-align: left; } tr:nth-child(even) td { background: #f6f9fb; }
.settled { color: #1f7a3a; } .drifting { color: #b3401f; font-weight: bold; } .few { color: #9a6a00; }
img { max-width: 100%; border: 1px solid #d4dde3; margin: 0.3em 0; }
pre { background: #f3f5f7; padding: 0.8em; overflow-x: auto; } .facts td { text-align: left; }
"""


def write_page(out, summary, about, warnings_seen=()):
    """Write ``out``/report.html from the summary dict, the PNGs in ``out`` and a RunAbout."""
    out = Path(out)
    parts = [_header(summary, about), _headline(summary)]
    plots = sorted(p.name for p in out.glob("*.png"))
    placed = set()
    for heading, belongs in _SECTIONS:
        mine = [name for name in plots if belongs(name)]
        placed.update(mine)
        extra = _exchange_tables(summary) if heading == "Exchange between walkers" else ""
        if mine or extra:
            parts.append(f"<h2>{heading}</h2>" + "".join(_image(out / name) for name in mine) + extra)
    rest = [name for name in plots if name not in placed]
    if rest:
        parts.append("<h2>Other plots</h2>" + "".join(_image(out / name) for name in rest))
    parts.append(_conditions(summary))
    parts.append(_warnings(warnings_seen))
    parts.append("<h2>Cautions</h2><ul>" + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS) + "</ul>")
    if about is not None and about.protocol_text:
        parts.append(f"<h2>Protocol as run</h2><pre>{_e(about.protocol_text)}</pre>")
    title = about.title if about is not None else "boost analysis"
    page = (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{_e(title)} - boost report</title><style>{_STYLE}</style></head>\n<body>\n"
            + "\n".join(parts) + "\n</body></html>\n")
    (out / PAGE).write_text(page, encoding="utf-8")
    return out / PAGE


def _e(text):
    return html.escape(str(text), quote=True)


def _number(value, digits):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{value:.{digits}f}"


def _verdict_cell(verdict):
    if not verdict:
        return "<td class=\"name\">–</td>"
    word = verdict.get("word", "–")
    kind = {"settled": "settled", "drifting": "drifting"}.get(word, "few")
    reason = verdict.get("reason") or ""
    return f"<td class=\"name {kind}\" title=\"{_e(reason)}\">{_e(word)}</td>"


def _header(summary, about):
    lines = []
    if about is not None:
        lines.append(f"<h1>{_e(about.title)}</h1>")
        if about.partial:
            lines.append(f"<p class=\"partial\" id=\"partial\">partial, cycle {about.cycles_done} of "
                         f"{about.cycles_planned}: the run was still going (or stopped early) when this was "
                         "analysed.</p>")
        facts = [("system", about.system), ("conditions", f"{about.conditions} ({about.walkers} walkers)"),
                 ("cycle", f"{about.cycle_ps:g} ps"), ("production per walker", f"{about.production_ps:g} ps"),
                 ("cycles in the ledger", f"{about.cycles_done} of {about.cycles_planned}"),
                 ("platform", about.platform or "not recorded"),
                 ("protocol's git commit", about.commit or "not recorded")]
    else:
        lines.append("<h1>boost analysis</h1>")
        facts = []
    facts += [("analysed at", f"{summary['temperature (K)']:.2f} K"), ("energies in", summary["energy unit"]),
              ("error bars", _error_method(summary))]
    lines.append("<table class=\"facts\">" + "".join(
        f"<tr><th class=\"name\">{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in facts) + "</table>")
    return "\n".join(lines)


def _error_method(summary):
    bars = summary.get("error bars")
    if isinstance(bars, dict):
        return bars.get("method", "")
    return str(bars or "")


def _headline(summary):
    if "basins" not in summary:
        return "<h2>Headline numbers</h2><p>No basins are defined in the protocol, so there are no populations.</p>"
    unit = summary["energy unit"]
    rows = "".join(
        f"<tr><td class=\"name\">{_e(name)}</td><td>{_number(b['population'], 4)}</td>"
        f"<td>{_number(b['population error'], 4)}</td><td>{_number(b['population 95% low'], 4)}</td>"
        f"<td>{_number(b['population 95% high'], 4)}</td>{_verdict_cell(b.get('verdict'))}</tr>"
        for name, b in summary["basins"].items())
    table = ("<table id=\"populations\"><tr><th class=\"name\">basin</th><th>population</th><th>± error</th>"
             "<th>95% low</th><th>95% high</th><th class=\"name\">verdict</th></tr>" + rows + "</table>")
    differences = summary.get("free-energy differences", [])
    rows = "".join(
        f"<tr><td class=\"name\">{_e(d['from'])} → {_e(d['to'])}</td><td>{_number(d[f'ΔG ({unit})'], 3)}</td>"
        f"<td>{_number(d[f'ΔG error ({unit})'], 3)}</td><td>{_number(d[f'ΔG 95% low ({unit})'], 3)}</td>"
        f"<td>{_number(d[f'ΔG 95% high ({unit})'], 3)}</td>{_verdict_cell(d.get('verdict'))}</tr>"
        for d in differences)
    delta = (f"<table id=\"differences\"><tr><th class=\"name\">from → to</th><th>ΔG ({_e(unit)})</th>"
             "<th>± error</th><th>95% low</th><th>95% high</th><th class=\"name\">verdict</th></tr>"
             + rows + "</table>") if differences else ""
    return "<h2>Headline numbers</h2>" + table + delta


def _exchange_tables(summary):
    swaps = summary.get("neighbour swaps") or []
    rows = "".join(
        f"<tr><td class=\"name\">{i} ↔ {j}</td><td>{_number(s['acceptance'], 3)}</td><td>{s['attempts']}</td>"
        f"{_verdict_cell(s.get('verdict'))}</tr>" for s in swaps for i, j in [s["conditions"]])
    table = ("<table id=\"swaps\"><tr><th class=\"name\">neighbours</th><th>accepted (fraction)</th>"
             "<th>attempts</th><th class=\"name\">verdict</th></tr>" + rows + "</table>") if swaps else ""
    trips = summary.get("round trips per walker")
    if trips is not None:
        table += ("<p>Round trips from the first condition to the last and back, per walker: "
                  + ", ".join(f"walker {r}: {t}" for r, t in enumerate(trips)) + ".</p>")
    return table


def _conditions(summary):
    rows = "".join(
        f"<tr><td class=\"name\">{_e(c['label'])}</td><td>{c['samples used']}</td>"
        f"<td>{c['1 in (memory thinning)']}</td><td>{c['equilibration discarded (cycles)']}</td>"
        f"<td>{_number(c['statistical inefficiency (cycles)'], 1)}</td><td>{_number(c['f (kT)'], 3)}</td>"
        f"<td>{_number(c['f error (kT)'], 3)}</td></tr>" for c in summary["conditions"])
    return ("<h2>Per condition</h2><table id=\"conditions\"><tr><th class=\"name\">condition</th>"
            "<th>uncorrelated samples used</th><th>thinned 1 in</th><th>equilibration discarded (cycles)</th>"
            "<th>statistical inefficiency (cycles)</th><th>f (kT)</th><th>± error (kT)</th></tr>"
            + rows + "</table>")


def _warnings(seen):
    if not seen:
        return "<h2>Warnings</h2><p>None.</p>"
    return "<h2>Warnings</h2><ul>" + "".join(f"<li>{_e(w)}</li>" for w in seen) + "</ul>"


def _image(path):
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f"<figure><img alt=\"{_e(path.stem)}\" src=\"data:image/png;base64,{data}\"></figure>"
