"""A small chart of the recent readings for an alert (PNG bytes).

matplotlib is imported inside :func:`render_recent_chart` only: importing it
costs a large part of a second, which start-up and the reading path should
not pay.  Rendering happens in the outbox sender's thread.  The Figure /
Agg canvas pair is used directly (no pyplot), so concurrent renders in
several sender threads share no global state.

>>> png = render_recent_chart([1.0, 1.2, 0.9, 1.6, 1.7], None, 1.0, 0.2, 0.4, 1.8, 3, "demo")
>>> png[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
True
"""

from __future__ import annotations

import io
import math
from typing import Any, Sequence

# Points kept in an alert's chart data: enough context for a pattern of a few
# windows, small enough for a message attachment.
MAX_POINTS = 300


def chart_payload(
    values: Sequence[float],
    times: Sequence[str] | None,
    first_index: int,
    *,
    centre: float | None,
    sigma: float | None,
    lsl: float | None,
    usl: float | None,
    onset_index: int | None,
    title: str,
    unit: str = "",
) -> dict[str, Any]:
    """Plain, JSON-able chart data (stored with the alert, rendered later).

    ``first_index`` is the reading index of ``values[0]``; ``onset_index`` is a
    reading index and is turned into a position within the (trimmed) values.

    >>> d = chart_payload([1, 2, 3], None, 10, centre=2, sigma=1, lsl=None, usl=None,
    ...                   onset_index=11, title="t")
    >>> d["onset_pos"], d["first_index"]
    (1, 10)
    """
    vals = [float(v) for v in values]
    tms = list(times) if times is not None else None
    if len(vals) > MAX_POINTS:
        cut = len(vals) - MAX_POINTS
        vals = vals[cut:]
        tms = tms[cut:] if tms is not None else None
        first_index += cut
    pos = None
    if onset_index is not None and first_index <= onset_index < first_index + len(vals):
        pos = onset_index - first_index
    return {
        "values": vals,
        "times": tms,
        "first_index": int(first_index),
        "centre": centre,
        "sigma": sigma,
        "lsl": lsl,
        "usl": usl,
        "onset_pos": pos,
        "title": title,
        "unit": unit,
    }


def render_payload(payload: dict[str, Any]) -> bytes:
    """Render data from :func:`chart_payload`."""
    return render_recent_chart(
        payload["values"],
        payload.get("times"),
        payload.get("centre"),
        payload.get("sigma"),
        payload.get("lsl"),
        payload.get("usl"),
        payload.get("onset_pos"),
        payload.get("title", ""),
        unit=payload.get("unit", ""),
        first_index=payload.get("first_index", 0),
    )


def render_recent_chart(
    values: Sequence[float],
    times_or_None: Sequence[str] | None,
    centre: float | None,
    sigma: float | None,
    lsl: float | None,
    usl: float | None,
    onset_index: int | None,
    title: str,
    *,
    unit: str = "",
    first_index: int = 0,
    width_px: int = 800,
    height_px: int = 400,
) -> bytes:
    """PNG of the values with centre line, +-3 sigma band, specification limits and onset.

    ``onset_index`` is a position within ``values`` (0-based), or None.  The x
    axis is the reading index (``first_index`` onwards); when times are given,
    the first and last are written under the axis.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    dpi = 100
    fig = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    xs = list(range(first_index, first_index + len(values)))
    ax.plot(xs, list(values), marker=".", linewidth=0.8, color="#1f4e79", label="readings")
    if centre is not None:
        ax.axhline(centre, color="#2e7d32", linewidth=1.0, label="baseline centre")
        if sigma is not None and sigma > 0 and math.isfinite(sigma):
            ax.axhspan(centre - 3 * sigma, centre + 3 * sigma, color="#2e7d32", alpha=0.08,
                       label="centre +- 3 sigma")
    for lim, name in ((lsl, "lower spec"), (usl, "upper spec")):
        if lim is not None:
            ax.axhline(lim, color="#b71c1c", linewidth=1.2, linestyle="--", label=name)
    if onset_index is not None and 0 <= onset_index < len(values):
        ax.axvline(first_index + onset_index, color="#e65100", linewidth=1.2, linestyle=":",
                   label="estimated onset")
    ax.set_title(title, fontsize=10)
    ax.set_xlabel("reading")
    ax.set_ylabel(unit or "value")
    if times_or_None:
        ax.text(0.0, -0.2, str(times_or_None[0]), transform=ax.transAxes, fontsize=7, ha="left")
        ax.text(1.0, -0.2, str(times_or_None[-1]), transform=ax.transAxes, fontsize=7, ha="right")
    ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()
