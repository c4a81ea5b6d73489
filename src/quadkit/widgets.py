"""Notebook explorers: tune across a capture and watch the plots follow, from Python.

:func:`explore` returns an ipywidgets box holding controls (channel offset, bandwidth,
decimation, an optional modulation scheme) and bokeh plots wrapped in
``jupyter_bokeh.BokehModel`` widgets, so every update runs in the kernel and reaches the page
through the widget comm (JupyterLab and the classic notebook alike; no ``push_notebook``).

- Moving the offset or bandwidth moves the band marker on the wide-band spectrum at once; the
  channel is then cut out (shift to 0 Hz, filter, decimate) and its spectrum, spectrogram,
  time trace and constellation are recomputed after the controls have been still for
  ``debounce_s`` seconds, so dragging a slider costs one recompute, not fifty.
- The quadrature-balance panel shows :func:`quadkit.impairments.estimate` of the capture and a
  button that applies :func:`quadkit.impairments.correct`: the corrected spectrum is overlaid
  and the image rejection before and after is shown (the image falls).
- An error raised while recomputing (a channel outside the band, a failed demodulation) is
  shown in the explorer's message area, with its traceback under a fold; the plots keep their
  last good state.

Only this module (and :mod:`quadkit.views`, :mod:`quadkit.report`) imports ipywidgets and
bokeh, inside the functions.

Examples
--------
>>> import quadkit
>>> from quadkit import widgets
>>> cap = quadkit.synth.multitone([-150e3, 200e3], sample_rate=1e6, n_samples=2**16)
>>> ex = widgets.explore(cap, debounce_s=0)
>>> ex.offset.value = 200e3
>>> ex.bandwidth.value = 50e3
>>> ex.channel_capture.attrs["center_frequency"], ex.channel_capture.attrs["sample_rate"]
(200000.0, 62500.0)
"""

from __future__ import annotations

import functools
import html
import math
import threading
import traceback
from typing import Any, Callable

import xarray as xr

from . import _capture
from ._checks import check_positive, check_positive_int

__all__ = ["explore", "Debouncer"]

#: Samples the explorer works on (from the start of the capture) so that it stays live.
_MAX_SAMPLES = 1 << 19


class Debouncer:
    """Run ``func`` once the calls have stopped for ``delay_s`` seconds.

    In a running kernel the call is scheduled on its asyncio event loop (so it runs on the
    kernel's thread, like any widget callback); without a running loop (a script, a test) a
    timer thread is used. :meth:`flush` runs a pending call at once; ``delay_s=0`` runs every
    call at once.

    Examples
    --------
    >>> calls = []
    >>> d = Debouncer(10.0, lambda: calls.append(1))
    >>> d(); d(); d()
    >>> d.pending, calls
    (True, [])
    >>> d.flush(); d.pending, calls
    (False, [1])
    """

    def __init__(self, delay_s: float, func: Callable[[], Any]) -> None:
        self.delay_s = check_positive("Debouncer", "delay_s", delay_s, allow_zero=True)
        self._func = func
        self._handle: Any = None
        self._lock = threading.Lock()

    @property
    def pending(self) -> bool:
        return self._handle is not None

    def __call__(self) -> None:
        if self.delay_s == 0:
            self._func()
            return
        with self._lock:
            self._cancel()
            try:
                import asyncio

                loop = asyncio.get_running_loop()
            except RuntimeError:
                loop = None
            if loop is not None:
                self._handle = loop.call_later(self.delay_s, self._fire)
            else:
                timer = threading.Timer(self.delay_s, self._fire)
                timer.daemon = True
                self._handle = timer
                timer.start()

    def _cancel(self) -> None:
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None

    def _fire(self) -> None:
        with self._lock:
            if self._handle is None:
                return
            self._handle = None
        self._func()

    def flush(self) -> None:
        """Run the pending call now (nothing if none is pending)."""
        with self._lock:
            was = self._handle is not None
            self._cancel()
        if was:
            self._func()

    def cancel(self) -> None:
        with self._lock:
            self._cancel()


