"""One self-contained HTML page and its figures, shared by the report and compare.

A page is a single file: the style sheet inline and every plot a base64 PNG data: URI (no
network, no outside files). Figures take plain data (times, values, spectra), never the store.
Imports numpy and matplotlib (Agg backend, on first use); nothing from qcd.
"""
from __future__ import annotations

import base64
import html
import io
import math
from dataclasses import dataclass
from datetime import datetime, timezone, tzinfo
from typing import Any, Sequence

import numpy as np

__all__ = ["page", "figure_data_uri", "pyplot", "Panel", "trend_figure", "Curve",
           "spectra_figure", "date_axis"]

_CSS = """
body{font:14px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;color:#1d2430;margin:0;
background:#f4f5f7}
main{max-width:1180px;margin:0 auto;padding:24px 28px 60px}
h1{font-size:24px;margin:0 0 4px}h2{font-size:19px;margin:0 0 10px;display:flex;gap:12px;
align-items:baseline}
.sub{color:#5a6472;margin:0 0 18px}
section.rig{background:#fff;border:1px solid #dde1e7;border-radius:8px;padding:18px 20px;
margin:18px 0}
.pill{font-size:12px;font-weight:600;border-radius:10px;padding:2px 9px;background:#e6efe6;
color:#235a2c}.pill.bad{background:#fbe4e1;color:#8c2415}.pill.warn{background:#fff1d6;
color:#7a5200}
table{border-collapse:collapse;width:100%;margin:8px 0 14px;font-size:13px}
th,td{text-align:left;padding:4px 8px;border-bottom:1px solid #eceef2;vertical-align:top}
th{background:#f7f8fa;font-weight:600}td.num{text-align:right;font-variant-numeric:tabular-nums}
tr.high td,tr.low td,tr.flag td,tr.sig td{background:#fdf0ee}tr.err td{background:#fff6e0}
img{max-width:100%;display:block;margin:6px 0 10px}
.alerts li{margin:2px 0}.hint{background:#f2f6fb;border-left:4px solid #4a6fa5;padding:6px 10px;
margin:6px 0}
.safety{background:#fff6e0;border-left:4px solid #c98a00;padding:6px 10px;margin:6px 0;
font-size:13px}
.meta{color:#5a6472}details summary{cursor:pointer;color:#4a6fa5;margin:6px 0}
.key{font-size:13px}.sw{display:inline-block;width:12px;height:12px;border-radius:2px;
vertical-align:-1px;margin:0 5px 0 2px}.sw.band{background:rgba(74,157,91,.28)}
.sw.period{background:rgba(153,153,153,.3);margin-left:8px}
table.summary td:nth-child(4){min-width:14em}a{color:#2f5288}
tr.better td{background:#eef7ef}
.nw,td.state{white-space:nowrap}
.trends{display:grid;grid-template-columns:1fr 1fr;gap:2px 8px}.trends img{margin:2px 0}
@media (max-width:600px){main{padding:12px 10px 40px}h1{font-size:20px}
section.rig{padding:12px 10px}h2{flex-wrap:wrap;gap:6px}
table{font-size:12px}th,td{padding:3px 4px}.opt{display:none}
td.path{overflow-wrap:anywhere}table.summary td:nth-child(4){min-width:0}
.trends{grid-template-columns:1fr}}
"""


def page(title: str, body: str) -> str:
    """A whole self-contained HTML page around ``body``."""
    return (f"<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{html.escape(title)}</title><style>{_CSS}</style></head>"
            f"<body><main>{body}</main></body></html>\n")


def figure_data_uri(fig: Any) -> str:
    """A matplotlib figure as a data: URI (PNG, base64)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def pyplot() -> Any:
    """matplotlib.pyplot on the Agg backend (no display needed)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


def _utc(t: float, zone: tzinfo | None = timezone.utc) -> datetime:
    """Unix seconds as a datetime in ``zone`` (None: this computer's zone)."""
    if zone is None:
        return datetime.fromtimestamp(t).astimezone()
    return datetime.fromtimestamp(t, tz=zone)


# ------------------------------------------------------------------------------ trends

@dataclass(frozen=True)
class Panel:
    """One trend plot: values over time, the normal band, flagged points, alert openings and
    logbook notes."""
    title: str
    unit: str
    times: Sequence[float]              # Unix seconds
    values: Sequence[float]
    flagged: Sequence[bool]
    band: tuple[float, float, float] | None = None    # (low, median, high) of the normal range
    marks: Sequence[float] = ()         # alert openings, Unix seconds
    log_axis: bool = False              # a log axis when the values span more than 20x
    notes: Sequence[tuple[float, str]] = ()   # logbook notes (Unix seconds, text)
    band_label: str = "normal range"    # the legend's name of the band


def date_axis(ax: Any, zone: tzinfo) -> None:
    """Date ticks in ``zone``: every label names its day ('Nov 13'); within a day hours, the
    day named at midnight; so no two ticks carry the same label at any zoom."""
    from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
    loc = AutoDateLocator(minticks=3, maxticks=7, tz=zone, interval_multiples=False)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(
        loc, tz=zone, show_offset=False,
        formats=["%Y", "%b %Y", "%b %d", "%b %d %H:%M", "%H:%M", "%H:%M:%S"],
        zero_formats=["", "%Y", "%b %d", "%b %d", "%b %d %H:%M", "%H:%M"]))


