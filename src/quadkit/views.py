"""Bokeh views of captures and results: time, spectrum, spectrogram, constellation, eye,
phase noise and image rejection.

Each view takes a capture or a measurement result (and optionally an existing bokeh figure
to draw into), returns the bokeh model it built, and never calls ``show``: display it with
``bokeh.plotting.show``, embed it in a page, or wrap it in a notebook widget
(:mod:`quadkit.widgets`).

What reaches the browser is kept small whatever the capture's length: a long capture is
reduced to min/max envelopes per display bin (so a single-sample spike in 2**25 samples stays
visible as a full-height stroke), long spectra likewise, and spectrogram images are pooled to
display resolution and sent as float32 dB. Lines and markers use the WebGL backend.

Bokeh is imported inside the functions of this module only, so ``import quadkit`` (and the
``.qk`` accessor) stay light.

Multi-channel captures: :func:`time_plot`, :func:`spectrum_plot`, :func:`phase_noise_plot` and
:func:`image_rejection_plot` draw every channel into one figure (a legend entry per channel);
:func:`spectrogram_plot`, :func:`constellation_plot` and :func:`eye_plot` return a column of
figures, one per channel, with linked axes. Give ``channel=`` to draw one channel only.

Examples
--------
>>> import quadkit, quadkit.views as views
>>> cap = quadkit.synth.tone(10e3, sample_rate=1e6, n_samples=4096, center_frequency=433.9e6)
>>> fig = views.time_plot(cap)
>>> sorted(r.name for r in fig.renderers)
['envelope', 'i', 'q']
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import xarray as xr

from . import _capture
from ._checks import check_option, check_positive, check_positive_int

__all__ = [
    "time_plot",
    "spectrum_plot",
    "spectrogram_plot",
    "constellation_plot",
    "eye_plot",
    "phase_noise_plot",
    "image_rejection_plot",
    "envelope_bins",
    "RendererMismatch",
    "PALETTE",
    "HEAT",
]

_ACCESSOR = (
    "time_plot",
    "spectrum_plot",
    "spectrogram_plot",
    "constellation_plot",
    "eye_plot",
    "phase_noise_plot",
    "image_rejection_plot",
)

#: Our colours: named roles, and a cycle for channels.
PALETTE: dict[str, Any] = {
    "i": "#1f5f8b",         # deep sea blue
    "q": "#c8553d",         # brick
    "envelope": "#3b3b3b",  # graphite
    "trace": "#1f5f8b",
    "corrected": "#2b8c6f",  # pine
    "ideal": "#d99a00",     # ochre
    "error": "#9a9a9a",
    "peak": "#a3336a",      # plum
    "band": "#2b8c8c",      # teal
    "background": "#fcfbf8",
    "grid": "#e7e3da",
    "channels": ("#1f5f8b", "#c8553d", "#2b8c6f", "#7a4e9e", "#b08a18", "#2b8c8c",
                 "#a3336a", "#5a5a5a"),
}


def _heat_palette(n: int = 256) -> tuple[str, ...]:
    # Our sequential map for spectrogram images: night blue -> slate -> teal -> sand -> paper.
    anchors = np.array([
        [0x0b, 0x10, 0x26], [0x23, 0x3d, 0x6b], [0x1f, 0x7a, 0x7a],
        [0x8f, 0xb8, 0x5a], [0xe9, 0xc4, 0x6a], [0xfd, 0xf6, 0xe3],
    ], dtype=float)
    pos = np.linspace(0.0, 1.0, len(anchors))
    t = np.linspace(0.0, 1.0, n)
    rgb = np.stack([np.interp(t, pos, anchors[:, k]) for k in range(3)], axis=1)
    return tuple("#%02x%02x%02x" % tuple(int(round(c)) for c in row) for row in rgb)


#: Sequential colour map (256 entries) used for spectrogram images.
HEAT: tuple[str, ...] = _heat_palette()

#: Display resolution: bins across a time or frequency axis, rows of a spectrogram image.
_X_BINS = 2000
_IMAGE_TIME_BINS = 360
_IMAGE_FREQ_BINS = 1024
#: At most this many channels are drawn by default (the title says when some are left out).
_MAX_CHANNELS = 8
#: Constellations show at most this many points; eyes at most this many traces.
_MAX_POINTS = 20000
_MAX_TRACES = 300
#: Numpy captures are reduced in blocks of this many samples (bounded temporary memory).
_BLOCK = 1 << 21


# --------------------------------------------------------------------------------------------
# display reduction
# --------------------------------------------------------------------------------------------

def _edges(n: int, n_bins: int) -> np.ndarray:
    """Integer bin edges splitting ``n`` samples into ``min(n_bins, n)`` non-empty bins."""
    nb = max(1, min(int(n_bins), int(n)))
    return (np.arange(nb + 1, dtype=np.int64) * int(n)) // nb


def _block_extremes(block: np.ndarray, offset: int, edges: np.ndarray, parts: str):
    """Per-bin min and max of each part of ``block`` (samples ``offset..offset+L``).

    Returns ``(first_bin, mins, maxs)`` with arrays shaped (part, channel, bins touched).
    """
    n = block.shape[-1]
    b0 = int(np.searchsorted(edges, offset, side="right") - 1)
    b1 = int(np.searchsorted(edges, offset + n, side="left"))
    starts = np.maximum(edges[b0:b1], offset) - offset
    block = np.atleast_2d(block)
    comps = []
    for part in parts:
        if part == "i":
            comps.append(block.real)
        elif part == "q":
            comps.append(block.imag)
        elif part == "a":
            comps.append(np.abs(block))
        else:  # "x": the samples themselves (real arrays)
            comps.append(block)
    mins = np.stack([np.minimum.reduceat(c, starts, axis=-1) for c in comps])
    maxs = np.stack([np.maximum.reduceat(c, starts, axis=-1) for c in comps])
    return b0, mins, maxs


def envelope_bins(data: Any, n_bins: int = _X_BINS, *, parts: str | None = None):
    """Min/max envelope of samples over ``n_bins`` equal bins along the last axis.

    Works chunk by chunk on numpy and dask arrays (a lazy capture is read once, never merged
    into one chunk); every sample falls in exactly one bin, so extremes are never lost.

    Parameters
    ----------
    data : array_like or dask array, shape (time,) or (channel, time)
    n_bins : int
        Number of bins (fewer if there are fewer samples).
    parts : str, optional
        Which components to reduce: a string of ``"i"`` (real part), ``"q"`` (imaginary
        part), ``"a"`` (magnitude) and ``"x"`` (the values as they are). Default ``"iqa"``
        for complex data, ``"x"`` for real data.

    Returns
    -------
    edges : numpy.ndarray of int64, shape (bins + 1,)
        Sample index of each bin's start, and the end.
    mins, maxs : numpy.ndarray, shape (part, channel, bins)

    Examples
    --------
    >>> import numpy as np
    >>> x = np.zeros(2**20, np.float32); x[123457] = 5.0
    >>> edges, lo, hi = envelope_bins(x, 1000, parts="x")
    >>> float(hi.max()), bool(np.argmax(hi[0, 0]) == np.searchsorted(edges, 123457, "right") - 1)
    (5.0, True)
    """
    n_bins = check_positive_int("envelope_bins", "n_bins", n_bins)
    if parts is None:
        parts = "iqa" if np.iscomplexobj(np.empty(0, data.dtype)) else "x"
    n = int(data.shape[-1])
    if n == 0:
        raise ValueError("envelope_bins: no samples to reduce")
    edges = _edges(n, n_bins)
    nb = len(edges) - 1
    n_chan = 1 if data.ndim == 1 else int(data.shape[0])
    real_dtype = np.empty(0, data.dtype).real.dtype
    mins = np.full((len(parts), n_chan, nb), np.inf, dtype=real_dtype)
    maxs = np.full((len(parts), n_chan, nb), -np.inf, dtype=real_dtype)

    if _capture._is_dask(data):
        import dask

        chunk_starts = np.concatenate([[0], np.cumsum(data.chunks[-1])])
        blocks = data.to_delayed().ravel() if data.ndim == 1 else data.to_delayed()[0]
        if data.ndim == 2 and len(data.chunks[0]) > 1:
            data = data.rechunk({0: -1})  # channels into one chunk; time chunks untouched
            blocks = data.to_delayed()[0]
        tasks = [
            dask.delayed(_block_extremes)(blk, int(o), edges, parts)
            for blk, o in zip(blocks, chunk_starts[:-1])
        ]
        results = dask.compute(*tasks)
    else:
        arr = np.asarray(data)
        results = [
            _block_extremes(arr[..., o:o + _BLOCK], o, edges, parts)
            for o in range(0, n, _BLOCK)
        ]
    for b0, lo, hi in results:
        b1 = b0 + lo.shape[-1]
        np.minimum(mins[..., b0:b1], lo, out=mins[..., b0:b1])
        np.maximum(maxs[..., b0:b1], hi, out=maxs[..., b0:b1])
    return edges, mins, maxs


def _interleave(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    out = np.empty(lo.shape[:-1] + (2 * lo.shape[-1],), dtype=np.result_type(lo, hi))
    out[..., 0::2] = lo
    out[..., 1::2] = hi
    return out


def _pool_max(values: np.ndarray, axis: int, n_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Max over bins along ``axis``; returns the pooled values and the bin edges."""
    n = values.shape[axis]
    edges = _edges(n, n_bins)
    if len(edges) - 1 == n:
        return values, edges
    return np.maximum.reduceat(values, edges[:-1], axis=axis), edges