def _sync_figure(dst: Any, src: Any) -> bool:
    """Copy the data (and titles, image placement, colour scale) of ``src`` into ``dst``.

    Renderers are matched by name; ``dst`` may hold more (an overlay of its own). Returns
    False when ``src`` has a renderer ``dst`` lacks (the caller then swaps the figure).
    """
    d_named = {r.name: r for r in dst.renderers if r.name}
    s_named = {r.name: r for r in src.renderers if r.name}
    if not set(s_named) <= set(d_named):
        return False
    for name, sr in s_named.items():
        dr = d_named[name]
        dr.data_source.data = dict(sr.data_source.data)
        if type(sr.glyph).__name__ == "Image":
            for attr in ("x", "y", "dw", "dh"):
                setattr(dr.glyph, attr, getattr(sr.glyph, attr))
            dm, sm = dr.glyph.color_mapper, sr.glyph.color_mapper
            dm.low, dm.high = sm.low, sm.high
    dst.title.text = src.title.text
    dst.xaxis.axis_label = src.xaxis[0].axis_label
    dst.yaxis.axis_label = src.yaxis[0].axis_label
    return True


def _src_data(fig: Any, name: str) -> Any:
    return fig.select_one({"name": name}).data_source.data


def _table(rows: list[tuple[str, str, str]]) -> str:
    body = "".join(
        f"<tr><td>{html.escape(a)}</td><td style='text-align:right'>{html.escape(b)}</td>"
        f"<td>{html.escape(c)}</td></tr>" for a, b, c in rows)
    return f"<table class='qk-table'>{body}</table>"


def _fmt(value: Any, digits: int = 4) -> str:
    v = float(value)
    if not math.isfinite(v):
        return "∞" if v > 0 else "n/a"
    return f"{v:.{digits}g}"


