"""The digest as a self-contained HTML page, a plain text and JSON.

HTML: one file, no external assets (inline CSS, charts as base64 PNG data
URIs), readable on a phone (fluid layout, wide tables scroll sideways).
Every name or text that comes from data goes through ``html.escape``.

Charts (matplotlib Agg, imported lazily, Figure/canvas without pyplot):
the period's readings in time order with the baseline centre line (or the
period mean where there is no baseline), the specification limits, and each
episode's onset (a line) and span (shaded).  Where a chart bucket holds more
than one reading the chart draws the bucket means as a line and the bucket
min..max as a band, and its caption says so: a reduction that never hides a
reading's extreme, never a silent truncation.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

# -- numbers for reading ------------------------------------------------------------------------


def num(x: float | None, sig: int = 5) -> str:
    """>>> num(500.12345), num(0.00213, 3), num(None)
    ('500.12', '0.00213', '-')
    """
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.{sig}g}"


def pval(p: float | None) -> str:
    """>>> pval(3.2e-9), pval(0.0213), pval(None), pval(0.0)
    ('3.2e-09', '0.021', '-', '< 1e-30')
    """
    if p is None:
        return "-"
    if p == 0:
        return "< 1e-30"  # the Anderson-Darling p formula is capped there (below 5e-31)
    return f"{p:.1e}" if p < 0.001 else f"{p:.2g}"


def share(d: dict | None) -> str:
    """>>> share({"count": 3, "share": 0.0125}), share(None)
    ('1.25 % (3)', '-')
    """
    if not d or d.get("share") is None:
        return "-"
    return f"{100 * d['share']:.3g} % ({d['count']})"


def interval(iv: list | None, sig: int = 5) -> str:
    return "-" if not iv else f"{num(iv[0], sig)} to {num(iv[1], sig)}"


def _u(unit: str) -> str:
    return f" {unit}" if unit else ""


def _local(iso: str | None, tz: str) -> str:
    if not iso:
        return "-"
    try:
        dt = datetime.fromisoformat(str(iso).replace("Z", "+00:00"))
    except ValueError:
        return str(iso)
    if dt.tzinfo is None:
        return dt.strftime("%Y-%m-%d %H:%M:%S")
    return dt.astimezone(ZoneInfo(tz)).strftime("%Y-%m-%d %H:%M:%S")


def _period_text(d: dict) -> str:
    p = d["period"]
    return f"{p['start_local'].replace('T', ' ')} to {p['end_local'].replace('T', ' ')} ({p['timezone']})"


def _episode_line(e: dict, unit: str, tz: str) -> str:
    size = f", size {num(e['size'], 3)}{_u(unit)}{' ' + e['direction'] if e.get('direction') else ''}" \
        if e.get("size") is not None else ""
    onset = e.get("onset_time") or (f"reading {e['onset_index']}" if e.get("onset_index") is not None else None)
    return (f"{e['pattern']} (episode {e['id']}, {e['state']}): onset {_local(onset, tz) if e.get('onset_time') else (onset or '-')}"
            f"{size}, smallest p {pval(e.get('min_p'))}"
            f"{' (' + e['detector'] + ')' if e.get('detector') else ''}, {e.get('findings') or 0} finding(s)")


def _bucket_words(seconds: int) -> str:
    if seconds % 3600 == 0:
        h = seconds // 3600
        return "one-hour" if h == 1 else f"{h}-hour"
    m = seconds // 60
    return "one-minute" if m == 1 else f"{m}-minute"


def chart_caption(c: dict) -> str:
    ch = c["chart"]
    nb = len(ch["buckets"])
    if nb and all(b[1] == 1 for b in ch["buckets"]):
        return f"All {ch['readings']} readings of the period, in time order."
    return (f"{ch['readings']} readings in {nb} {_bucket_words(ch['bucket_seconds'])} buckets: the line is each "
            "bucket's mean, the band its lowest to highest reading, so no reading's extreme is left out.")


# -- chart --------------------------------------------------------------------------------------


def render_period_chart(c: dict, tz: str, period: dict, *, width_px: int = 680, height_px: int = 400) -> bytes | None:
    """PNG of one characteristic's period (see the module docstring); None when there is nothing to draw."""
    buckets = c["chart"]["buckets"]
    if not buckets:
        return None
    import matplotlib.dates as mdates
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    zone = ZoneInfo(tz)
    w = c["chart"]["bucket_seconds"]
    xs, mean, lo, hi = [], [], [], []
    prev = None
    for t0, n, m, vmin, vmax in buckets:
        if prev is not None and t0 - prev > 3 * w:  # a gap: do not join across it
            xs.append(mdates.date2num(datetime.fromtimestamp(prev + w, timezone.utc)))
            mean.append(math.nan), lo.append(math.nan), hi.append(math.nan)
        xs.append(mdates.date2num(datetime.fromtimestamp(t0 + w / 2, timezone.utc)))
        mean.append(m), lo.append(vmin), hi.append(vmax)
        prev = t0
    dpi = 100
    fig = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    single = all(b[1] == 1 for b in buckets)
    if single:
        ax.plot(xs, mean, marker=".", markersize=3, linewidth=0.7, color="#24577a", label="readings")
    else:
        ax.fill_between(xs, lo, hi, color="#24577a", alpha=0.25, linewidth=0, label="bucket min to max")
        ax.plot(xs, mean, linewidth=0.9, color="#24577a", label="bucket mean")
    if c.get("baseline_centre") is not None:
        ax.axhline(c["baseline_centre"], color="#3d7a3d", linewidth=1.0, label="baseline centre")
    elif c.get("mean") is not None:
        ax.axhline(c["mean"], color="#3d7a3d", linewidth=1.0, linestyle="-.", label="period mean")
    for lim, name in ((c.get("lsl"), "LSL"), (c.get("usl"), "USL")):
        if lim is not None:
            ax.axhline(lim, color="#a32020", linewidth=1.1, linestyle="--", label=name)
    p0 = datetime.fromisoformat(period["start"].replace("Z", "+00:00"))
    p1 = datetime.fromisoformat(period["end"].replace("Z", "+00:00"))
    first = True
    for k, e in enumerate(sorted(c["episodes"], key=lambda e: e["span_start"])):
        a = datetime.fromisoformat(e["span_start"].replace("Z", "+00:00"))
        b = datetime.fromisoformat(e["span_end"].replace("Z", "+00:00"))
        a, b = max(a, p0), min(max(b, a), p1)
        xa, xb = mdates.date2num(a), mdates.date2num(b)
        ax.axvspan(xa, max(xb, xa + 1e-6), color="#d9822b", alpha=0.18, linewidth=0,
                   label="episode span" if first else None)
        ax.axvline(xa, color="#b45f06", linewidth=1.0, linestyle=":", label="episode onset" if first else None)
        # labels on three rows, so neighbouring episodes do not write over each other
        ax.text(xa, 0.98 - 0.07 * (k % 3), f" {e['pattern']}", transform=ax.get_xaxis_transform(), fontsize=9,
                va="top", color="#7a3e00")
        first = False
    ax.xaxis.set_major_locator(mdates.AutoDateLocator(tz=zone, minticks=3, maxticks=6))
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M\n%d %b", tz=zone))
    ax.tick_params(labelsize=9)
    ax.set_ylabel(c.get("unit") or "value", fontsize=10)
    ax.set_title(c["name"], fontsize=11, loc="left")
    ax.grid(True, linewidth=0.3, alpha=0.5)
    ax.legend(fontsize=8.5, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=4, frameon=False)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