def trend_figure(panels: Sequence[Panel], *, shade: tuple[float, float],
                 zone: tzinfo | None = timezone.utc, zone_label: str = "UTC") -> str | None:
    """Trend plots two per row as one PNG data: URI; ``shade`` marks the report's period.
    Dates are shown in ``zone`` (None: this computer's), named ``zone_label`` on the axis;
    the date axis labels each tick once (days, then hours within a day when zoomed in)."""
    if not panels:
        return None
    if zone is None:
        zone = datetime.now().astimezone().tzinfo
    def _utc(t: float) -> datetime:                # noqa: F811 - the zone of this figure
        return datetime.fromtimestamp(t, tz=zone)
    plt = pyplot()
    ncol = min(2, len(panels))
    nrow = math.ceil(len(panels) / ncol)
    height = 2.25 * nrow + 0.45
    width = 5.7 * ncol
    fig, axes = plt.subplots(nrow, ncol, figsize=(width, height), dpi=96, squeeze=False)
    fig.subplots_adjust(left=0.75 / width, right=1 - 0.1 / width, top=1 - 0.3 / height,
                        bottom=0.5 / height, hspace=0.5, wspace=0.14 * 2 / ncol)
    for ax, p in zip(axes.flat, panels):
        ts = [_utc(t) for t in p.times]
        vs = np.asarray(p.values, dtype=float)
        fl = np.asarray(p.flagged, dtype=bool)
        if p.band is not None:
            low, median, high = p.band
            ax.axhspan(low, high, color="#4a9d5b", alpha=0.13, lw=0,
                       label=p.band_label or "reference band")
            ax.axhline(median, color="#4a9d5b", lw=0.8, alpha=0.7)
        ax.plot(ts, vs, color="#4a6fa5", lw=0.9, marker="o", ms=2.6)
        if fl.any():
            ax.plot([t for t, f in zip(ts, fl) if f], vs[fl], "o", color="#c8553d", ms=4.5,
                    label="flagged file")
        for i, t in enumerate(p.marks):
            ax.axvline(_utc(t), color="#c8553d", lw=1.0, ls="--",
                       label="alert opened" if i == 0 else None)
        for i, (t, text) in enumerate(p.notes):
            ax.axvline(_utc(t), color="#6b4fa0", lw=1.0, ls="-.",
                       label="logbook note" if i == 0 else None)
            ax.annotate(text if len(text) <= 28 else text[:27] + "\u2026", (_utc(t), 1.0),
                        xycoords=("data", "axes fraction"), xytext=(2, -3),
                        textcoords="offset points", rotation=90, va="top", ha="left",
                        fontsize=6.5, color="#6b4fa0")
        ax.axvspan(_utc(shade[0]), _utc(shade[1]), color="#999999", alpha=0.14, lw=0,
                   label="report period")
        ax.set_title(p.title, fontsize=9.5, loc="left")
        ax.set_ylabel(p.unit or "value", fontsize=9)
        ax.tick_params(labelsize=8)
        date_axis(ax, zone)
        ax.grid(True, alpha=0.25)
        if p.log_axis and vs.size and np.all(vs > 0) and vs.max() / vs.min() > 20:
            ax.set_yscale("log")
        ax.legend(fontsize=7, loc="best", framealpha=0.75)
    for ax in list(axes.flat)[len(panels):]:
        ax.axis("off")
    for ax in axes[-1]:
        if ax.has_data():
            ax.set_xlabel(f"date ({zone_label})", fontsize=9)
    uri = figure_data_uri(fig)
    plt.close(fig)
    return uri


# ------------------------------------------------------------------------------ spectra

@dataclass(frozen=True)
class Curve:
    """One spectrum to draw: density (unit**2/Hz) against frequency."""
    freqs_hz: Sequence[float]
    density: Sequence[float]
    label: str
    color: str
    width: float = 1.1


def spectra_figure(curves: Sequence[Curve], *, unit: str, title: str,
                   line_hz: float | None = None, harmonics_to_hz: float = 1000.0) -> str:
    """Spectra overlaid on log-log axes, the mains harmonics of ``line_hz`` dotted."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(11.4, 3.6), dpi=96)
    fig.subplots_adjust(left=0.065, right=0.99, top=0.92, bottom=0.13)
    last = None
    for c in curves:
        f = np.asarray(c.freqs_hz, dtype=float)
        d = np.asarray(c.density, dtype=float)
        sel = (f > 0) & (d > 0)
        ax.loglog(f[sel], d[sel], color=c.color, lw=c.width, label=c.label)
        last = (f[sel], d[sel])
    if line_hz and last is not None:
        top = last[0].max() if last[0].size else 0.0
        for h in range(1, 11):
            if h * line_hz > min(top, harmonics_to_hz):
                break
            ax.axvline(h * line_hz, color="#c98a00", lw=0.7, ls=":", alpha=0.8,
                       label=f"mains harmonics ({line_hz:g} Hz)" if h == 1 else None)
    if last is not None and last[1].size:     # keep a filter roll-off from squashing the rest
        d = last[1]
        ax.set_ylim(bottom=max(float(np.min(d)), float(np.median(d)) * 1e-4) / 2)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"PSD ({unit}\u00b2/Hz)")
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(fontsize=8, loc="lower left")
    ax.set_title(title, fontsize=10, loc="left")
    uri = figure_data_uri(fig)
    plt.close(fig)
    return uri
