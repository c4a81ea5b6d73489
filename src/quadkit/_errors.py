"""The two error families of quadkit.

Both derive from :class:`ValueError`, so code that already catches bad values keeps working.
Plain argument mistakes (a negative factor, an unknown option) raise a plain ``ValueError``
through :mod:`quadkit._checks`.
"""

from __future__ import annotations

__all__ = ["CaptureError", "MeasurementError"]


class CaptureError(ValueError):
    """A capture, its file or its metadata is unusable.

    The message names the file and the field (or byte offset), says what was expected, what
    was found, and what to do about it.
    """


class MeasurementError(ValueError):
    """A measurement cannot be made honestly on this capture.

    Raised instead of returning a NaN or a meaningless number: no tone above the noise, fewer
    samples than the method needs, a symbol rate above the sample rate, and so on.
    """