# -- text ----------------------------------------------------------------------------------------


def _figures_line(c: dict) -> str:
    u = _u(c["unit"])
    parts = [f"{c['n']} readings"]
    if c["n"]:
        parts.append(f"mean {num(c['mean'])}{u} (95% CI {interval(c['mean_interval'])})")
        parts.append(f"sd {num(c['sd'], 3)}{u}")
        parts.append(f"min {num(c['min'])}, max {num(c['max'])}")
    if c.get("below_lsl"):
        parts.append(f"below LSL {share(c['below_lsl'])}")
    if c.get("above_usl"):
        parts.append(f"above USL {share(c['above_usl'])}")
    cap = c.get("capability")
    if cap and cap.get("computed"):
        if cap.get("cp") is not None:
            parts.append(f"Cp {num(cap['cp'], 3)} ({interval(cap['cp_interval'], 3)})")
        parts.append(f"Cpk {num(cap['cpk'], 3)} ({interval(cap['cpk_interval'], 3)})")
    nrm = c.get("normality")
    if nrm and nrm.get("computed"):
        parts.append(f"normality AD p {pval(nrm['pvalue'])}")
    return "; ".join(parts)


def render_text(d: dict) -> str:
    """The digest as plain text for a chat message or an e-mail body."""
    tz = d["period"]["timezone"]
    out = [f"linewatch digest, {_period_text(d)}", ""]
    loud = [c for c in d["characteristics"] if c["episodes"]]
    quiet = [c for c in d["characteristics"] if not c["episodes"]]
    if loud:
        out.append(f"NEEDS A LOOK ({len(loud)})")
        for c in loud:
            out.append(f"* {c['name']}: {_figures_line(c)}")
            for e in c["episodes"]:
                out.append(f"    - {_episode_line(e, c['unit'], tz)}")
                for note in e["notes"]:
                    out.append(f"      note: {note}")
            for note in c["capability_notes"]:
                out.append(f"    ! {note}")
        out.append("")
    if quiet:
        out.append(f"QUIET ({len(quiet)})")
        for c in quiet:
            out.append(f"* {c['name']}: {_figures_line(c)}")
            for note in c["capability_notes"]:
                out.append(f"    ! {note}")
        out.append("")
    h = d["health"]
    out.append("SOURCES")
    for s in h["sources"]:
        out.append(f"* {s['name']}: {s['readings']} readings, {s['quarantined']} lines set aside")
    for e in h["silences"]:
        out.append(f"* silence on {e['source']} (episode {e['id']}, {e['state']}) from {_local(e['span_start'], tz)}"
                   f" to {_local(e['span_end'], tz) if e['state'] == 'closed' else 'still open'}")
    for q in h["quarantine"]:
        where = f", first at {q['first_file']}:{q['first_line']}" if q.get("first_file") else ""
        out.append(f"* {q['count']} line(s) of {q['source']} set aside: {q['reason']}{where}")
    al = h["alerts"]
    for key, words in (("undelivered", "not delivered yet"), ("expired", "given up (expired)"),
                       ("held_for_digest", "held for this digest")):
        for a in al[key]:
            err = f": {a['last_error']}" if a.get("last_error") and key != "held_for_digest" else ""
            out.append(f"* alert {words} to {a['target']}: {a['title']}{err}")
    if not (h["silences"] or h["quarantine"] or any(al.values())):
        out.append("* no silences, no lines set aside, every alert delivered")
    out += ["", d["caution"]]
    return "\n".join(out) + "\n"