class _Explorer:
    """State and callbacks of one explorer (the widget is :attr:`box`)."""

    def __init__(self, cap: xr.DataArray, *, offset_hz: float, bandwidth_hz: float | None,
                 scheme: str | None, symbol_rate: float | None, debounce_s: float,
                 max_samples: int, channel: Any) -> None:
        import ipywidgets as W
        from jupyter_bokeh.widgets import BokehModel

        from . import views

        self._views = views
        if not isinstance(cap, xr.DataArray) or "time" not in cap.dims:
            raise ValueError("explore: expected a capture (xarray.DataArray with a 'time' dim)")
        if not _capture.is_complex(cap):
            raise ValueError(
                "explore: the capture is real-valued; bring it to baseband first with "
                "quadkit.mixing.downconvert(cap, carrier_hz)")
        max_samples = check_positive_int("explore", "max_samples", max_samples)
        self.full = cap
        if "channel" in cap.dims:
            labels = list(cap["channel"].values)
            chan = labels[0] if channel is None else channel
            one = cap.sel(channel=chan)
        else:
            labels, chan, one = [], None, cap
        n = int(one.sizes["time"])
        self.truncated = n > max_samples
        one = one.isel(time=slice(0, max_samples))
        if _capture.is_lazy(one):
            one = one.compute()
        self.raw = one
        self.fs = _capture.sample_rate(one)
        self.fc = float(one.attrs.get("center_frequency", 0.0))
        fs = self.fs
        bw0 = fs / 4 if bandwidth_hz is None else check_positive("explore", "bandwidth_hz",
                                                                 bandwidth_hz)
        self.recomputes = 0
        self.estimate: xr.Dataset | None = None
        self.corrected: xr.DataArray | None = None
        self.channel_capture: xr.DataArray | None = None
        self.analysis: xr.Dataset | None = None

        style = {"description_width": "88px"}
        wide = W.Layout(width="420px")
        self.offset = W.FloatSlider(value=float(offset_hz), min=-fs / 2, max=fs / 2,
                                    step=fs / 2000, description="tune to (Hz)",
                                    readout_format=".6s", continuous_update=True,
                                    style=style, layout=wide)
        self.bandwidth = W.FloatLogSlider(value=bw0, base=10, min=math.log10(fs / 2000),
                                          max=math.log10(0.8 * fs), step=0.01,
                                          description="width (Hz)", readout_format=".4s",
                                          style=style, layout=wide)
        self.decimation = W.IntSlider(value=1, min=1, max=1, description="decimate by",
                                      style=style, layout=W.Layout(width="300px"))
        self.auto_decimation = W.Checkbox(value=True, description="largest factor",
                                          indent=False, layout=W.Layout(width="140px"))
        from . import modulation

        self.scheme = W.Dropdown(options=[("none", None)] + [(s, s) for s in modulation.SCHEMES],
                                 value=scheme, description="scheme", style=style,
                                 layout=W.Layout(width="220px"))
        self.symbol_rate = W.FloatText(value=float(symbol_rate or 0.0),
                                       description="symbol rate", style=style,
                                       layout=W.Layout(width="220px"))
        self.channel_select = W.Dropdown(options=[(str(c), c) for c in labels], value=chan,
                                         description="channel", style=style,
                                         layout=W.Layout(width="200px")) if labels else None
        self.status = W.HTML(value="")
        self.balance = W.HTML(value="")
        self.apply_button = W.ToggleButton(value=False, description="apply correction",
                                           tooltip="remove the measured DC offset and IQ "
                                           "imbalance", icon="wrench")

        # Figures: built once by quadkit.views, updated in place afterwards.
        self._wide_psd = views._psd_of(one, {})
        self.wide_figure = views.spectrum_plot(self._wide_psd, label="as captured")
        self.wide_figure.height = 260
        _, models, layouts = views._bokeh()
        self.band = models.BoxAnnotation(fill_color=views.PALETTE["band"], fill_alpha=0.15,
                                         line_color=views.PALETTE["band"], line_alpha=0.8)
        self.wide_figure.add_layout(self.band)
        self._corrected_source = models.ColumnDataSource({"x": [], "y": []})
        self.wide_figure.line("x", "y", source=self._corrected_source, name="corrected",
                              color=views.PALETTE["corrected"], line_width=1.2,
                              legend_label="corrected")
        views._finish_legend(self.wide_figure)
        self._slots = {k: layouts.column(sizing_mode="stretch_width")
                       for k in ("spectrum", "spectrogram", "time", "constellation")}
        self.figures: dict[str, Any] = {}
        self._models = {"wide": BokehModel(self.wide_figure)}
        self._models.update({k: BokehModel(v) for k, v in self._slots.items()})

        self._debounced = Debouncer(debounce_s, self._recompute)
        self._update_decimation_range()
        self._move_band()
        self._guard(self._recompute)
        self._guard(self._estimate)

        self.offset.observe(self._on_tune, names="value")
        self.bandwidth.observe(self._on_tune, names="value")
        self.decimation.observe(self._on_decimation, names="value")
        self.auto_decimation.observe(self._on_tune, names="value")
        self.scheme.observe(self._on_scheme, names="value")
        self.symbol_rate.observe(self._on_scheme, names="value")
        self.apply_button.observe(self._on_apply, names="value")
        if self.channel_select is not None:
            self.channel_select.observe(self._on_channel, names="value")

        title = "Capture explorer"
        desc = cap.attrs.get("description")
        head = (f"<b>{html.escape(title)}</b> — {html.escape(views._fmt_hz(fs).replace('Hz', 'S/s'))}"
                f" at {html.escape(views._fmt_hz(self.fc))}")
        if desc:
            head += f"<br><i>{html.escape(str(desc))}</i>"
        if self.truncated:
            head += (f"<br><small>working on the first {max_samples:,} of {n:,} samples; "
                     "slice the capture to look elsewhere</small>")
        controls = [self.offset, self.bandwidth,
                    W.HBox([self.decimation, self.auto_decimation])]
        second = [self.scheme, self.symbol_rate]
        if self.channel_select is not None:
            second.append(self.channel_select)
        balance_box = W.VBox([W.HTML("<b>Quadrature balance</b>"), self.balance,
                              self.apply_button],
                             layout=W.Layout(border="1px solid #e7e3da", padding="6px"))
        self.box = _box_class()([
            W.HTML(head),
            W.HBox([W.VBox(controls), W.VBox(second), balance_box]),
            self.status,
            self._models["wide"],
            W.HBox([self._models["spectrum"], self._models["constellation"]]),
            self._models["spectrogram"],
            self._models["time"],
        ])
        self.box.explorer = self  # the widget holds the state (and keeps it alive)

    # ---------------------------------------------------------------------------------------
    def _guard(self, func: Callable[[], Any]) -> bool:
        """Run a callback; show any error in the message area instead of losing it."""
        try:
            func()
        except Exception as exc:  # noqa: BLE001 - shown to the user, not swallowed
            tb = html.escape("".join(traceback.format_exception(exc)))
            self.status.value = (
                "<div class='qk-error' style='color:#9b1c1c;background:#fdecea;padding:4px 8px;"
                f"border-left:3px solid #9b1c1c'><b>{html.escape(type(exc).__name__)}:</b> "
                f"{html.escape(str(exc))}<details><summary>traceback</summary><pre>{tb}</pre>"
                "</details></div>")
            return False
        return True

    @property
    def source(self) -> xr.DataArray:
        """The capture the channel is cut from: corrected when the correction is applied."""
        return self.corrected if (self.apply_button.value and self.corrected is not None) \
            else self.raw

    def max_factor(self) -> int:
        return max(1, int(math.floor(0.8 * self.fs / float(self.bandwidth.value) + 1e-9)))

    def _update_decimation_range(self) -> None:
        top = self.max_factor()
        self.decimation.max = max(top, 1)
        if self.auto_decimation.value or self.decimation.value > top:
            self.decimation.value = top
        self.decimation.disabled = bool(self.auto_decimation.value)

    def _move_band(self) -> None:
        scale, _ = self._views._frequency_scale(self._wide_psd["frequency"].values)
        lo = self.fc + self.offset.value - self.bandwidth.value / 2
        hi = self.fc + self.offset.value + self.bandwidth.value / 2
        self.band.left, self.band.right = lo / scale, hi / scale

    def _on_tune(self, change: Any = None) -> None:
        def run() -> None:
            self._update_decimation_range()
            self._move_band()
            self._debounced()

        self._guard(run)

    def _on_decimation(self, change: Any = None) -> None:
        self._debounced()

    def _on_scheme(self, change: Any = None) -> None:
        self._debounced()

    def _on_channel(self, change: Any) -> None:
        def run() -> None:
            one = self.full.sel(channel=change["new"]).isel(time=slice(0, self.raw.sizes["time"]))
            self.raw = one.compute() if _capture.is_lazy(one) else one
            self.corrected = None
            self._wide_psd = self._views._psd_of(self.raw, {})
            _sync_figure(self.wide_figure,
                         self._views.spectrum_plot(self._wide_psd, label="as captured"))
            self._estimate()
            self._debounced()

        self._guard(run)

    def _on_apply(self, change: Any = None) -> None:
        def run() -> None:
            if self.apply_button.value:
                if self.estimate is None:
                    raise ValueError("no imbalance estimate to apply (see the message above)")
                from . import impairments

                self.corrected = impairments.correct(self.raw, self.estimate)
                trace = self._views.spectrum_plot(self.corrected, peaks=None)
                self._corrected_source.data = dict(_src_data(trace, "psd"))
                after = impairments.estimate(self.corrected)
                self._after = after
                self.apply_button.description = "undo correction"
            else:
                self._corrected_source.data = {"x": [], "y": []}
                self._after = None
                self.apply_button.description = "apply correction"
            self._show_balance()
            self._debounced()

        self._guard(run)

    # ---------------------------------------------------------------------------------------
    def _estimate(self) -> None:
        from . import impairments

        self._after = None
        self.estimate = None
        self.balance.value = "<i>measuring…</i>"
        try:
            self.estimate = impairments.estimate(self.raw)
        finally:
            self._show_balance()

    def _show_balance(self) -> None:
        est = self.estimate
        if est is None:
            self.balance.value = "<i>no estimate</i>"
            return
        def pm(name: str, unit: str) -> tuple[str, str, str]:
            u = est.get(name + "_uncertainty")
            val = _fmt(est[name])
            if u is not None:
                val += f" ± {_fmt(u, 2)}"
            return (name.replace("_", " "), val, unit)

        rows = [pm("gain_imbalance_db", "dB"), pm("phase_skew_deg", "deg"),
                pm("dc_i", "FS"), pm("dc_q", "FS"), pm("image_rejection_db", "dB")]
        after = getattr(self, "_after", None)
        if after is not None:
            rows.append(("image rejection after", _fmt(after["image_rejection_db"]), "dB"))
        method = est.attrs.get("method", "")
        self.balance.value = _table(rows) + f"<small>method: {html.escape(str(method))}</small>"

    def _channel(self) -> xr.DataArray:
        from . import decimation, mixing

        off, bw = float(self.offset.value), float(self.bandwidth.value)
        fs = self.fs
        if abs(off) + bw / 2 > fs / 2 * (1 + 1e-12):
            raise ValueError(
                f"the channel {self._views._fmt_hz(off - bw / 2)} .. "
                f"{self._views._fmt_hz(off + bw / 2)} reaches outside the capture's band "
                f"±{self._views._fmt_hz(fs / 2)}: move the offset or narrow the width")
        factor = int(self.decimation.value)
        if factor > self.max_factor():
            raise ValueError(f"decimation by {factor} would alias a {bw:g} Hz wide channel")
        shifted = mixing.shift(self.source, -off)
        y = decimation.decimate(shifted, factor) if factor > 1 else shifted
        rate = fs / factor
        stop = min(rate / 2, 1.25 * bw / 2)
        if stop > bw / 2:  # the channel filter at the decimated rate
            taps = decimation.lowpass_taps(bw / 2, stop, sample_rate=rate, stopband_db=80)
            y = decimation.filter(y, taps)
        return y

    def _recompute(self) -> None:
        def run() -> None:
            views = self._views
            ch = self._channel()
            self.channel_capture = ch
            analysis = None
            if self.scheme.value and self.symbol_rate.value > 0:
                from . import modulation

                analysis = modulation.analyze(ch, self.scheme.value,
                                              symbol_rate=float(self.symbol_rate.value))
            self.analysis = analysis
            constellation_input = analysis if analysis is not None else \
                ch.isel(time=slice(0, 5000))
            plans = {
                "spectrum": (views.spectrum_plot, ch, {"label": "channel"}),
                "spectrogram": (views.spectrogram_plot, ch,
                                {"nperseg": min(256, ch.sizes["time"])}),
                "time": (views.time_plot, ch, {}),
                "constellation": (views.constellation_plot, constellation_input,
                                  {"error_vectors": analysis is not None}),
            }
            for key, (view, data, options) in plans.items():
                old = self.figures.get(key)
                if old is not None:
                    try:  # refresh in place: only the data travels to the page
                        view(data, fig=old, replace=True, **options)
                        continue
                    except views.RendererMismatch:
                        pass  # other renderers now (a scheme was chosen): a new figure
                fig = view(data, **options)
                self._slots[key].children = [fig]
                self.figures[key] = fig
            self.recomputes += 1
            self.status.value = ""

        self._guard(run)

    def flush(self) -> None:
        """Run a pending (debounced) recompute now."""
        self._debounced.flush()

    @property
    def pending(self) -> bool:
        return self._debounced.pending