# --------------------------------------------------------------------------------------------
# figures and labels
# --------------------------------------------------------------------------------------------

def _bokeh():
    import bokeh.layouts as layouts
    import bokeh.models as models
    import bokeh.plotting as plotting

    return plotting, models, layouts


def _figure(fig: Any, *, title: str, x_label: str, y_label: str, **kwargs: Any):
    """The given figure, or a new one in our house style."""
    plotting, models, _ = _bokeh()
    if fig is not None:
        if title and not (fig.title and fig.title.text):
            fig.title.text = title
        return fig
    fig = plotting.figure(
        title=title,
        x_axis_label=x_label,
        y_axis_label=y_label,
        output_backend="webgl",
        sizing_mode="stretch_width",
        height=kwargs.pop("height", 320),
        tools=kwargs.pop("tools", "pan,wheel_zoom,box_zoom,reset,save"),
        background_fill_color=PALETTE["background"],
        **kwargs,
    )
    fig.grid.grid_line_color = PALETTE["grid"]
    fig.title.text_font_size = "13px"
    fig.toolbar.logo = None
    return fig


def _finish_legend(fig: Any) -> None:
    if fig.legend:
        fig.legend.click_policy = "hide"
        fig.legend.location = "top_right"
        fig.legend.background_fill_alpha = 0.7
        fig.legend.label_text_font_size = "11px"


class RendererMismatch(ValueError):
    """``replace=True`` was given a figure that lacks a renderer the view would draw."""


class _Canvas:
    """Draws a view's glyphs into a new figure, or refreshes them in place (``replace``).

    In place, each named renderer of the figure gets the new data (and the title, axis
    labels, legend labels and image placement are updated); nothing is added, so an
    explorer can refresh its plots without rebuilding them.
    """

    def __init__(self, fig: Any, *, replace: bool, title: str, x_label: str, y_label: str,
                 **figure_kwargs: Any) -> None:
        _, self.models, _ = _bokeh()
        self.replace = bool(replace) and fig is not None
        if self.replace:
            fig.title.text = title
            fig.xaxis.axis_label = x_label
            fig.yaxis.axis_label = y_label
            self.named = {r.name: r for r in fig.renderers if r.name}
            self.touched: set[str] = set()
            self.fig = fig
        else:
            self.fig = _figure(fig, title=title, x_label=x_label, y_label=y_label,
                               **figure_kwargs)

    @property
    def new(self) -> bool:
        return not self.replace

    def _existing(self, name: str) -> Any:
        r = self.named.get(name)
        if r is None:
            raise RendererMismatch(f"replace=True: the figure has no renderer {name!r}")
        self.touched.add(name)
        return r

    def finish(self) -> Any:
        """The figure; in place, every named renderer must have been refreshed."""
        if self.replace:
            stale = sorted(set(self.named) - self.touched)
            if stale:
                raise RendererMismatch(f"replace=True: the figure's renderers {stale} would "
                                       "keep old data")
        elif self.fig.legend:
            _finish_legend(self.fig)
        return self.fig

    def glyph(self, method: str, fields: Sequence[str], data: dict[str, Any], *, name: str,
              legend_label: str | None = None, **style: Any) -> Any:
        if self.replace:
            r = self._existing(name)
            r.data_source.data = data
            if legend_label is not None:
                for legend in self.fig.legend:
                    for item in legend.items:
                        if r in item.renderers:
                            item.label = legend_label
            return r
        src = self.models.ColumnDataSource(data)
        kwargs = dict(style)
        if legend_label is not None:
            kwargs["legend_label"] = legend_label
        return getattr(self.fig, method)(*fields, source=src, name=name, **kwargs)

    def image(self, img: np.ndarray, *, name: str, x: float, y: float, dw: float, dh: float,
              low: float, high: float, units: str) -> Any:
        if self.replace:
            r = self._existing(name)
            r.data_source.data = {"image": [img]}
            for attr, value in (("x", x), ("y", y), ("dw", dw), ("dh", dh)):
                setattr(r.glyph, attr, value)
            r.glyph.color_mapper.low, r.glyph.color_mapper.high = low, high
            return r
        mapper = self.models.LinearColorMapper(palette=HEAT, low=low, high=high,
                                               nan_color="#00000000")
        r = self.fig.image(image=[img], x=x, y=y, dw=dw, dh=dh, color_mapper=mapper, name=name)
        self.fig.x_range.range_padding = 0
        self.fig.y_range.range_padding = 0
        self.fig.add_layout(self.models.ColorBar(color_mapper=mapper, title=units, width=12,
                                                 label_standoff=6), "right")
        return r


_SCALES = ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz"), (1.0, "Hz"))


def _frequency_scale(values: np.ndarray) -> tuple[float, str]:
    """A unit for a frequency axis, chosen from the span so tick labels stay short."""
    values = np.asarray(values, dtype=float)
    span = float(np.nanmax(values) - np.nanmin(values)) if values.size > 1 else 0.0
    ref = span if span > 0 else float(np.nanmax(np.abs(values))) if values.size else 1.0
    for factor, unit in _SCALES:
        if ref >= 0.5 * factor:
            return factor, unit
    return 1.0, "Hz"


def _time_scale(span_s: float) -> tuple[float, str]:
    for factor, unit in ((1.0, "s"), (1e-3, "ms"), (1e-6, "µs"), (1e-9, "ns")):
        if span_s >= factor:
            return factor, unit
    return 1e-9, "ns"