def render_json(d: dict) -> str:
    """The digest as JSON (non-finite numbers become null)."""
    return json.dumps(_clean(d), indent=1, allow_nan=False, default=_json_default)


def _clean(o: Any) -> Any:
    if isinstance(o, float):
        return o if math.isfinite(o) else None
    if isinstance(o, dict):
        return {k: _clean(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_clean(v) for v in o]
    return o


def _json_default(o: Any) -> Any:
    if isinstance(o, float) and not math.isfinite(o):
        return None
    return str(o)


# -- HTML ------------------------------------------------------------------------------------------

_CSS = """
*{box-sizing:border-box}
body{margin:0;font:15px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#1d232a;background:#eef1f4}
main{max-width:980px;margin:0 auto;padding:12px}
header{background:#20303f;color:#f4f7fa;padding:14px 16px;border-radius:8px}
header h1{margin:0;font-size:1.25rem;font-weight:600}
header p{margin:4px 0 0;font-size:.9rem;opacity:.9}
.tally{display:flex;flex-wrap:wrap;gap:8px;margin:12px 0}
.tally div{flex:1 1 130px;background:#fff;border-radius:8px;padding:8px 10px;border-left:4px solid #8aa1b5}
.tally b{display:block;font-size:1.3rem}
.tally .warn{border-left-color:#d9822b}
h2{font-size:1.05rem;margin:20px 0 8px;color:#20303f}
section.char{background:#fff;border-radius:8px;padding:12px 14px;margin:0 0 14px;border-top:4px solid #d9822b}
section.char h3{margin:0 0 6px;font-size:1.05rem;word-break:break-word}
.meta{color:#56636f;font-size:.85rem;margin:0 0 8px}
.figs{display:grid;grid-template-columns:repeat(auto-fill,minmax(160px,1fr));gap:6px 14px;margin:8px 0}
.figs div{border-bottom:1px solid #e3e7eb;padding:2px 0}
.figs span{display:block;color:#56636f;font-size:.75rem}
.scroll{overflow-x:auto;-webkit-overflow-scrolling:touch}
table{border-collapse:collapse;width:100%;font-size:.85rem}
th,td{text-align:left;padding:4px 8px;border-bottom:1px solid #e3e7eb;vertical-align:top}
th{background:#f4f6f8;font-weight:600}
th.n{text-align:right}
td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
figure{margin:10px 0}
figure img{display:block;width:100%;max-width:760px;height:auto;border:1px solid #e3e7eb;border-radius:4px}
figcaption{font-size:.8rem;color:#56636f;margin-top:4px}
.note{background:#fff6e8;border-left:4px solid #d9822b;padding:6px 10px;margin:6px 0;font-size:.85rem}
ul.quiet{list-style:none;margin:0;padding:0}
ul.quiet li{background:#fff;border-radius:6px;padding:8px 12px;margin:0 0 6px;font-size:.85rem;word-break:break-word}
ul.quiet b{font-size:.95rem}
.box{background:#fff;border-radius:8px;padding:10px 14px;margin:0 0 14px}
.box h3{font-size:.95rem;margin:6px 0}
footer{font-size:.78rem;color:#56636f;margin:18px 0 30px}
@media (max-width:520px){body{font-size:14px}main{padding:6px}section.char{padding:10px}
.figs{grid-template-columns:repeat(2,minmax(0,1fr))}
table.eps thead{display:none}
table.eps tr{display:block;border-bottom:2px solid #e3e7eb;padding:4px 0}
table.eps td{display:flex;justify-content:space-between;gap:10px;border:0;padding:2px 0;text-align:right}
table.eps td::before{content:attr(data-label);color:#56636f;font-size:.75rem;text-align:left;flex:0 0 auto}}
"""


def _e(x: Any) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _fig(label: str, value: str) -> str:
    return f"<div><span>{_e(label)}</span>{_e(value)}</div>"


def _figs_html(c: dict) -> str:
    u = _u(c["unit"])
    items = [_fig("readings", str(c["n"]) + (f" ({c['untimed']} at arrival time)" if c.get("untimed") else ""))]
    if c["n"]:
        items += [
            _fig("mean", f"{num(c['mean'])}{u}"),
            _fig("mean, 95% interval", interval(c["mean_interval"])),
            _fig("sd", f"{num(c['sd'], 3)}{u}"),
            _fig("min / max", f"{num(c['min'])} / {num(c['max'])}"),
        ]
    if c.get("below_lsl"):
        items.append(_fig(f"below LSL {num(c['lsl'])}", share(c["below_lsl"])))
    if c.get("above_usl"):
        items.append(_fig(f"above USL {num(c['usl'])}", share(c["above_usl"])))
    cap = c.get("capability")
    if cap and cap.get("computed"):
        if cap.get("cp") is not None:
            items.append(_fig("Cp (95% interval)", f"{num(cap['cp'], 3)} ({interval(cap['cp_interval'], 3)})"))
        items.append(_fig("Cpk (95% interval)", f"{num(cap['cpk'], 3)} ({interval(cap['cpk_interval'], 3)})"))
    elif cap:
        items.append(_fig("Cp / Cpk", "not computed: " + cap.get("why", "")))
    nrm = c.get("normality")
    if nrm and nrm.get("computed"):
        items.append(_fig("normality (Anderson-Darling)",
                          f"A* {num(nrm['adjusted'], 3)}, p {pval(nrm['pvalue'])}, n {nrm['n']}"
                          + ("" if nrm["all_readings"] else " (sample)")))
    elif nrm:
        items.append(_fig("normality", "not checked: " + nrm.get("why", "")))
    return f'<div class="figs">{"".join(items)}</div>'


def _episodes_html(c: dict, tz: str) -> str:
    rows = []
    for e in c["episodes"]:
        onset = _local(e["onset_time"], tz) if e.get("onset_time") else (
            f"reading {e['onset_index']}" if e.get("onset_index") is not None else "-")
        size = "-" if e.get("size") is None else f"{num(e['size'], 3)}{_u(c['unit'])} {e.get('direction') or ''}".strip()
        notes = "<br>".join(_e(n) for n in e["notes"]) or "-"
        rows.append(
            f'<tr><td data-label="pattern"><span>{_e(e["pattern"])} <small>{_e(e["id"])}</small></span></td>'
            f'<td data-label="onset">{_e(onset)}</td>'
            f'<td class=n data-label="size">{_e(size)}</td>'
            f'<td class=n data-label="smallest p">{_e(pval(e.get("min_p")))}</td>'
            f'<td data-label="state">{_e(e["state"])}</td><td data-label="method">{_e(e.get("detector") or "-")}</td>'
            f'<td data-label="notes"><span>{notes}</span></td></tr>')
    return ('<div class="scroll"><table class="eps"><thead><tr><th>pattern</th><th>onset</th><th class=n>size</th>'
            "<th class=n>smallest p</th><th>state</th><th>method</th><th>notes</th></tr></thead><tbody>"
            + "".join(rows) + "</tbody></table></div>")


def _chart_html(c: dict, tz: str, period: dict, charts: bool) -> str:
    if not charts or not c["chart"]["buckets"]:
        return ""
    png = render_period_chart(c, tz, period)
    if png is None:
        return ""
    b64 = base64.b64encode(png).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{b64}" alt="{_e("chart of " + c["name"])}">'
            f"<figcaption>{_e(chart_caption(c))}</figcaption></figure>")