def explore(
    cap: xr.DataArray,
    *,
    offset_hz: float = 0.0,
    bandwidth_hz: float | None = None,
    scheme: str | None = None,
    symbol_rate: float | None = None,
    channel: Any = None,
    debounce_s: float = 0.3,
    max_samples: int = _MAX_SAMPLES,
) -> Any:
    """An interactive explorer of a capture, for Jupyter (lab or classic notebook).

    Parameters
    ----------
    cap : capture
        Complex baseband capture (numpy or dask; the explorer works on its first
        ``max_samples`` samples, loaded once). For several channels, pick one with
        ``channel=`` or the channel menu.
    offset_hz, bandwidth_hz : float
        Initial channel: centre as a baseband offset (Hz) and width (default a quarter of the
        sample rate).
    scheme, symbol_rate : optional
        Demodulate the channel (:func:`quadkit.modulation.analyze`) and show its
        constellation with ideal points and error vectors; otherwise the channel's samples
        are shown in the IQ plane.
    debounce_s : float
        Quiet time before a recompute (0: recompute on every change).
    max_samples : int

    Returns
    -------
    ipywidgets.VBox
        Display it in a notebook. Attributes for scripting and tests: ``offset``,
        ``bandwidth``, ``decimation``, ``auto_decimation``, ``scheme``, ``symbol_rate``,
        ``apply_button`` (the controls), ``status`` (message area), ``balance`` (imbalance
        table), ``wide_figure`` and ``figures`` (the bokeh figures), ``channel_capture``,
        ``estimate``, ``corrected``, ``analysis``, ``flush()`` and ``pending``.

    Examples
    --------
    >>> import quadkit
    >>> cap = quadkit.synth.tone(100e3, sample_rate=1e6, n_samples=2**16)
    >>> ex = explore(cap, debounce_s=0)
    >>> round(float(ex.estimate.image_rejection_db)) > 100  # a perfect synthetic tone
    True
    """
    ex = _Explorer(cap, offset_hz=offset_hz, bandwidth_hz=bandwidth_hz, scheme=scheme,
                   symbol_rate=symbol_rate, debounce_s=debounce_s, max_samples=max_samples,
                   channel=channel)
    return ex.box


_LIVE = ("offset", "bandwidth", "decimation", "auto_decimation", "scheme", "symbol_rate",
         "apply_button", "status", "balance", "wide_figure", "band", "channel_select",
         "figures", "channel_capture", "estimate", "corrected", "analysis", "recomputes",
         "pending", "truncated")


@functools.lru_cache(maxsize=1)
def _box_class() -> type:
    import ipywidgets as W

    class Explorer(W.VBox):
        """The explorer widget: an ipywidgets VBox whose attributes reach the live state."""

        def flush(self) -> None:
            """Run a pending (debounced) recompute now."""
            self.explorer.flush()

    for key in _LIVE:
        setattr(Explorer, key, property(lambda self, k=key: getattr(self.explorer, k)))
    return Explorer
