"""Self-contained HTML reports of a capture: the summary figures, the plots, the cautions.

:func:`render` returns the page as a string and :func:`write` writes it atomically. The page
is one file: BokehJS is inlined (no network needed to open it, e.g. on a lab machine), the
plots are built by :mod:`quadkit.views` (reduced for display, so the plot data stays small
whatever the capture's length), and every string taken from the capture's metadata
(description, hardware, annotation labels, other fields) is HTML-escaped, so markup or
script in a file shows as text and never runs.

The command line's ``quadkit report FILE -o OUT.html`` calls :func:`write`.

Examples
--------
>>> import quadkit
>>> from quadkit import report
>>> cap = quadkit.synth.tone(50e3, sample_rate=1e6, n_samples=8192, center_frequency=915e6,
...                          description="bench 2 <board B>")
>>> page = report.render(cap, title="Tone check")
>>> "bench 2 &lt;board B&gt;" in page, "<board B>" in page
(True, False)
"""

from __future__ import annotations

import datetime as _dt
import html
import math
import os
import pathlib
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
import xarray as xr

from . import _capture

__all__ = ["render", "write", "CAUTIONS"]

#: The cautions printed at the end of every report.
CAUTIONS: tuple[str, ...] = (
    "Waveforms generated or replayed from a capture may be transmitted only as your local "
    "radio regulations allow: use the frequencies, power levels and licences that apply to "
    "you, and follow licensed practice.",
    "Test transmitters on a cabled set-up with enough attenuators between transmitter and "
    "receiver; an open antenna puts the signal on the air.",
    "Check the receiver's maximum input power before connecting anything: too much power "
    "damages the front end, and a saturated input makes every figure in this report wrong "
    "(see the clipping figure).",
    "The figures assume the metadata is right: sample rate, center frequency and full scale. "
    "Levels are in dBFS unless the capture carries a calibration (dBm = dBFS + "
    "calibration_db).",
)

_CSS = """
:root { --ink:#1e2a30; --muted:#5d6b70; --band:#1d3440; --paper:#fcfbf8; --line:#e7e3da;
        --accent:#2b8c8c; --warn:#9b4a10; --warnbg:#fdf3e7; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; }
header { background:var(--band); color:#f4efe6; padding:18px 28px 14px; }
header h1 { margin:0 0 4px; font-size:22px; font-weight:600; }
header .sub { color:#c9d6d8; font-size:13px; }
main { max-width:1180px; margin:0 auto; padding:12px 28px 40px; }
h2 { font-size:16px; margin:28px 0 8px; padding-bottom:4px; border-bottom:2px solid var(--accent); }
table { border-collapse:collapse; margin:6px 0 10px; }
th, td { padding:3px 10px; border-bottom:1px solid var(--line); vertical-align:top; }
th { text-align:left; font-weight:600; background:#f3efe6; }
td.num { text-align:right; font-variant-numeric: tabular-nums; white-space:nowrap; }
td.unit { color:var(--muted); }
td.meaning { color:var(--muted); font-size:12.5px; }
.grid { display:grid; grid-template-columns: 1fr 1fr; gap: 0 28px; }
.warnings li { color:var(--warn); background:var(--warnbg); margin:3px 0; padding:3px 8px;
               list-style:none; border-left:3px solid var(--warn); }
.plot { margin:10px 0 18px; }
.note { color:var(--muted); font-size:12.5px; }
.cautions { background:#eef5f4; border-left:4px solid var(--accent); padding:8px 16px; }
.text { white-space:pre-wrap; }
footer { color:var(--muted); font-size:12px; margin-top:30px; }
@media (max-width: 900px) { .grid { grid-template-columns: 1fr; } }
"""


def _e(value: Any) -> str:
    """HTML-escape any metadata value (quotes too, so it is safe in attributes)."""
    return html.escape(str(value), quote=True)


def _short(value: Any, limit: int = 300) -> str:
    s = value if isinstance(value, str) else repr(value)
    return s if len(s) <= limit else s[: limit - 1] + "…"


