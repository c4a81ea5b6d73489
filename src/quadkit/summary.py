"""One call that runs the standard measurements on a capture: :func:`summarize`.

The summary answers the first question asked of any capture: how strong, how clean, is the
front end healthy, what signals are in it. Its figures are the keys of ``quadkit inspect
--json``; ``quadkit.to_json(summarize(cap))`` gives exactly that dict.
"""

from __future__ import annotations

import math
import warnings as warnings_module
from collections.abc import Callable
from typing import Any

import numpy as np
import xarray as xr

from . import _capture
from ._checks import check_finite, check_positive, check_positive_int
from ._errors import MeasurementError
from ._results import quantity

__all__ = ["summarize", "WARNING_LEVELS"]
_ACCESSOR = ("summarize",)

#: Levels at which the summary warns (common practice for receiver bring-up; adjustable per call).
WARNING_LEVELS: dict[str, float] = {
    # |I| or |Q| at or above this fraction of full scale counts as clipped.
    "clip_level": 0.999,
    # DC power relative to the total power above this (dBc) is called a DC spike.
    "dc_spike_dbc": -30.0,
    # Image rejection below this (dB) is called poor imbalance.
    "image_rejection_db": 30.0,
    # Power of 1/64 blocks of the capture varying by more than this (dB) is called bursty.
    "power_swing_db": 6.0,
    # Fewer samples than this make the spectral figures rough.
    "min_samples": 4096,
    # Peak power above this (dBFS) is near full scale.
    "peak_dbfs": -0.5,
}

#: The figures of :func:`quadkit.modulation.analyze` (DESIGN.md), with their units.
MODULATION_FIGURES: dict[str, str] = {
    "evm_rms_percent": "%",
    "evm_peak_percent": "%",
    "mer_db": "dB",
    "frequency_error_hz": "Hz",
    "iq_offset_db": "dB",
    "phase_error_rms_deg": "deg",
    "magnitude_error_rms_percent": "%",
}

# name -> (units, long_name) of every scalar figure, in the order the table prints them.
FIGURES: dict[str, tuple[str, str]] = {
    "samples": ("1", "number of samples per channel"),
    "sample_rate_hz": ("Hz", "sample rate"),
    "center_frequency_hz": ("Hz", "center frequency (RF of baseband 0 Hz)"),
    "duration_s": ("s", "duration"),
    "mean_power_dbfs": ("dBFS", "mean power"),
    "peak_power_dbfs": ("dBFS", "peak sample power"),
    "crest_factor_db": ("dB", "crest factor (peak over mean power)"),
    "clipped_fraction": ("1", "fraction of samples at or above the clip level"),
    "dc_i": ("FS", "DC offset of I"),
    "dc_q": ("FS", "DC offset of Q"),
    "gain_imbalance_db": ("dB", "gain imbalance Q over I"),
    "phase_skew_deg": ("deg", "phase skew of Q"),
    "image_rejection_db": ("dB", "image rejection ratio"),
    "noise_floor_dbfs_hz": ("dBFS/Hz", "noise floor density"),
    "occupied_bandwidth_hz": ("Hz", "99 % occupied bandwidth"),
}


def _db(x: Any) -> Any:
    with np.errstate(divide="ignore"):
        return 10 * np.log10(x)


def _per_channel(values: Any, cap: xr.DataArray) -> xr.DataArray:
    values = np.asarray(values, dtype=float)
    if "channel" in cap.dims:
        return xr.DataArray(values.reshape(cap.sizes["channel"]), dims=("channel",))
    return xr.DataArray(values.reshape(()))


def _try(
    warnings: list[str], what: str, func: Callable[[], Any]
) -> Any:
    """Run one figure; a figure that cannot be made honestly becomes a warning, not a crash."""
    try:
        return func()
    except MeasurementError as exc:
        warnings.append(f"{what}: not measured ({exc})")
        return None