def _fmt_hz(value: float) -> str:
    value = float(value)
    for factor, unit in _SCALES:
        if abs(value) >= factor:
            return f"{value / factor:.6g} {unit}"
    return f"{value:.6g} Hz"


def _time_label(cap: xr.DataArray, unit: str) -> str:
    start = cap.attrs.get("start_time")
    label = f"time ({unit})"
    if start:
        label = f"time since {start} ({unit})"
    return label


def _channels(obj: xr.DataArray | xr.Dataset, channel: Any, func: str) -> tuple[list[Any], str]:
    """Channel labels to draw and a note for the title when some are left out."""
    if "channel" not in obj.dims:
        if channel is not None:
            raise ValueError(f"{func}: channel={channel!r} given but the data has one channel")
        return [None], ""
    labels = list(obj["channel"].values) if "channel" in obj.coords else list(
        range(obj.sizes["channel"]))
    if channel is not None:
        wanted = list(channel) if isinstance(channel, (list, tuple)) else [channel]
        for c in wanted:
            if c not in labels:
                raise ValueError(f"{func}: channel={c!r} is not one of {labels}")
        return wanted, ""
    if len(labels) > _MAX_CHANNELS:
        return labels[:_MAX_CHANNELS], f" (channels {labels[0]}…{labels[_MAX_CHANNELS - 1]} " \
            f"of {len(labels)} shown)"
    return labels, ""


def _select(obj: Any, ch: Any) -> Any:
    if ch is None:
        return obj
    if "channel" in obj.coords:
        return obj.sel(channel=ch)
    return obj.isel(channel=ch)


def _channel_colour(k: int) -> str:
    cyc = PALETTE["channels"]
    return cyc[k % len(cyc)]


def _text(value: Any) -> str:
    """Metadata text made safe for a title (bokeh titles are plain text; kept short)."""
    s = str(value)
    return s if len(s) <= 80 else s[:77] + "…"


def _require_capture(cap: Any, func: str) -> xr.DataArray:
    if not isinstance(cap, xr.DataArray) or "time" not in cap.dims:
        raise ValueError(
            f"{func}: expected a capture (xarray.DataArray with a 'time' dim), got "
            f"{type(cap).__name__}"
        )
    _capture.sample_rate(cap)
    return cap


# --------------------------------------------------------------------------------------------
# time
# --------------------------------------------------------------------------------------------

def time_plot(
    cap: xr.DataArray,
    *,
    fig: Any = None,
    channel: Any = None,
    parts: Sequence[str] = ("i", "q", "envelope"),
    max_points: int = _X_BINS,
    title: str | None = None,
    replace: bool = False,
) -> Any:
    """I, Q and envelope of a capture against time.

    A capture longer than ``2 * max_points`` samples is reduced to min/max envelopes over
    ``max_points`` bins (read chunk by chunk for a lazy capture): each bin is drawn as a
    vertical stroke from its minimum to its maximum, so no extreme is lost.

    Parameters
    ----------
    cap : capture
        Complex or real, one or several channels. A real capture shows its samples
        (``parts`` is ignored).
    fig : bokeh.plotting.figure, optional
        Draw into this figure instead of a new one.
    replace : bool
        With ``fig``: refresh the data of ``fig``'s renderers of the same names (made by an
        earlier call of this view) instead of adding new ones; raises
        :class:`RendererMismatch` if one is missing. The same option exists on
        :func:`spectrum_plot`, :func:`spectrogram_plot` and :func:`constellation_plot`.
    channel : label or list of labels, optional
        Channels to draw (default: all, at most 8).
    parts : sequence of {"i", "q", "envelope"}
        Components to draw for a complex capture; the envelope is the magnitude |z|.
    max_points : int
        Display bins across the time axis.
    title : str, optional

    Returns
    -------
    bokeh.plotting.figure
        Renderers are named ``i``, ``q``, ``envelope`` (``x`` for a real capture), with
        ``:<channel>`` appended for a multi-channel capture. The x axis is time in seconds
        (scaled to ms/µs for short captures) from the recording's first sample, so a slice
        keeps its place.

    Examples
    --------
    >>> import quadkit
    >>> cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=2**20)
    >>> fig = time_plot(cap, max_points=500)
    >>> len(fig.select_one({"name": "i"}).data_source.data["y"])  # 500 bins, min and max
    1000
    """
    cap = _require_capture(cap, "time_plot")
    max_points = check_positive_int("time_plot", "max_points", max_points)
    parts = tuple(parts)
    for p in parts:
        check_option("time_plot", "parts", p, ("i", "q", "envelope"))
    _, models, _ = _bokeh()
    fs = _capture.sample_rate(cap)
    n = int(cap.sizes["time"])
    if n == 0:
        raise ValueError("time_plot: the capture has no samples")
    chans, note = _channels(cap, channel, "time_plot")
    complex_data = _capture.is_complex(cap)
    codes = "".join({"i": "i", "q": "q", "envelope": "a"}[p] for p in parts) if complex_data \
        else "x"
    names = {"i": "i", "q": "q", "a": "envelope", "x": "x"}
    legend = {"i": "I", "q": "Q", "a": "envelope |z|", "x": "samples"}
    t0 = _capture.first_time(cap)
    tscale, tunit = _time_scale(n / fs)

    sub = cap if chans == [None] else cap.sel(channel=chans) if "channel" in cap.coords \
        else cap.isel(channel=chans)
    data = sub.data
    reduced = n > 2 * max_points
    if reduced:
        edges, lo, hi = envelope_bins(data, max_points, parts=codes)
        centre = t0 + (edges[:-1] + edges[1:] - 1) / 2.0 / fs
        x = np.repeat(centre, 2) / tscale
        ys = _interleave(lo, hi)  # (part, channel, 2*bins)
    else:
        arr = np.atleast_2d(np.asarray(data))
        x = (t0 + np.arange(n) / fs) / tscale
        comps = {"i": arr.real, "q": arr.imag, "a": np.abs(arr), "x": arr}
        ys = np.stack([comps[c] for c in codes])

    what = "I, Q and envelope" if complex_data else "samples (real capture)"
    if title is None:
        title = f"{what} — {n:,} samples at {_fmt_hz(fs).replace('Hz', 'S/s')}"
        if reduced:
            title += f", min/max over {len(x) // 2:,} bins"
        title += note
    canvas = _Canvas(fig, replace=replace, title=title, x_label=_time_label(cap, tunit),
                     y_label="amplitude (FS)")
    for k, ch in enumerate(chans):
        # The envelope first (underneath, faint), then I and Q over it.
        order = sorted(range(len(codes)), key=lambda j: codes[j] != "a")
        for j in order:
            c = codes[j]
            y = ys[j, k].astype(np.float32)
            name = names[c] if ch is None else f"{names[c]}:{ch}"
            if ch is None:
                colour = PALETTE[names[c] if c != "x" else "trace"]
                dash = "solid"
                label = legend[c]
            else:
                colour = _channel_colour(k)
                dash = {"i": "solid", "q": "dashed", "a": "dotted", "x": "solid"}[c]
                label = f"{legend[c]} · ch {ch}"
            alpha = {"a": 0.45, "i": 0.85, "q": 0.7, "x": 0.9}[c]
            canvas.glyph("line", ("x", "y"), {"x": x, "y": y}, name=name, color=colour,
                         line_dash=dash, line_width=1.2, alpha=alpha, legend_label=label)
    return canvas.finish()


# --------------------------------------------------------------------------------------------
# spectrum
# --------------------------------------------------------------------------------------------