def _si(value: float, unit: str) -> str:
    if value == 0:
        return f"0 {unit}"
    for scale, p in ((1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"),
                     (1e-9, "n")):
        if abs(value) >= scale:
            return f"{value / scale:.7g} {p}{unit}"
    return f"{value:.3g} {unit}"


def _format(name: str, value: Any, units: str) -> tuple[str, str]:
    """(value text, unit text) for the summary table."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return _e(value), _e(units)
    if not math.isfinite(v):
        return ("∞" if v > 0 else "−∞") if math.isinf(v) else "n/a", _e(units)
    if name.endswith("samples") or name.endswith("count") or (units == "1" and v.is_integer()):
        return f"{int(v):,}", ""
    if units in ("Hz", "s"):
        return _e(_si(v, units)), ""
    if units == "FS":
        return f"{v:+.5f}", "FS"
    if name == "clipped_fraction":
        return f"{v:.3g}", ""
    return f"{v:.2f}", _e(units)


def _scalar_rows(summary: xr.Dataset) -> list[tuple[str, list[str], str, str]]:
    rows = []
    for name, var in summary.data_vars.items():
        if "tone" in var.dims or "symbol" in var.dims:
            continue
        if var.ndim > 1 or (var.ndim == 1 and var.dims != ("channel",)):
            continue
        units = str(var.attrs.get("units", ""))
        values = np.atleast_1d(np.asarray(var.values))
        cells = [_format(str(name), v, units) for v in values]
        rows.append((str(name), [c[0] for c in cells], cells[0][1], str(var.attrs.get(
            "long_name", ""))))
    return rows


def _summary_table(summary: xr.Dataset) -> str:
    rows = _scalar_rows(summary)
    channels = list(summary["channel"].values) if "channel" in summary.dims else None
    head = "<tr><th>figure</th>"
    head += "".join(f"<th>channel {_e(c)}</th>" for c in channels) if channels else \
        "<th>value</th>"
    head += "<th>unit</th><th>meaning</th></tr>"
    body = []
    for name, values, unit, meaning in rows:
        if channels and len(values) == 1:
            values = values * len(channels)
        cells = "".join(f"<td class='num'>{v}</td>" for v in values)
        body.append(f"<tr><td><code>{_e(name)}</code></td>{cells}<td class='unit'>{unit}</td>"
                    f"<td class='meaning'>{_e(meaning)}</td></tr>")
    return f"<table class='summary'>{head}{''.join(body)}</table>"


def _tones_table(summary: xr.Dataset) -> str:
    names = [n for n, v in summary.data_vars.items() if v.dims == ("tone",)]
    if not names or summary.sizes.get("tone", 0) == 0:
        return "<p class='note'>No tone stands out of the noise floor.</p>"
    head = "".join(
        f"<th>{_e(str(n).removeprefix('tone_'))}"
        f"{' (' + _e(summary[n].attrs['units']) + ')' if summary[n].attrs.get('units') not in (None, '', '1') else ''}"
        f"</th>" for n in names)
    body = []
    for k in range(summary.sizes["tone"]):
        cells = []
        for n in names:
            v = summary[n].values[k]
            units = str(summary[n].attrs.get("units", ""))
            if isinstance(v, (float, np.floating)) and units == "Hz":
                cells.append(f"<td class='num'>{_e(f'{float(v):,.1f}')}</td>")
            elif isinstance(v, (float, np.floating)):
                cells.append(f"<td class='num'>{float(v):.2f}</td>")
            else:
                cells.append(f"<td class='num'>{_e(v)}</td>")
        body.append(f"<tr><td class='num'>{k + 1}</td>{''.join(cells)}</tr>")
    return f"<table class='tones'><tr><th>#</th>{head}</tr>{''.join(body)}</table>"


_KNOWN = ("sample_rate", "center_frequency", "full_scale", "calibration_db", "start_time",
          "description", "hardware", "annotations", "segments")


def _recording_table(cap: xr.DataArray, source_name: str | None) -> str:
    a = cap.attrs
    fs = _capture.sample_rate(cap)
    n = int(cap.sizes["time"])
    rows: list[tuple[str, str]] = []
    if source_name:
        rows.append(("file", _e(source_name)))
    for key in ("description", "hardware", "start_time"):
        if a.get(key) not in (None, ""):
            rows.append((key.replace("_", " "), f"<span class='text'>{_e(_short(a[key], 2000))}"
                                                 "</span>"))
    rows += [
        ("sample rate", _e(_si(fs, "S/s"))),
        ("center frequency", _e(_si(float(a.get("center_frequency", 0.0)), "Hz"))),
        ("samples", f"{n:,}" + (f" × {cap.sizes['channel']} channels" if "channel" in cap.dims
                                else "")),
        ("duration", _e(_si(n / fs, "s"))),
        ("sample type", _e(f"{cap.dtype} ({'complex IQ' if _capture.is_complex(cap) else 'real'})")),
        ("full scale", _e(f"{_capture.full_scale(cap):g}")),
    ]
    if a.get("calibration_db") is not None:
        rows.append(("calibration", _e(f"dBm = dBFS + {float(a['calibration_db']):g} dB")))
    if _capture.is_lazy(cap):
        rows.append(("read", "lazily, chunk by chunk"))
    other = [(k, v) for k, v in a.items() if k not in _KNOWN and not str(k).startswith("_")]
    body = "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows)
    out = f"<table class='recording'>{body}</table>"
    if other:
        extra = "".join(f"<tr><td><code>{_e(k)}</code></td><td class='text'>{_e(_short(v))}</td>"
                        f"</tr>" for k, v in other[:60])
        more = f"<p class='note'>… and {len(other) - 60} more.</p>" if len(other) > 60 else ""
        out += ("<details><summary>other metadata fields</summary>"
                f"<table>{extra}</table>{more}</details>")
    return out


def _annotations_table(cap: xr.DataArray) -> str:
    ann = cap.attrs.get("annotations") or []
    segs = cap.attrs.get("segments") or []
    parts = []
    if ann:
        cols = ("label", "comment", "start_sample", "sample_count", "lower_frequency_hz",
                "upper_frequency_hz")
        head = "".join(f"<th>{_e(c.replace('_', ' '))}</th>" for c in cols)
        body = []
        for item in list(ann)[:200]:
            item = item if isinstance(item, Mapping) else {"comment": item}
            cells = []
            for c in cols:
                v = item.get(c, "")
                if c.endswith("_hz") and isinstance(v, (int, float)):
                    cells.append(f"<td class='num'>{_e(_si(float(v), 'Hz'))}</td>")
                elif isinstance(v, (int, np.integer)):
                    cells.append(f"<td class='num'>{int(v):,}</td>")
                else:
                    cells.append(f"<td class='text'>{_e(_short(v, 500))}</td>")
            body.append(f"<tr>{''.join(cells)}</tr>")
        parts.append(f"<h3>Annotations ({len(ann)})</h3><table>{head}{''.join(body)}</table>")
    if segs:
        body = "".join(
            f"<tr><td class='num'>{_e(s.get('start_sample', ''))}</td><td class='num'>"
            f"{_e(_si(float(s['center_frequency']), 'Hz')) if 'center_frequency' in s else ''}"
            f"</td><td>{_e(s.get('start_time', ''))}</td></tr>"
            for s in list(segs)[:200] if isinstance(s, Mapping))
        parts.append("<h3>Segments</h3><table><tr><th>start sample</th><th>center frequency</th>"
                     f"<th>start time</th></tr>{body}</table>")
    return "".join(parts)


def _default_summary(cap: xr.DataArray, scheme: str | None, symbol_rate: float | None):
    from .summary import summarize

    return summarize(cap, scheme=scheme, symbol_rate=symbol_rate)


def _dominant_tone(summary: xr.Dataset) -> float | None:
    """The strongest tone's frequency when it holds most of the power (a carrier to measure
    phase noise on), else None."""
    try:
        p = float(np.ravel(summary["tone_power_dbfs"].values)[0])
        f = float(np.ravel(summary["tone_frequency_hz"].values)[0])
        mean = float(np.nanmax(np.ravel(summary["mean_power_dbfs"].values)))
    except (KeyError, IndexError, TypeError, ValueError):
        return None
    return f if math.isfinite(p) and p >= mean - 3.0 else None


def _plots(cap: xr.DataArray, summary: xr.Dataset, scheme: str | None,
           symbol_rate: float | None, step: Callable[[str], None]) -> tuple[list[tuple[str, Any]], list[str]]:
    """The figures of the report, and notes for the ones that could not be made."""
    from . import views
    from ._errors import MeasurementError

    figs: list[tuple[str, Any]] = []
    notes: list[str] = []

    def attempt(label: str, make: Callable[[], Any]) -> None:
        step(label)
        try:
            figs.append((label, make()))
        except (MeasurementError, ValueError) as exc:
            notes.append(f"{label}: not shown ({exc})")

    attempt("spectrum", lambda: views.spectrum_plot(cap))
    attempt("spectrogram", lambda: views.spectrogram_plot(cap))
    attempt("time", lambda: views.time_plot(cap))
    carrier = _dominant_tone(summary)
    if carrier is not None and _capture.is_complex(cap):
        # several channels: each finds its own carrier (the table's first tone is channel 0's)
        at = None if "channel" in cap.dims else carrier
        attempt("phase noise", lambda: views.phase_noise_plot(cap, carrier_hz=at))
    if scheme is not None and symbol_rate is not None and _capture.is_complex(cap):
        from . import modulation

        def constellation() -> Any:
            return views.constellation_plot(
                modulation.analyze(cap, scheme, symbol_rate=symbol_rate), error_vectors=True)

        attempt("constellation", constellation)
    return figs, notes


def render(
    cap: xr.DataArray,
    *,
    summary: xr.Dataset | None = None,
    title: str | None = None,
    source_name: str | None = None,
    scheme: str | None = None,
    symbol_rate: float | None = None,
    progress: Callable[[str], None] | None = None,
) -> str:
    """The HTML report of a capture, as one self-contained page.

    Parameters
    ----------
    cap : capture
        One or several channels, complex or real, numpy or lazy (plots and summary read it
        chunk by chunk).
    summary : xarray.Dataset, optional
        The result of :func:`quadkit.summarize` if already computed (the command line passes
        the one it printed); computed here otherwise, with ``scheme``/``symbol_rate``.
    title : str, optional
        Page title (default: the source name, else "Capture report"). Escaped.
    source_name : str, optional
        The file the capture came from, shown in the header. Escaped.
    scheme, symbol_rate : optional
        Add modulation figures (when the summary is computed here) and a constellation
        (:func:`quadkit.modulation.analyze`).
    progress : callable, optional
        Called with the name of each step before it runs (for a progress bar).

    Returns
    -------
    str
        The HTML page (UTF-8 text). BokehJS is inlined: the page needs no network.
    """
    from bokeh.embed import components
    from bokeh.embed.bundle import bundle_for_objs_and_resources
    from bokeh.resources import INLINE

    from . import __version__

    if not isinstance(cap, xr.DataArray) or "time" not in cap.dims:
        raise ValueError("render: expected a capture (xarray.DataArray with a 'time' dim)")
    if (scheme is None) != (symbol_rate is None):
        raise ValueError("render: give both scheme= and symbol_rate=, or neither")
    step = progress or (lambda name: None)
    if summary is None:
        step("summary")
        summary = _default_summary(cap, scheme, symbol_rate)
    figs, notes = _plots(cap, summary, scheme, symbol_rate, step)
    step("page")
    models = [f for _, f in figs]
    script, divs = components(models) if models else ("", ())
    bundle = bundle_for_objs_and_resources(models, INLINE) if models else None
    js = bundle.scripts() if bundle is not None else ""

    heading = title or source_name or "Capture report"
    fs = _capture.sample_rate(cap)
    sub = (f"{_e(_si(fs, 'S/s'))} at {_e(_si(float(cap.attrs.get('center_frequency', 0.0)), 'Hz'))}"
           f" · {int(cap.sizes['time']):,} samples")
    if source_name and title:
        sub = f"{_e(source_name)} · " + sub
    warnings = [str(w) for w in summary.attrs.get("warnings", []) or []]
    warn_html = ("<ul class='warnings'>" + "".join(f"<li>{_e(w)}</li>" for w in warnings)
                 + "</ul>") if warnings else "<p class='note'>No warnings.</p>"
    plot_html = "".join(
        f"<section class='plot' id='plot-{_e(label)}'>{div}</section>"
        for (label, _), div in zip(figs, divs))
    if notes:
        plot_html += "".join(f"<p class='note'>{_e(n)}</p>" for n in notes)
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    cautions = "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
    page = f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="quadkit {_e(__version__)}">
<title>{_e(heading)}</title>
<style>{_CSS}</style>
{js}
</head>
<body>
<header><h1>{_e(heading)}</h1><div class="sub">{sub}</div></header>
<main>
<div class="grid">
<div>
<h2>Summary</h2>
{_summary_table(summary)}
</div>
<div>
<h2>Warnings</h2>
{warn_html}
<h2>Tones and spurs</h2>
{_tones_table(summary)}
<h2>Recording</h2>
{_recording_table(cap, source_name)}
</div>
</div>
{_annotations_table(cap)}
<h2>Plots</h2>
{plot_html}
<h2>Before you transmit or connect anything</h2>
<ul class="cautions">{cautions}</ul>
<footer>Made with quadkit {_e(__version__)} on {when}. Plots show min/max envelopes of
long captures, so every extreme sample stays visible.</footer>
</main>
{script}
</body>
</html>
"""
    return page


def write(
    cap: xr.DataArray,
    path: str | os.PathLike[str],
    *,
    overwrite: bool = False,
    summary: xr.Dataset | None = None,
    title: str | None = None,
    source_name: str | None = None,
    scheme: str | None = None,
    symbol_rate: float | None = None,
    progress: Callable[[str], None] | None = None,
) -> pathlib.Path:
    """Write the report of :func:`render` to ``path``, atomically.

    The page is written under a temporary name beside ``path`` and renamed onto it, so no
    half-written report is ever seen; an existing file is kept unless ``overwrite=True``
    (checked before any work is done).

    Returns
    -------
    pathlib.Path
        The path written.

    Raises
    ------
    FileExistsError
        If ``path`` exists and ``overwrite`` is false (also a ``ValueError``).
    """
    from .io._atomic import atomic_path, check_writable

    target = check_writable(path, overwrite=overwrite)
    page = render(cap, summary=summary, title=title, source_name=source_name, scheme=scheme,
                  symbol_rate=symbol_rate, progress=progress)
    with atomic_path(target, overwrite=overwrite) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return target