def summarize(
    cap: xr.DataArray,
    *,
    scheme: str | None = None,
    symbol_rate: float | None = None,
    rolloff: float = 0.35,
    max_tones: int = 8,
    tone_threshold_db: float = 15.0,
    levels: dict[str, float] | None = None,
    progress: Callable[[str], None] | None = None,
) -> xr.Dataset:
    """Run the standard measurements on a capture and gather the figures.

    Parameters
    ----------
    cap : capture
        One channel or ``("channel", "time")``; lazy captures are reduced chunk by chunk.
    scheme, symbol_rate, rolloff
        With a modulation scheme (``"qpsk"``, ``"16qam"``, ...) and symbol rate (Hz), the
        modulation-quality figures of :func:`quadkit.modulation.analyze` are added under the
        ``modulation_`` prefix (the ``modulation`` key of the JSON).
    max_tones, tone_threshold_db
        How many tones to list at most, and how far above the local noise floor (dB) a
        spectral peak must stand to count as a tone.
    levels
        Overrides of :data:`WARNING_LEVELS`.
    progress
        Called with the name of each step before it runs (the command line shows a bar).

    Returns
    -------
    xarray.Dataset
        The scalar figures of :data:`FIGURES` (a ``channel`` dim for multi-channel captures),
        the tone table along ``tone`` (``tone_frequency_hz``, ``tone_offset_hz``,
        ``tone_power_dbfs``, and ``tone_channel`` for multi-channel captures), and ``attrs["warnings"]``: plain sentences, most serious first.
        IQ-imbalance figures of a real capture are NaN (``null`` in JSON) with a warning.

    Examples
    --------
    >>> import quadkit
    >>> cap = quadkit.synth.tone(100e3, sample_rate=1e6, n_samples=65536, amplitude=0.5)
    >>> cap = quadkit.synth.add_noise(cap, snr_db=40, rng=0)
    >>> s = quadkit.summarize(cap)
    >>> round(float(s.mean_power_dbfs), 2)  # 20 log10(0.5) plus 40 dB-down noise
    -6.02
    >>> round(float(s.tone_offset_hz[0]) / 1e3, 1)
    100.0
    """
    # Empty, constant or all-zero captures make logs of zero and 0/0 on the way; those
    # figures come out as -inf or NaN (null in JSON) with a warning of their own, so numpy's
    # floating-point chatter would only repeat it on stderr.
    with np.errstate(all="ignore"), warnings_module.catch_warnings():
        warnings_module.simplefilter("ignore", RuntimeWarning)
        return _summarize(cap, scheme=scheme, symbol_rate=symbol_rate, rolloff=rolloff,
                          max_tones=max_tones, tone_threshold_db=tone_threshold_db,
                          levels=levels, progress=progress)