def _psd_of(obj: Any, psd_kwargs: dict[str, Any]) -> xr.DataArray:
    if isinstance(obj, xr.DataArray) and "frequency" in obj.dims:
        return obj
    if isinstance(obj, xr.DataArray) and "time" in obj.dims:
        from . import spectral

        return spectral.psd(obj, **psd_kwargs)
    raise ValueError(
        "spectrum_plot: expected a capture or a spectrum (DataArray with a 'frequency' dim "
        f"from quadkit.spectral.psd), got {type(obj).__name__}"
    )


def _simple_peaks(freq: np.ndarray, level: np.ndarray, count: int, prominence_db: float):
    # Display markers only (not a measurement): scipy's prominence-based peak picking.
    from scipy.signal import find_peaks as _scipy_peaks

    idx, props = _scipy_peaks(level, prominence=prominence_db)
    if idx.size == 0:
        return np.empty(0), np.empty(0)
    order = np.argsort(level[idx])[::-1][:count]
    idx = np.sort(idx[order])
    return freq[idx], level[idx]


def _peaks_table(peaks: Any, ch: Any) -> tuple[np.ndarray, np.ndarray]:
    """(frequency_hz, power) from a peaks result (Dataset) or a sequence of dicts.

    A Dataset from :func:`quadkit.spectral.find_peaks` lists channels along ``tone`` with a
    ``channel`` coordinate; its ``power_dbfs`` is the tone's total power.
    """
    if isinstance(peaks, xr.Dataset):
        p = peaks
        if ch is not None and "channel" in p.coords:
            p = p.isel({p["channel"].dims[0]: np.flatnonzero(p["channel"].values == ch)}) \
                if p["channel"].dims else p
        fkey = next((k for k in ("frequency_hz", "frequency") if k in p), None)
        lkey = next((k for k in ("power_dbfs", "power_dbm", "power_db", "level_db") if k in p),
                    None)
        if fkey is None:
            raise ValueError("spectrum_plot: peaks needs a 'frequency_hz' variable")
        f = np.asarray(p[fkey].values, dtype=float).ravel()
        lv = np.asarray(p[lkey].values, dtype=float).ravel() if lkey else np.full(f.size, np.nan)
        return f, lv
    rows = list(peaks)
    f = np.array([float(r["frequency_hz"]) for r in rows])
    key = next((k for k in ("power_dbfs", "power_dbm", "power_db", "level_db") if rows and
                k in rows[0]), None)
    lv = np.array([float(r[key]) for r in rows]) if key else np.full(len(rows), np.nan)
    return f, lv


def _auto_peaks(spec: xr.DataArray, ch: Any, freq: np.ndarray, trace: np.ndarray,
                count: int, prominence_db: float) -> tuple[np.ndarray, np.ndarray]:
    """Peaks of one trace: quadkit.spectral.find_peaks for its spectra, scipy otherwise."""
    if all(k in spec.attrs for k in ("window", "nperseg", "sample_rate")) and "offset" in \
            spec.coords:
        from . import spectral

        one = _select(spec, ch)
        try:
            table = spectral.find_peaks(one, threshold_db=prominence_db, max_peaks=count)
        except (ValueError, KeyError):
            table = None
        if table is not None:
            return _peaks_table(table, None)
    pf, pl = _simple_peaks(freq, trace, count, prominence_db)
    return pf, pl


def _marker_levels(freq: np.ndarray, trace: np.ndarray, pf: np.ndarray) -> np.ndarray:
    """Trace level at each peak (the largest of the nearest bin and its neighbours)."""
    if pf.size == 0:
        return np.empty(0)
    k = np.clip(np.searchsorted(freq, pf), 0, freq.size - 1)
    k = np.where((k > 0) & (np.abs(freq[k - 1] - pf) < np.abs(freq[k] - pf)), k - 1, k)
    lo, hi = np.clip(k - 1, 0, freq.size - 1), np.clip(k + 1, 0, freq.size - 1)
    return np.maximum(np.maximum(trace[lo], trace[k]), trace[hi])


def spectrum_plot(
    obj: Any,
    *,
    fig: Any = None,
    channel: Any = None,
    peaks: Any = "auto",
    n_peaks: int = 5,
    prominence_db: float = 10.0,
    max_points: int = _X_BINS,
    label: str | None = None,
    colour: str | None = None,
    title: str | None = None,
    replace: bool = False,
    **psd_kwargs: Any,
) -> Any:
    """Power spectrum against absolute frequency, with its RBW and the strongest peaks.

    Parameters
    ----------
    obj : capture or spectrum
        A capture (its spectrum is computed with :func:`quadkit.spectral.psd`, passing
        ``psd_kwargs``) or a spectrum from it: DataArray in dB with dims ``(frequency,)`` or
        ``(channel, frequency)``, coords ``frequency`` (absolute Hz) and attrs ``units`` and
        ``rbw_hz``.
    fig : bokeh figure, optional
        Draw into it (for example to overlay a corrected spectrum).
    channel : label or list, optional
    peaks : "auto", None, Dataset or list of dicts
        ``"auto"`` marks up to ``n_peaks`` peaks standing ``prominence_db`` above the local
        floor, found by :func:`quadkit.spectral.find_peaks` (labels give each tone's total
        power); ``None`` marks none; a :func:`~quadkit.spectral.find_peaks` result (or dicts
        with ``frequency_hz`` and ``power_dbfs``) marks those. Markers sit on the trace.
    max_points : int
        A spectrum with more bins is shown as min/max envelopes over this many bins (peaks
        kept).
    label, colour : str, optional
        Legend label prefix and line colour.
    title : str, optional

    Returns
    -------
    bokeh.plotting.figure
        The trace renderers are named ``psd`` (``psd:<channel>``), the markers ``peaks``.
        The RBW appears in the title and the legend.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> f = np.linspace(-5e5, 5e5, 1024, endpoint=False)
    >>> spec = xr.DataArray(np.where(np.abs(f - 1e5) < 500, -10.0, -90.0), dims="frequency",
    ...                     coords={"frequency": 2.4e9 + f, "offset": ("frequency", f)},
    ...                     attrs={"units": "dBFS/Hz", "rbw_hz": 1465.0})
    >>> fig = spectrum_plot(spec)
    >>> "RBW 1.465 kHz" in fig.title.text
    True
    >>> fig.xaxis.axis_label, [round(float(v), 3) for v in
    ...                        fig.select_one({"name": "peaks"}).data_source.data["x"]]
    ('frequency (MHz)', [2400.1])
    """
    spec = _psd_of(obj, psd_kwargs)
    max_points = check_positive_int("spectrum_plot", "max_points", max_points)
    _, models, _ = _bokeh()
    chans, note = _channels(spec, channel, "spectrum_plot")
    freq = np.asarray(spec["frequency"].values, dtype=float)
    fscale, funit = _frequency_scale(freq)
    units = str(spec.attrs.get("units", "dB"))
    rbw = spec.attrs.get("rbw_hz")
    rbw_text = f"RBW {_fmt_hz(rbw)}" if rbw is not None else "RBW unknown"
    if title is None:
        title = f"Spectrum — {rbw_text}"
        if spec.attrs.get("window"):
            title += f", {spec.attrs['window']} window"
        if spec.attrs.get("n_averages"):
            title += f", {int(spec.attrs['n_averages'])} averages"
        title += note
    canvas = _Canvas(fig, replace=replace, title=title, x_label=f"frequency ({funit})",
                     y_label=units)
    models = canvas.models
    peak_x: list[float] = []
    peak_y: list[float] = []
    peak_text: list[str] = []
    for k, ch in enumerate(chans):
        trace = np.asarray(_select(spec, ch).values, dtype=np.float64)
        if trace.size > 2 * max_points:
            edges, lo, hi = envelope_bins(trace, max_points, parts="x")
            centre = (freq[edges[:-1]] + freq[edges[1:] - 1]) / 2.0
            x, y = np.repeat(centre, 2), _interleave(lo[0, 0], hi[0, 0])
        else:
            x, y = freq, trace
        name = "psd" if ch is None else f"psd:{ch}"
        base = label or ("spectrum" if ch is None else f"ch {ch}")
        canvas.glyph("line", ("x", "y"), {"x": x / fscale, "y": y.astype(np.float32)},
                     name=name, line_width=1.2,
                     color=colour or (PALETTE["trace"] if ch is None else _channel_colour(k)),
                     legend_label=f"{base} ({rbw_text})")
        if peaks is None:
            continue
        if isinstance(peaks, str):
            check_option("spectrum_plot", "peaks", peaks, ("auto",))
            pf, pw = _auto_peaks(spec, ch, freq, trace, int(n_peaks), float(prominence_db))
        else:
            pf, pw = _peaks_table(peaks, ch)
        level = _marker_levels(freq, trace, pf)
        peak_x += list(pf / fscale)
        peak_y += list(level)
        punit = "dBm" if "dBm" in units else "dBFS" if "dBFS" in units else units
        peak_text += [f"{_fmt_hz(f)}  {w:.1f} {punit}" if np.isfinite(w)
                      else f"{_fmt_hz(f)}  {v:.1f} {units}" for f, w, v in zip(pf, pw, level)]
    if peaks is not None:
        # Every peak is marked; labels that would overprint a stronger peak's label (closer
        # than 1/40 of the span) are left to the hover tool.
        span = (freq[-1] - freq[0]) / fscale if freq.size > 1 else 1.0
        shown: list[float] = []
        label = [""] * len(peak_x)
        for j in np.argsort(peak_y)[::-1] if peak_y else []:
            if all(abs(peak_x[j] - x0) > span / 40 for x0 in shown):
                label[j] = peak_text[j]
                shown.append(peak_x[j])
        pdata = {"x": peak_x, "y": peak_y, "text": peak_text, "label": label}
        r = canvas.glyph("scatter", ("x", "y"), pdata, name="peaks",
                         marker="inverted_triangle", size=9, color=PALETTE["peak"],
                         legend_label="peaks" if canvas.new else None)
        if canvas.new:
            fig = canvas.fig
            fig.add_layout(models.LabelSet(x="x", y="y", text="label", source=r.data_source,
                                           y_offset=8, text_font_size="10px",
                                           text_color=PALETTE["peak"], text_align="center"))
            fig.add_tools(models.HoverTool(renderers=[r], tooltips=[("peak", "@text")]))
            if hasattr(fig.y_range, "range_padding"):
                fig.y_range.range_padding = 0.2  # room for the labels above the highest peak
    return canvas.finish()