def _quiet_html(c: dict) -> str:
    notes = "".join(f'<div class="note">{_e(n)}</div>' for n in c["capability_notes"])
    return f"<li><b>{_e(c['name'])}</b> &middot; {_e(_figures_line(c))}{notes}</li>"


def _health_html(d: dict) -> str:
    h = d["health"]
    tz = d["period"]["timezone"]
    src = "".join(f"<tr><td>{_e(s['name'])}</td><td class=n>{s['readings']}</td><td class=n>{s['quarantined']}</td></tr>"
                  for s in h["sources"])
    parts = ['<div class="box"><h3>Sources</h3><div class="scroll"><table><thead><tr><th>source</th><th class=n>readings</th>'
             f"<th class=n>lines set aside</th></tr></thead><tbody>{src}</tbody></table></div>"]
    if h["silences"]:
        rows = "".join(
            f"<tr><td>{_e(e['source'])}</td><td>{_e(_local(e['span_start'], tz))}</td>"
            f"<td>{_e(_local(e['span_end'], tz) if e['state'] == 'closed' else 'still open')}</td><td>{_e(e['id'])}</td></tr>"
            for e in h["silences"])
        parts.append('<h3>Silences</h3><div class="scroll"><table><thead><tr><th>source</th><th>from</th><th>to</th>'
                     f"<th>episode</th></tr></thead><tbody>{rows}</tbody></table></div>")
    if h["quarantine"]:
        rows = "".join(
            f"<tr><td>{_e(q['source'])}</td><td>{_e(q['reason'])}</td><td class=n>{q['count']}</td>"
            f"<td>{_e((q['first_file'] or '') + (':' + str(q['first_line']) if q.get('first_line') else ''))}</td></tr>"
            for q in h["quarantine"])
        parts.append('<h3>Lines set aside, by reason</h3><div class="scroll"><table><thead><tr><th>source</th>'
                     f"<th>reason</th><th class=n>lines</th><th>first at</th></tr></thead><tbody>{rows}</tbody></table></div>")
    al = h["alerts"]
    arows = []
    for key, words in (("undelivered", "not delivered yet"), ("expired", "expired"), ("held_for_digest", "held for digest")):
        for a in al[key]:
            arows.append(f"<tr><td>{_e(words)}</td><td>{_e(a['target'])}</td><td>{_e(a['title'])}</td>"
                         f"<td class=n>{a['attempts']}</td><td>{_e(a.get('last_error') or '-')}</td></tr>")
    if arows:
        parts.append('<h3>Alerts</h3><div class="scroll"><table><thead><tr><th>status</th><th>target</th><th>alert</th>'
                     f"<th class=n>attempts</th><th>last error</th></tr></thead><tbody>{''.join(arows)}</tbody></table></div>")
    if not (h["silences"] or h["quarantine"] or arows):
        parts.append("<p>No silences, no lines set aside, every alert delivered.</p>")
    parts.append("</div>")
    return "".join(parts)