def _summarize(cap, *, scheme, symbol_rate, rolloff, max_tones, tone_threshold_db, levels,
               progress):
    lv = dict(WARNING_LEVELS)
    lv.update(levels or {})
    max_tones = check_positive_int("summarize", "max_tones", max_tones)
    tone_threshold_db = check_finite("summarize", "tone_threshold_db", tone_threshold_db)
    if (scheme is None) != (symbol_rate is None):
        raise ValueError("summarize: give both scheme= and symbol_rate=, or neither")
    if symbol_rate is not None:
        symbol_rate = check_positive("summarize", "symbol_rate", symbol_rate)
    _capture.validate_light(cap)
    step = progress or (lambda name: None)
    fs = _capture.sample_rate(cap)
    if symbol_rate is not None and symbol_rate >= fs:
        raise ValueError(
            f"summarize: symbol_rate={symbol_rate:g} Hz must be below the sample rate {fs:g} Hz "
            "(at least 2 samples per symbol are needed)"
        )
    n = int(cap.sizes["time"])
    if n == 0:
        raise MeasurementError("summarize: the capture has no samples")
    warnings: list[str] = []
    serious: list[str] = []
    scale = _capture.full_scale(cap)

    step("power")
    x = cap.data
    mag2 = (x.real**2 + x.imag**2) if _capture.is_complex(cap) else x.astype(np.float64) ** 2
    clip = lv["clip_level"] * scale
    if _capture.is_complex(cap):
        clipped = (abs(x.real) >= clip) | (abs(x.imag) >= clip)
    else:
        clipped = abs(x) >= clip
    finite = np.isfinite(x)
    n_blocks = 64
    block = n // n_blocks
    swing = None
    if block >= 128:
        # mean power of 64 equal blocks: a steady signal's blocks agree to ~1/sqrt(block)
        swing = (xr.DataArray(mag2, dims=cap.dims).isel(time=slice(0, n_blocks * block))
                 .coarsen(time=block).mean().data)
    reductions = [
        mag2.astype(np.float64).mean(axis=-1),
        mag2.max(axis=-1),
        clipped.astype(np.float64).mean(axis=-1),
        (~finite).sum(),
        (~finite).ravel().argmax(),
        swing if swing is not None else np.zeros(1),
    ]
    if _capture.is_lazy(cap):
        import dask

        reductions = dask.compute(*reductions)
    mean_p, peak_p, clip_frac = (np.asarray(r, dtype=float) for r in reductions[:3])
    n_bad, first_bad = int(reductions[3]), int(reductions[4])
    blocks = np.asarray(reductions[5], dtype=float)
    mean_dbfs = _db(mean_p / scale**2)
    peak_dbfs = _db(np.asarray(peak_p, dtype=float) / scale**2)
    figures: dict[str, Any] = {
        "samples": n,
        "sample_rate_hz": fs,
        "center_frequency_hz": float(cap.attrs.get("center_frequency", 0.0)),
        "duration_s": n / fs,
        "mean_power_dbfs": mean_dbfs,
        "peak_power_dbfs": peak_dbfs,
        "crest_factor_db": peak_dbfs - mean_dbfs,
        "clipped_fraction": clip_frac,
    }
    if n_bad:
        what = _capture.describe_nonfinite(n_bad, first_bad // n, first_bad % n,
                                           multichannel=cap.ndim == 2)
        serious.append(
            f"{what}; figures that use them are n/a. Look for a failed "
            "conversion or a dropped buffer"
        )
    if np.any(mean_p == 0):
        serious.append("the capture is all zeros (no signal at all): check the receiver")
    if np.any(clip_frac > 0):
        count = int(round(float(np.max(clip_frac)) * n))
        serious.append(
            f"clipping: {count} samples ({100 * float(np.max(clip_frac)):.3g} %) reach "
            f"{100 * lv['clip_level']:.1f} % of full scale: the input is overdriven; add "
            "attenuation or lower the gain"
        )
    elif np.any(peak_dbfs > lv["peak_dbfs"]):
        warnings.append(
            f"peak power {float(np.max(peak_dbfs)):.2f} dBFS is near full scale: little headroom"
        )
    if swing is not None and np.all(np.isfinite(blocks)) and np.max(blocks) > 0:
        lo = np.min(blocks, axis=-1)
        swing_db = float(np.max(10 * np.log10(np.max(blocks, axis=-1) / np.maximum(lo, 1e-300))))
        if swing_db > lv["power_swing_db"]:
            warnings.append(
                f"bursty: the power of 1/64 parts of the capture varies by {swing_db:.1f} dB (a "
                "burst, a gap or fading); noise floor, occupied bandwidth and tones average "
                "over quiet and busy parts alike: measure a burst alone with cap.isel(time=...)"
            )
    if n < lv["min_samples"]:
        warnings.append(
            f"only {n} samples: spectral figures are rough (at least {int(lv['min_samples'])} "
            "are needed for a steady estimate)"
        )

    for name in ("dc_i", "dc_q", "gain_imbalance_db", "phase_skew_deg", "image_rejection_db"):
        figures[name] = np.full(np.shape(mean_p), np.nan)
    if _capture.is_complex(cap):
        step("IQ imbalance")
        from . import impairments

        est = _try(warnings, "IQ imbalance", lambda: impairments.estimate(cap))
        if est is not None:
            for name in ("dc_i", "dc_q", "gain_imbalance_db", "phase_skew_deg",
                         "image_rejection_db"):
                figures[name] = np.asarray(est[name].values, dtype=float)
            dc_pow = (figures["dc_i"] ** 2 + figures["dc_q"] ** 2) * scale**2
            with np.errstate(divide="ignore", invalid="ignore"):
                dc_dbc = _db(dc_pow / mean_p)
            if np.any(dc_dbc > lv["dc_spike_dbc"]):
                serious.append(
                    f"DC spike: the DC offset holds {float(np.nanmax(dc_dbc)):.1f} dBc of the "
                    "power (carrier leakage or ADC offset)"
                )
            irr = figures["image_rejection_db"]
            if np.any(irr < lv["image_rejection_db"]):
                serious.append(
                    f"IQ imbalance: image rejection {float(np.nanmin(irr)):.1f} dB is below "
                    f"{lv['image_rejection_db']:.0f} dB (gain "
                    f"{float(np.ravel(figures['gain_imbalance_db'])[0]):+.2f} dB, phase "
                    f"{float(np.ravel(figures['phase_skew_deg'])[0]):+.2f} deg)"
                )
    else:
        warnings.append(
            "real-valued capture: IQ figures (DC, imbalance, image rejection) do not apply; "
            "bring it to baseband with quadkit.mixing.downconvert first"
        )

    step("spectrum")
    from . import spectral

    figures["noise_floor_dbfs_hz"] = np.full(np.shape(mean_p), np.nan)
    figures["occupied_bandwidth_hz"] = np.full(np.shape(mean_p), np.nan)
    tones = None
    spectrum = _try(warnings, "spectrum", lambda: spectral.psd(cap))
    if spectrum is not None:
        floor = _try(warnings, "noise floor", lambda: spectral.noise_floor(spectrum))
        if floor is not None:
            figures["noise_floor_dbfs_hz"] = np.asarray(getattr(floor, "values", floor), dtype=float)
        obw = _try(warnings, "occupied bandwidth",
                   lambda: spectral.occupied_bandwidth(spectrum, fraction=0.99))
        if obw is not None:
            figures["occupied_bandwidth_hz"] = np.asarray(obw["occupied_bandwidth_hz"].values,
                                                          dtype=float)
        step("tones")
        tones = _try(warnings, "tones", lambda: spectral.find_peaks(
            spectrum, threshold_db=tone_threshold_db, max_peaks=max_tones))

    data_vars: dict[str, xr.DataArray] = {}
    for name, (units, long_name) in FIGURES.items():
        value = figures[name]
        var = _per_channel(value, cap) if np.ndim(value) else xr.DataArray(value)
        data_vars[name] = quantity(var, units, long_name)
    if tones is not None and "tone" in tones.dims:
        t = tones
        for name in ("frequency_hz", "offset_hz", "power_dbfs"):
            v = t[name]
            data_vars[f"tone_{name}"] = quantity(
                v.drop_vars(list(v.coords)),
                v.attrs.get("units", ""), "tone " + v.attrs.get("long_name", name))
        if "channel" in t.coords:  # multi-channel: each tone names its channel
            data_vars["tone_channel"] = quantity(
                xr.DataArray(np.asarray(t["channel"].values), dims="tone"), "1",
                "channel the tone was found in")
    else:
        for name, units in (("frequency_hz", "Hz"), ("offset_hz", "Hz"), ("power_dbfs", "dBFS")):
            data_vars[f"tone_{name}"] = quantity(np.zeros(0), units, f"tone {name}", dims="tone")

    attrs: dict[str, Any] = {
        "json_records": {"tones": "tone"},
        "json_attrs": ["warnings"],
    }
    if scheme is not None:
        step("modulation")
        from . import modulation

        mod = _try(warnings, "modulation", lambda: modulation.analyze(
            cap, scheme, symbol_rate=symbol_rate, rolloff=rolloff))
        attrs["json_groups"] = {"modulation": "modulation_"}
        if mod is None:  # the figures are named all the same, as not measured
            for name, units in MODULATION_FIGURES.items():
                data_vars[f"modulation_{name}"] = quantity(np.nan, units, name.replace("_", " "))
        else:
            for name, var in mod.data_vars.items():
                if "symbol" in var.dims:
                    continue
                if "channel" in var.dims:
                    var = var.isel(channel=0)
                data_vars[f"modulation_{name}"] = quantity(
                    var.drop_vars(list(var.coords)), var.attrs.get("units", ""),
                    var.attrs.get("long_name", str(name)))
    attrs["warnings"] = serious + warnings
    ds = xr.Dataset(data_vars, attrs=attrs)
    if "channel" in cap.dims:
        ds = ds.assign_coords(channel=cap.channel.values)
    return ds


def figure_line(name: str, value: Any, units: str) -> str:
    """One line of the readable table: name, value with sensible digits, unit."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        text = "n/a"
    elif name == "samples" or (units == "1" and float(value).is_integer()):
        text = f"{int(value):,}"
    elif units == "Hz":
        text = _si(float(value), "Hz")
        units = ""
    elif units == "s":
        text = _si(float(value), "s")
        units = ""
    elif name == "clipped_fraction":
        text = f"{float(value):.3g}"
    elif units == "FS":
        text = f"{float(value):+.5f}"
    else:
        text = f"{float(value):.2f}"
    return f"  {name:<24} {text} {units if units not in ('1',) else ''}".rstrip()


def _si(value: float, unit: str) -> str:
    if value == 0:
        return f"0 {unit}"
    prefixes = [(1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "u")]
    for scale, p in prefixes:
        if abs(value) >= scale:
            return f"{value / scale:.6g} {p}{unit}"
    return f"{value:.3g} {unit}"