# --------------------------------------------------------------------------------------------
# spectrogram
# --------------------------------------------------------------------------------------------

def _spectrogram_of(obj: Any, kwargs: dict[str, Any]) -> xr.DataArray:
    if isinstance(obj, xr.DataArray) and "frequency" in obj.dims and "time" in obj.dims:
        return obj
    if isinstance(obj, xr.DataArray) and "time" in obj.dims:
        from . import spectral

        return spectral.spectrogram(obj, **kwargs)
    raise ValueError(
        "spectrogram_plot: expected a capture or a spectrogram (DataArray with 'time' and "
        f"'frequency' dims from quadkit.spectral.spectrogram), got {type(obj).__name__}"
    )


def spectrogram_plot(
    obj: Any,
    *,
    fig: Any = None,
    channel: Any = None,
    time_bins: int = _IMAGE_TIME_BINS,
    frequency_bins: int = _IMAGE_FREQ_BINS,
    dynamic_range_db: float | None = 80.0,
    title: str | None = None,
    replace: bool = False,
    **spectrogram_kwargs: Any,
) -> Any:
    """Spectrogram image with a colour bar, on absolute time and frequency axes.

    Parameters
    ----------
    obj : capture or spectrogram
        A capture (computed with :func:`quadkit.spectral.spectrogram`, passing
        ``spectrogram_kwargs``) or its result: a DataArray in dB with dims ``time`` and
        ``frequency`` (and optionally ``channel``), coords ``time`` (s) and ``frequency``
        (absolute Hz).
    fig : bokeh figure, optional
        Draw into it (single channel only).
    channel : label, optional
    time_bins, frequency_bins : int
        Display resolution: the image is max-pooled to at most this many rows and columns
        (maximum, so a short burst or a narrow line stays visible) and sent as float32 dB.
    dynamic_range_db : float or None
        Colour scale spans this many dB below the image maximum (None: full range).
    title : str, optional

    Returns
    -------
    bokeh.plotting.figure, or bokeh.layouts.column of figures (one per channel)
        The image renderer is named ``spectrogram`` (``spectrogram:<channel>``).

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> t = np.arange(2000) * 1e-3; f = 915e6 + np.linspace(-1e5, 1e5, 4096, endpoint=False)
    >>> sg = xr.DataArray(np.full((2000, 4096), -100, np.float32), dims=("time", "frequency"),
    ...                   coords={"time": t, "frequency": f}, attrs={"units": "dBFS/Hz"})
    >>> fig = spectrogram_plot(sg)
    >>> img = fig.select_one({"name": "spectrogram"}).data_source.data["image"][0]
    >>> img.shape, img.dtype
    ((360, 1024), dtype('float32'))
    """
    sg = _spectrogram_of(obj, spectrogram_kwargs)
    time_bins = check_positive_int("spectrogram_plot", "time_bins", time_bins)
    frequency_bins = check_positive_int("spectrogram_plot", "frequency_bins", frequency_bins)
    plotting, models, layouts = _bokeh()
    chans, note = _channels(sg, channel, "spectrogram_plot")
    if fig is not None and len(chans) > 1:
        raise ValueError("spectrogram_plot: fig= draws one channel; give channel=")
    units = str(sg.attrs.get("units", "dB"))
    freq = np.asarray(sg["frequency"].values, dtype=float)
    tvals = np.asarray(sg["time"].values, dtype=float)
    fscale, funit = _frequency_scale(freq)
    span_t = float(tvals[-1] - tvals[0]) if tvals.size > 1 else 0.0
    tscale, tunit = _time_scale(span_t if span_t > 0 else 1.0)
    # Cell edges from the centres (uniform grids from quadkit.spectral).
    df = float(freq[1] - freq[0]) if freq.size > 1 else float(sg.attrs.get("rbw_hz", 1.0))
    dt = float(tvals[1] - tvals[0]) if tvals.size > 1 else 1.0
    figs = []
    shared = {}
    for k, ch in enumerate(chans):
        img = np.asarray(_select(sg, ch).transpose("time", "frequency").values)
        img, _ = _pool_max(img.astype(np.float32, copy=False), 0, time_bins)
        img, _ = _pool_max(img, 1, frequency_bins)
        img = np.ascontiguousarray(img, dtype=np.float32)
        finite = img[np.isfinite(img)]
        top = float(finite.max()) if finite.size else 0.0
        bottom = float(finite.min()) if finite.size else -1.0
        if dynamic_range_db is not None:
            bottom = max(bottom, top - check_positive("spectrogram_plot", "dynamic_range_db",
                                                      dynamic_range_db))
        if bottom >= top:
            bottom = top - 1.0
        ttl = title
        if ttl is None:
            ttl = "Spectrogram"
            if sg.attrs.get("rbw_hz"):
                ttl += f" — RBW {_fmt_hz(sg.attrs['rbw_hz'])}"
            if ch is not None:
                ttl += f" · channel {ch}"
            ttl += note
        canvas = _Canvas(fig, replace=replace, title=ttl, x_label=f"frequency ({funit})",
                         y_label=_time_label(sg, tunit) if "start_time" in sg.attrs
                         else f"time ({tunit})", **shared)
        canvas.image(img, name="spectrogram" if ch is None else f"spectrogram:{ch}",
                     x=(freq[0] - df / 2) / fscale, y=(tvals[0] - dt / 2) / tscale,
                     dw=(freq[-1] - freq[0] + df) / fscale,
                     dh=(tvals[-1] - tvals[0] + dt) / tscale, low=bottom, high=top,
                     units=units)
        f = canvas.finish()
        figs.append(f)
        if not shared:
            shared = {"x_range": f.x_range, "y_range": f.y_range}
    return figs[0] if len(figs) == 1 else layouts.column(*figs, sizing_mode="stretch_width")


