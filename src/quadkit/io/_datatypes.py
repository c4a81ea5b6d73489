"""SigMF sample formats: the datatype grammar and the conversion kernels.

The grammar (SigMF core specification, ``core:datatype``)::

    (r|c)(f32|f64|i32|i16|u32|u16)(_le|_be)   or   (r|c)(i8|u8)

``c`` is complex (I then Q, interleaved), ``r`` real; ``f`` IEEE float, ``i`` two's-complement
integer, ``u`` unsigned integer; ``_le``/``_be`` the byte order.

Scaling (the same as the SigMF reference library's "autoscale"):

- signed b-bit integers: ``x / 2**(b-1)`` (ci16: divide by 32768), so full scale is 1.0;
- unsigned b-bit integers: subtract the mid-code ``2**(b-1)`` first, then divide by it
  (cu8: ``(x - 128) / 128``);
- floats are taken as they are.

Integers decode to complex64 (complex) or float32 (real): 8- and 16-bit values are exact in
float32; 32-bit values are rounded once to float32's 24-bit mantissa. ``cf64``/``rf64`` decode
to complex128/float64 (kept, not narrowed). Encoding is the inverse: multiply by ``2**(b-1)``,
round half to even, add the mid-code for unsigned types and clip to the integer range (so
+1.0 in ci16 becomes 32767). The writers divide a capture by its ``full_scale`` before
encoding into an integer format (so a capture with ``full_scale=32768`` writes its values
unchanged as ci16 codes) and warn when samples were clipped.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._errors import CaptureError

__all__ = ["SampleFormat", "parse_datatype", "KNOWN_DATATYPES", "decode", "encode"]

_GRAMMAR = re.compile(
    r"^(?P<cr>[rc])(?:(?P<wide>f32|f64|i32|i16|u32|u16)_(?P<end>le|be)|(?P<byte>[iu]8))$"
)


def _known() -> tuple[str, ...]:
    names = []
    for cr in "cr":
        for base in ("f32", "f64", "i32", "i16", "u32", "u16"):
            names += [f"{cr}{base}_le", f"{cr}{base}_be"]
        names += [f"{cr}i8", f"{cr}u8"]
    return tuple(names)


#: Every datatype name the grammar allows (28 of them).
KNOWN_DATATYPES: tuple[str, ...] = _known()


@dataclass(frozen=True)
class SampleFormat:
    """A parsed SigMF datatype."""

    name: str
    is_complex: bool
    kind: str  # "f", "i" or "u"
    bits: int
    byteorder: str  # "<", ">" or "|"

    @property
    def component(self) -> np.dtype:
        """numpy dtype of one component (I, Q or the real value) as stored in the file."""
        return np.dtype(f"{self.byteorder}{self.kind}{self.bits // 8}")

    @property
    def components(self) -> int:
        return 2 if self.is_complex else 1

    @property
    def sample_bytes(self) -> int:
        """Bytes per sample of one channel (ci16_le: 4, cf32_le: 8, cu8: 2, ri16_be: 2)."""
        return self.components * self.bits // 8

    @property
    def output(self) -> np.dtype:
        """numpy dtype of the decoded samples."""
        wide = self.kind == "f" and self.bits == 64
        if self.is_complex:
            return np.dtype(np.complex128 if wide else np.complex64)
        return np.dtype(np.float64 if wide else np.float32)

    @property
    def scale(self) -> float:
        return 1.0 if self.kind == "f" else float(2 ** (self.bits - 1))

    @property
    def midcode(self) -> float:
        return float(2 ** (self.bits - 1)) if self.kind == "u" else 0.0


def parse_datatype(name: object, *, source: str = "datatype") -> SampleFormat:
    """Parse a SigMF datatype name, raising :class:`CaptureError` listing the known ones."""
    if not isinstance(name, str):
        raise CaptureError(
            f"{source}: datatype must be a string such as 'ci16_le', got {name!r}"
        )
    m = _GRAMMAR.match(name)
    if not m:
        raise CaptureError(
            f"{source}: unknown datatype {name!r}; known datatypes: {', '.join(KNOWN_DATATYPES)}"
        )
    base = m.group("wide") or m.group("byte")
    end = m.group("end")
    order = {"le": "<", "be": ">", None: "|"}[end]
    return SampleFormat(name, m.group("cr") == "c", base[0], int(base[1:]), order)


def decode(raw: np.ndarray, fmt: SampleFormat, *, scratch: bool = False) -> np.ndarray:
    """Turn stored components (any shape, last axis interleaved I/Q) into samples.

    ``raw`` has dtype ``fmt.component``; the result has ``fmt.output`` and, for complex
    formats, half the length along the last axis. Integers take one pass: the multiply
    ufunc reads them and writes float32 directly; the only rounding is int -> float32
    (none for 8/16 bits), since scaling by a power of two is exact. Unsigned codes are
    first re-centred exactly by flipping the top bit (x XOR 2**(b-1) read as signed equals
    x - 2**(b-1)); with ``scratch=True`` that flip is done in ``raw`` itself (which the
    caller then must not use), saving a pass.
    """
    if fmt.kind == "f":
        comp = raw.astype(np.float64 if fmt.bits == 64 else np.float32, copy=False)
        if not comp.flags.c_contiguous:
            comp = np.ascontiguousarray(comp)
    else:
        if fmt.kind == "u":
            # the ufunc writes native byte order, so view the result as native signed ints
            top = raw.dtype.type(1 << (fmt.bits - 1))
            if scratch and raw.dtype.isnative and raw.flags.writeable:
                flipped = np.bitwise_xor(raw, top, out=raw)
            else:
                flipped = np.bitwise_xor(raw, top)
            raw = flipped.view(np.dtype(f"=i{fmt.bits // 8}"))
        comp = np.empty(raw.shape, np.float32)
        np.multiply(raw, np.float32(2.0 ** (1 - fmt.bits)), out=comp, dtype=np.float32)
    if fmt.is_complex:
        return comp.view(np.complex128 if comp.dtype == np.float64 else np.complex64)
    return comp


def encode(samples: np.ndarray, fmt: SampleFormat, *, count_clipped: bool = False) -> Any:
    """Inverse of :func:`decode`: samples (last axis time) to stored components.

    Complex samples are interleaved I, Q along the last axis. Integer formats round half to
    even and clip to the integer range; float formats are cast (cf32 from complex128
    rounds to float32). With ``count_clipped=True`` (integer formats) returns
    ``(components, n)`` where ``n`` counts the samples with I or Q beyond full scale: rounded
    past the full-scale code ``2**(b-1)`` (+1.0 itself becoming 32767 in ci16 is not counted).
    Non-finite samples must be removed first (they would become undefined codes).
    """
    samples = np.asarray(samples)
    if fmt.is_complex:
        if samples.dtype.kind != "c":
            samples = samples.astype(np.complex64)
        width = np.float64 if samples.dtype == np.complex128 else np.float32
        samples = np.ascontiguousarray(samples)
        comp = samples.view(width)
    else:
        if samples.dtype.kind == "c":
            raise CaptureError(
                f"encode: datatype {fmt.name!r} is real but the samples are complex; use a "
                f"complex datatype such as 'c{fmt.name[1:]}'"
            )
        comp = samples
    if fmt.kind == "f":
        return comp.astype(fmt.component)
    info = np.iinfo(fmt.component)
    # float32 holds every 8/16-bit code and its products by 2**(b-1) exactly; 32-bit codes
    # need float64 (2**31 - 1 is not a float32)
    work_type = np.float32 if fmt.bits <= 16 and comp.dtype == np.float32 else np.float64
    work = np.multiply(comp, work_type(fmt.scale), dtype=work_type)
    if fmt.midcode:
        work += work_type(fmt.midcode)
    np.rint(work, out=work)
    n_clipped = 0
    if count_clipped:
        over = (work < info.min) | (work > info.max + 1)
        if fmt.is_complex:
            over = over.reshape(-1, 2).any(axis=1)
        n_clipped = int(np.count_nonzero(over))
    np.clip(work, info.min, info.max, out=work)
    out = work.astype(fmt.component)
    return (out, n_clipped) if count_clipped else out