def render_html(d: dict, *, charts: bool = True) -> str:
    """The digest as one self-contained HTML page."""
    tz = d["period"]["timezone"]
    loud = [c for c in d["characteristics"] if c["episodes"]]
    quiet = [c for c in d["characteristics"] if not c["episodes"]]
    h = d["health"]
    undelivered = len(h["alerts"]["undelivered"]) + len(h["alerts"]["expired"])
    total = sum(c["n"] for c in d["characteristics"])
    tally = (
        f'<div><b>{total}</b>readings</div>'
        f'<div class="{"warn" if loud else ""}"><b>{len(loud)}</b>of {len(d["characteristics"])} with episodes</div>'
        f'<div class="{"warn" if h["quarantine_total"] else ""}"><b>{h["quarantine_total"]}</b>lines set aside</div>'
        f'<div class="{"warn" if undelivered else ""}"><b>{undelivered}</b>alerts undelivered</div>'
    )
    body = [f'<header><h1>linewatch digest</h1><p>{_e(_period_text(d))}</p>'
            f'<p>made {_e(_local(d["generated_at"], tz))}</p></header>', f'<div class="tally">{tally}</div>']
    if loud:
        body.append("<h2>Needs a look</h2>")
        for c in loud:
            meta = " &middot; ".join(_e(x) for x in (c["source"] and f"source {c['source']}",
                                                       c["unit"] and f"unit {c['unit']}") if x)
            notes = "".join(f'<div class="note">{_e(n)}</div>' for n in c["capability_notes"])
            body.append(f'<section class="char"><h3>{_e(c["name"])}</h3><p class="meta">{meta}</p>'
                        f"{_figs_html(c)}{notes}{_chart_html(c, tz, d['period'], charts)}{_episodes_html(c, tz)}</section>")
    if quiet:
        body.append("<h2>Quiet</h2><ul class=\"quiet\">" + "".join(_quiet_html(c) for c in quiet) + "</ul>")
    body.append("<h2>Source health</h2>" + _health_html(d))
    body.append(
        "<footer><p>Mean interval: Student t, 95 %. Cp interval: chi-square on n-1 degrees of freedom; Cpk interval: "
        "Bissell (1990) normal approximation; both with the overall sd of the period and both assume independent, "
        "normal readings. Normality: Anderson-Darling with estimated mean and variance, p from D'Agostino &amp; "
        f"Stephens (1986).</p><p>{_e(d['caution'])}</p></footer>")
    title = f"linewatch digest {d['period']['label']}"
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{_e(title)}</title><style>{_CSS}</style></head><body><main>"
            + "".join(body) + "</main></body></html>\n")


# -- files ----------------------------------------------------------------------------------------


def write_digest(d: dict, out_dir: str | os.PathLike, *, charts: bool = True) -> dict[str, Path]:
    """Write ``digest-<label>.html``, ``.txt`` and ``.json`` into ``out_dir``; return their paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    stem = "digest-" + "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in d["period"]["label"])
    paths = {"html": out / f"{stem}.html", "text": out / f"{stem}.txt", "json": out / f"{stem}.json"}
    for key, text in (("html", render_html(d, charts=charts)), ("text", render_text(d)), ("json", render_json(d))):
        tmp = paths[key].with_suffix(paths[key].suffix + ".tmp")
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, paths[key])
    return paths