# --------------------------------------------------------------------------------------------
# constellation and eye
# --------------------------------------------------------------------------------------------

def _ideal_points(ideal: Any) -> np.ndarray | None:
    if ideal is None:
        return None
    if isinstance(ideal, str):
        from . import modulation

        pts = modulation.constellation(ideal)
        pts = pts.values if isinstance(pts, xr.DataArray) else pts
        return np.asarray(pts).ravel()
    return np.asarray(ideal).ravel()


def _symbols_from_result(res: xr.Dataset) -> tuple[xr.DataArray, xr.DataArray | None]:
    """(received, ideal-per-symbol or None) from a modulation result."""
    rx_key = next((k for k in ("measured_symbol", "symbols", "received", "received_symbol")
                   if k in res.variables), None)
    if rx_key is None:
        raise ValueError(
            "constellation_plot: the result holds no per-symbol data (expected a variable "
            "'symbols' or 'received' along a 'symbol' dim)"
        )
    ideal_key = next((k for k in ("ideal_symbol", "ideal", "decisions", "reference")
                      if k in res.variables), None)
    return res[rx_key], (res[ideal_key] if ideal_key else None)


def _scheme_of(res: xr.Dataset) -> str | None:
    """The modulation scheme named in a result's attrs, if any."""
    value = res.attrs.get("scheme") or res.attrs.get("modulation_scheme")
    return str(value) if value else None


def constellation_plot(
    obj: Any,
    *,
    fig: Any = None,
    channel: Any = None,
    ideal: Any = None,
    error_vectors: bool = False,
    max_points: int = _MAX_POINTS,
    title: str | None = None,
    replace: bool = False,
) -> Any:
    """Received symbols in the IQ plane, with the ideal points and optional error vectors.

    Parameters
    ----------
    obj : capture or modulation result
        A capture sampled at one sample per symbol (every sample is a point), or a result
        of :func:`quadkit.modulation.analyze` holding per-symbol data (received symbols and
        the ideal symbol each was decided as).
    ideal : str or array_like, optional
        The ideal points: a scheme name (``"qpsk"``; see
        :func:`quadkit.modulation.constellation`) or complex points. For a capture, each
        received point's error vector goes to the nearest ideal point.
    error_vectors : bool
        Draw a segment from each shown point to its ideal point.
    max_points : int
        At most this many points are shown (evenly spaced through the capture; the title
        says so).

    Returns
    -------
    bokeh figure, or a column of figures for several channels
        Renderers ``received``, ``ideal`` and ``error``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> pts = np.array([1+1j, -1+1j, -1-1j, 1-1j], np.complex64) / np.sqrt(2)
    >>> cap = quadkit.capture(np.tile(pts, 50) * 1.05, sample_rate=1e3)
    >>> fig = constellation_plot(cap, ideal=pts, error_vectors=True)
    >>> len(fig.select_one({"name": "error"}).data_source.data["x0"])
    200
    """
    max_points = check_positive_int("constellation_plot", "max_points", max_points)
    _, models, layouts = _bokeh()
    ideal_pts = _ideal_points(ideal)
    per_symbol_ideal = None
    if isinstance(obj, xr.Dataset):
        rx, per_symbol_ideal = _symbols_from_result(obj)
        if ideal_pts is None and _scheme_of(obj):
            ideal_pts = _ideal_points(_scheme_of(obj))
        elif ideal_pts is None and per_symbol_ideal is not None:
            v = np.asarray(per_symbol_ideal.values).ravel()
            ideal_pts = np.unique(np.round(v[np.isfinite(v)], 9))
        source = rx
        scheme = _scheme_of(obj)
    elif isinstance(obj, xr.DataArray) and "time" in obj.dims:
        source = obj
        scheme = None
    else:
        raise ValueError(
            "constellation_plot: expected a capture or a quadkit.modulation.analyze result, "
            f"got {type(obj).__name__}"
        )
    along = "time" if "time" in source.dims else next(d for d in source.dims if d != "channel")
    chans, note = _channels(source, channel, "constellation_plot")
    if fig is not None and len(chans) > 1:
        raise ValueError("constellation_plot: fig= draws one channel; give channel=")
    figs = []
    shared: dict[str, Any] = {}
    for ch in chans:
        rx_all = _select(source, ch)
        n = int(rx_all.sizes[along])
        step = max(1, math.ceil(n / max_points))
        rx = np.asarray(rx_all.isel({along: slice(None, None, step)}).values).ravel()
        ref = None
        if per_symbol_ideal is not None:
            ref = np.asarray(_select(per_symbol_ideal, ch).isel(
                {along: slice(None, None, step)}).values).ravel()
            ok = np.isfinite(rx) & np.isfinite(ref)  # several channels: NaN padding
            rx, ref = rx[ok], ref[ok]
            n = int(np.isfinite(np.asarray(rx_all.values)).sum())
        elif ideal_pts is not None and ideal_pts.size:
            ref = ideal_pts[np.argmin(np.abs(rx[:, None] - ideal_pts[None, :]), axis=1)]
        ttl = title
        if ttl is None:
            ttl = "Constellation"
            if scheme:
                ttl += f" — {_text(scheme)}"
            if isinstance(obj, xr.Dataset) and "evm_rms_percent" in obj:
                evm = _select(obj["evm_rms_percent"], ch) if ch is not None and \
                    "channel" in obj["evm_rms_percent"].dims else obj["evm_rms_percent"]
                ttl += f", EVM {float(evm):.2f} % rms"
            ttl += f" · {rx.size:,} of {n:,} points" if step > 1 else f" · {n:,} points"
            if ch is not None:
                ttl += f" · channel {ch}"
            ttl += note
        canvas = _Canvas(fig, replace=replace, title=ttl, x_label="I (FS)", y_label="Q (FS)",
                         match_aspect=True, height=420, **shared)
        if error_vectors and ref is not None:
            canvas.glyph("segment", ("x0", "y0", "x1", "y1"), {
                "x0": rx.real.astype(np.float32), "y0": rx.imag.astype(np.float32),
                "x1": ref.real.astype(np.float32), "y1": ref.imag.astype(np.float32)},
                name="error", color=PALETTE["error"], alpha=0.5, line_width=1,
                legend_label="error vectors")
        canvas.glyph("scatter", ("x", "y"), {"x": rx.real.astype(np.float32),
                                             "y": rx.imag.astype(np.float32)},
                     name="received", size=3, alpha=0.45, color=PALETTE["trace"],
                     legend_label="received")
        if ideal_pts is not None and ideal_pts.size:
            canvas.glyph("scatter", ("x", "y"), {"x": ideal_pts.real.astype(np.float32),
                                                 "y": ideal_pts.imag.astype(np.float32)},
                         name="ideal", marker="cross", size=14, line_width=2.5,
                         color=PALETTE["ideal"], legend_label="ideal")
        f = canvas.finish()
        figs.append(f)
        if not shared:
            shared = {"x_range": f.x_range, "y_range": f.y_range}
    return figs[0] if len(figs) == 1 else layouts.column(*figs, sizing_mode="stretch_width")


def eye_plot(
    cap: xr.DataArray,
    *,
    symbol_rate: float,
    fig: Any = None,
    channel: Any = None,
    component: str = "both",
    symbols_per_trace: int = 2,
    offset_s: float = 0.0,
    max_traces: int = _MAX_TRACES,
    title: str | None = None,
) -> Any:
    """Eye diagram: the I (and Q) waveform folded over ``symbols_per_trace`` symbol periods.

    Parameters
    ----------
    cap : capture
        Baseband samples, several per symbol (apply the receive filter first, for instance
        with :func:`quadkit.modulation.rrc_taps` and :func:`quadkit.decimation.filter`).
    symbol_rate : float
        Symbols per second; the samples per symbol need not be an integer.
    component : {"both", "i", "q"}
        ``"both"`` gives a column of two figures (I over Q) with linked axes.
    symbols_per_trace : int
        Width of each trace in symbol periods.
    offset_s : float
        Shifts the fold so that symbol instants sit where you want them.
    max_traces : int
        Traces drawn (taken from the start of the capture).

    Returns
    -------
    bokeh figure or column
        Renderers ``eye_i`` / ``eye_q`` (``:<channel>`` appended for several channels), each
        a multi-line whose lines are the traces.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> fs, rs = 8e3, 1e3  # 8 samples per symbol
    >>> x = np.repeat(np.random.default_rng(1).choice([-1.0, 1.0], 100), 8).astype(np.complex64)
    >>> fig = eye_plot(quadkit.capture(x, sample_rate=fs), symbol_rate=rs, component="i")
    >>> len(fig.select_one({"name": "eye_i"}).data_source.data["xs"])  # 100 symbols / 2
    50
    """
    cap = _require_capture(cap, "eye_plot")
    symbol_rate = check_positive("eye_plot", "symbol_rate", symbol_rate)
    check_option("eye_plot", "component", component, ("both", "i", "q"))
    symbols_per_trace = check_positive_int("eye_plot", "symbols_per_trace", symbols_per_trace)
    max_traces = check_positive_int("eye_plot", "max_traces", max_traces)
    _, models, layouts = _bokeh()
    fs = _capture.sample_rate(cap)
    if symbol_rate >= fs:
        raise ValueError(f"eye_plot: symbol_rate={symbol_rate!r} must be below the sample "
                         f"rate {fs!r} Hz")
    period = symbols_per_trace / symbol_rate
    comps = ["i", "q"] if component == "both" else [component]
    if not _capture.is_complex(cap):
        comps = ["i"]
    if fig is not None and len(comps) > 1:
        raise ValueError("eye_plot: fig= draws one component; give component='i' or 'q'")
    chans, note = _channels(cap, channel, "eye_plot")
    n_keep = min(int(cap.sizes["time"]), int(math.ceil((max_traces + 1) * period * fs)))
    t_scale, t_unit = _time_scale(period)
    figs = []
    shared: dict[str, Any] = {}
    for comp in comps:
        ttl = title or (f"Eye — {'I' if comp == 'i' else 'Q'}, "
                        f"{symbols_per_trace} symbols per trace at "
                        f"{_fmt_hz(symbol_rate).replace('Hz', 'Bd')}{note}")
        f = _figure(fig, title=ttl, x_label=f"time within trace ({t_unit})",
                    y_label=f"{comp.upper()} (FS)", height=280, **shared)
        for k, ch in enumerate(chans):
            x = np.asarray(_select(cap, ch).isel(time=slice(0, n_keep)).values)
            y = x.real if comp == "i" else x.imag
            # Fold by sample position (exact for an integer number of samples per trace).
            spt = period * fs
            pos = np.arange(y.size) + offset_s * fs
            trace_no = np.floor(pos / spt).astype(np.int64)
            local = (pos - trace_no * spt) / fs
            cut = np.flatnonzero(np.diff(trace_no)) + 1
            xs = [seg / t_scale for seg in np.split(local, cut)]
            ys = [seg.astype(np.float32) for seg in np.split(y, cut)]
            # Keep complete traces only (a partial one at either end is left out).
            full = max(len(s) for s in xs) - 1
            keep = [j for j, s in enumerate(xs) if len(s) >= full]
            xs = [xs[j] for j in keep][:max_traces]
            ys = [ys[j] for j in keep][:max_traces]
            src = models.ColumnDataSource({"xs": xs, "ys": ys})
            name = f"eye_{comp}" if ch is None else f"eye_{comp}:{ch}"
            f.multi_line("xs", "ys", source=src, name=name, alpha=0.25, line_width=1,
                         color=PALETTE[comp] if ch is None else _channel_colour(k))
        figs.append(f)
        if not shared:
            shared = {"x_range": f.x_range}
    return figs[0] if len(figs) == 1 else layouts.column(*figs, sizing_mode="stretch_width")


# --------------------------------------------------------------------------------------------
# phase noise and image rejection
# --------------------------------------------------------------------------------------------

def _curve(res: Any, candidates: Sequence[str], func: str) -> xr.DataArray:
    if isinstance(res, xr.DataArray):
        return res
    if isinstance(res, xr.Dataset):
        for key in candidates:
            if key in res.data_vars:
                return res[key]
        for key, var in res.data_vars.items():
            if var.ndim >= 1 and any(str(key).startswith(c.split("_")[0]) for c in candidates):
                return var
    raise ValueError(f"{func}: the result holds none of {list(candidates)}")


def _along(curve: xr.DataArray) -> str:
    return next(d for d in curve.dims if d != "channel")


def _axis_values(curve: xr.DataArray, dim: str, prefer: Sequence[str]) -> np.ndarray:
    for name in prefer:
        if name in curve.coords and curve[name].dims == (dim,):
            return np.asarray(curve[name].values, dtype=float)
    if dim in curve.coords:
        return np.asarray(curve[dim].values, dtype=float)
    return np.arange(curve.sizes[dim], dtype=float)


def _log_bins(n: int, n_bins: int) -> np.ndarray:
    """Bin edges over 0..n, spaced evenly on a log axis (first bins one sample wide)."""
    edges = np.unique(np.round(np.logspace(0, math.log10(n), n_bins + 1)).astype(np.int64))
    return np.concatenate([[0], edges[edges < n], [n]])


def phase_noise_plot(
    obj: Any,
    *,
    fig: Any = None,
    channel: Any = None,
    max_points: int = _X_BINS,
    title: str | None = None,
    **phase_noise_kwargs: Any,
) -> Any:
    """Single-sideband phase noise L(f) in dBc/Hz against offset frequency, log axis.

    Parameters
    ----------
    obj : capture or result
        A capture holding a carrier (computed with :func:`quadkit.impairments.phase_noise`,
        passing ``phase_noise_kwargs``) or its result: the full curve
        ``phase_noise_curve_dbc_hz`` along ``curve_offset`` is drawn, the reported points
        ``phase_noise_dbc_hz`` along ``offset`` are marked, and ``rms_phase_deg`` and
        ``rms_jitter_s`` appear in the title. A DataArray (or a Dataset holding only one of
        the two) in dBc/Hz along an offset dim works too.
    max_points : int
        A longer curve is shown as min/max envelopes over bins evenly spaced on the log axis.

    Returns
    -------
    bokeh figure (log x axis); the curve renderer is named ``phase_noise``, the marked
    points ``phase_noise_points``.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> off = np.logspace(2, 5, 50)
    >>> res = xr.Dataset({"phase_noise_dbc_hz": ("offset", -80 - 10 * np.log10(off / 100),
    ...                                         {"units": "dBc/Hz"})}, coords={"offset": off})
    >>> fig = phase_noise_plot(res)
    >>> type(fig.x_scale).__name__
    'LogScale'
    """
    if isinstance(obj, xr.DataArray) and "time" in obj.dims:
        from . import impairments

        obj = impairments.phase_noise(obj, **phase_noise_kwargs)
    max_points = check_positive_int("phase_noise_plot", "max_points", max_points)
    points = None
    if isinstance(obj, xr.Dataset) and "phase_noise_curve_dbc_hz" in obj:
        curve = obj["phase_noise_curve_dbc_hz"]
        points = obj.get("phase_noise_dbc_hz")
    else:
        curve = _curve(obj, ("phase_noise_dbc_hz", "phase_noise_curve_dbc_hz", "phase_noise"),
                       "phase_noise_plot")
    _, models, _ = _bokeh()
    dim = _along(curve)
    off = _axis_values(curve, dim, ("curve_offset", "offset_hz", "offset"))
    chans, note = _channels(curve, channel, "phase_noise_plot")
    if title is None:
        title = "Phase noise L(f)"
        if isinstance(obj, xr.Dataset):
            extras = []
            if "rms_phase_deg" in obj and obj["rms_phase_deg"].ndim == 0:
                extras.append(f"rms phase {float(obj['rms_phase_deg']):.3g}°")
            if "rms_jitter_s" in obj and obj["rms_jitter_s"].ndim == 0:
                extras.append(f"rms jitter {float(obj['rms_jitter_s']) * 1e12:.3g} ps")
            if obj.attrs.get("integration_start_hz") and obj.attrs.get("integration_stop_hz"):
                extras.append(f"over {_fmt_hz(obj.attrs['integration_start_hz'])} – "
                              f"{_fmt_hz(obj.attrs['integration_stop_hz'])}")
            if "carrier_frequency_hz" in obj and obj["carrier_frequency_hz"].ndim == 0:
                extras.append(f"carrier {_fmt_hz(float(obj['carrier_frequency_hz']))}")
            if extras:
                title += " — " + ", ".join(extras)
        title += note
    fig = _figure(fig, title=title, x_label="offset from the carrier (Hz)",
                  y_label=str(curve.attrs.get("units", "dBc/Hz")), x_axis_type="log")
    keep = off > 0
    x_all = off[keep]
    px: list[float] = []
    py: list[float] = []
    for k, ch in enumerate(chans):
        y = np.asarray(_select(curve, ch).values, dtype=float)[keep]
        x = x_all
        if x.size > 2 * max_points:
            edges = _log_bins(x.size, max_points)
            lo = np.minimum.reduceat(y, edges[:-1])
            hi = np.maximum.reduceat(y, edges[:-1])
            centre = np.sqrt(x[edges[:-1]] * x[edges[1:] - 1])
            x, y = np.repeat(centre, 2), _interleave(lo, hi)
        src = models.ColumnDataSource({"x": x, "y": y.astype(np.float32)})
        fig.line("x", "y", source=src, name="phase_noise" if ch is None else f"phase_noise:{ch}",
                 line_width=1.5, color=PALETTE["trace"] if ch is None else _channel_colour(k),
                 legend_label="L(f)" if ch is None else f"L(f) · ch {ch}")
        if points is not None:
            pdim = _along(points)
            po = _axis_values(points, pdim, ("offset", "offset_hz"))
            pv = np.asarray(_select(points, ch).values, dtype=float)
            ok = np.isfinite(pv) & (po > 0)
            px += list(po[ok])
            py += list(pv[ok])
    if points is not None:
        psrc = models.ColumnDataSource({"x": px, "y": py,
                                        "text": [f"{v:.1f} dBc/Hz at {_fmt_hz(f)}"
                                                 for f, v in zip(px, py)]})
        r = fig.scatter("x", "y", source=psrc, name="phase_noise_points", size=8,
                        color=PALETTE["peak"], legend_label="reported offsets")
        fig.add_tools(models.HoverTool(renderers=[r], tooltips=[("L(f)", "@text")]))
    _finish_legend(fig)
    return fig


def image_rejection_plot(
    obj: Any,
    *,
    fig: Any = None,
    channel: Any = None,
    label: str | None = None,
    title: str | None = None,
    **sweep_kwargs: Any,
) -> Any:
    """Image rejection ratio (dB) against frequency.

    Parameters
    ----------
    obj : capture, Dataset or DataArray
        A capture of a multitone or a sweep (measured with
        :func:`quadkit.impairments.image_rejection_vs_frequency`, passing ``sweep_kwargs``),
        or a result holding ``image_rejection_db`` along a frequency dim (absolute
        ``frequency`` / ``frequency_hz`` or baseband ``offset`` coordinate).
    label : str, optional
        Legend label (to compare before/after correction in one figure).

    Returns
    -------
    bokeh figure; the curve renderer is named ``image_rejection``.

    Examples
    --------
    >>> import numpy as np, xarray as xr
    >>> f = np.linspace(-4e5, 4e5, 9)
    >>> res = xr.Dataset({"image_rejection_db": ("frequency", np.full(9, 35.0),
    ...                                         {"units": "dB"})}, coords={"frequency": f})
    >>> [float(v) for v in image_rejection_plot(res).select_one({"name": "image_rejection"})
    ...      .data_source.data["y"][:2]]
    [35.0, 35.0]
    """
    if isinstance(obj, xr.DataArray) and "time" in obj.dims:
        from . import impairments

        obj = impairments.image_rejection_vs_frequency(obj, **sweep_kwargs)
    curve = _curve(obj, ("image_rejection_db", "irr_db"), "image_rejection_plot")
    _, models, _ = _bokeh()
    dim = _along(curve)
    x = _axis_values(curve, dim, ("frequency_hz", "frequency", "offset_hz", "offset"))
    fscale, funit = _frequency_scale(x)
    chans, note = _channels(curve, channel, "image_rejection_plot")
    fig = _figure(fig, title=title or f"Image rejection against frequency{note}",
                  x_label=f"frequency ({funit})",
                  y_label=str(curve.attrs.get("units", "dB")))
    for k, ch in enumerate(chans):
        y = np.asarray(_select(curve, ch).values, dtype=float)
        src = models.ColumnDataSource({"x": x / fscale, "y": y.astype(np.float32)})
        name = "image_rejection" if ch is None else f"image_rejection:{ch}"
        lab = label or ("image rejection" if ch is None else f"ch {ch}")
        colour = PALETTE["trace"] if ch is None else _channel_colour(k)
        if label and ch is None and fig.renderers:
            colour = PALETTE["corrected"]
        fig.line("x", "y", source=src, name=name, color=colour, line_width=1.5,
                 legend_label=lab)
        fig.scatter("x", "y", source=src, color=colour, size=5)
    _finish_legend(fig)
    return fig
