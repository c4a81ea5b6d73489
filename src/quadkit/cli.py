"""The ``quadkit`` command line: inspect, report, convert and demo.

A user error (bad file, bad option, a measurement that cannot be made) prints one line to
stderr starting with ``quadkit: error:`` and exits with status 2; never a traceback.
"""

from __future__ import annotations

import argparse
import json
import sys
import warnings
from collections.abc import Sequence
from pathlib import Path
from typing import Any, NoReturn

from ._errors import CaptureError, MeasurementError

_RAW_HELP = "for raw files: sample format as SigMF names it (ci16_le, cf32_le, cu8, ...)"


class _UserError(Exception):
    pass


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # one clear line, status 2
        raise _UserError(f"{message} (see 'quadkit {self.prog.split()[-1]} --help')"
                         if " " in self.prog else f"{message} (see 'quadkit --help')")


def _read(args: argparse.Namespace, path: str) -> Any:
    from . import io

    p = Path(path)
    kind = io._kind(p)
    if not p.exists():
        raise _UserError(f"{path}: no such file")
    if p.is_dir() and kind != "zarr":
        raise _UserError(f"{path} is a folder, not a capture file (Zarr stores end in .zarr)")
    if kind == "raw" and (not getattr(args, "dtype", None)
                          or getattr(args, "sample_rate", None) is None):
        raise _UserError(
            f"{path}: the extension is not one quadkit knows, so it is read as raw samples, "
            "which needs --dtype and --sample-rate (e.g. --dtype ci16_le --sample-rate 2e6); "
            "known extensions: .sigmf-meta, .sigmf-data, .sigmf, .wav, .nc, .zarr, .npy")
    if kind == "npy" and getattr(args, "sample_rate", None) is None:
        raise _UserError(f"{path}: .npy files hold no sample rate; give --sample-rate (Hz)")

    overrides: dict[str, Any] = {}
    if getattr(args, "dtype", None):
        overrides["dtype"] = args.dtype
    if getattr(args, "sample_rate", None) is not None:
        overrides["sample_rate"] = args.sample_rate
    if getattr(args, "center_frequency", None) is not None:
        overrides["center_frequency"] = args.center_frequency
    return io.read(path, **overrides)


def _progress(enabled: bool | None, steps: Sequence[str]):
    from tqdm.auto import tqdm

    bar = tqdm(total=len(steps), desc="measuring", unit="step", file=sys.stderr,
               disable=None if enabled is None else not enabled,
               leave=False)

    def advance(name: str) -> None:
        bar.set_postfix_str(name)
        bar.update(1)

    return bar, advance


_SUMMARY_STEPS = ["power", "IQ imbalance", "spectrum", "tones"]
_REPORT_STEPS = ["spectrum", "spectrogram", "time", "phase noise", "constellation", "page"]


def _summary(args: argparse.Namespace, cap: Any, advance: Any = None) -> Any:
    from .summary import summarize

    steps = _SUMMARY_STEPS + (["modulation"] if args.scheme else [])
    bar = None
    if advance is None:
        bar, advance = _progress(args.progress, steps)
    try:
        return summarize(cap, scheme=args.scheme, symbol_rate=args.symbol_rate,
                         rolloff=args.rolloff, progress=advance)
    finally:
        if bar is not None:
            bar.close()


def _cmd_inspect(args: argparse.Namespace) -> int:
    from . import to_json
    from .summary import FIGURES, figure_line

    cap = _read(args, args.file)
    summary = _summary(args, cap)
    data = to_json(summary)
    if args.json:
        json.dump(data, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return 0
    out = [f"{args.file}"]
    desc = cap.attrs.get("description")
    if desc:
        out.append(f"  {str(desc)[:200]}")
    multi = isinstance(data.get("mean_power_dbfs"), list)
    for name, (units, _) in FIGURES.items():
        value = data.get(name)
        if multi and isinstance(value, list):
            for ch, v in enumerate(value):
                out.append(figure_line(f"{name}[{ch}]", v, units))
        else:
            out.append(figure_line(name, value, units))
    tones = data.get("tones", [])
    out.append(f"  tones ({len(tones)})")
    for t in tones:
        where = f"  channel {t['channel']}" if "channel" in t else ""
        out.append(f"    {t['frequency_hz'] / 1e6:16.6f} MHz  offset {t['offset_hz'] / 1e3:+12.3f} kHz"
                   f"  {t['power_dbfs']:8.2f} dBFS{where}")
    if "modulation" in data:
        out.append(f"  modulation ({args.scheme}, {args.symbol_rate:g} Bd)")
        units = {k: summary[f"modulation_{k}"].attrs.get("units", "") for k in data["modulation"]}
        for key, value in data["modulation"].items():
            out.append("  " + figure_line(key, value, units[key]))
    warn = data.get("warnings", [])
    out.append(f"  warnings ({len(warn)})")
    out.extend(f"    - {w}" for w in warn)
    print("\n".join(out))
    return 0


def _cmd_report(args: argparse.Namespace) -> int:
    from . import report

    from .io._atomic import check_writable

    check_writable(args.output, overwrite=args.overwrite)  # refuse before any work
    cap = _read(args, args.file)
    steps = _SUMMARY_STEPS + (["modulation"] if args.scheme else []) + _REPORT_STEPS
    bar, advance = _progress(args.progress, steps)
    try:
        summary = _summary(args, cap, advance)
        path = report.write(cap, args.output, overwrite=args.overwrite, summary=summary,
                            source_name=Path(args.file).name, scheme=args.scheme,
                            symbol_rate=args.symbol_rate, progress=advance)
    finally:
        bar.close()
    print(f"wrote {path}")
    return 0


def _cmd_convert(args: argparse.Namespace) -> int:
    from . import io

    cap = _read(args, args.input)
    out = args.output
    suffix = "".join(Path(out).suffixes[-1:]).lower()
    if suffix in (".sigmf-meta", ".sigmf-data", ".sigmf"):
        kwargs = {"dtype": args.out_dtype} if args.out_dtype else {}
        path = io.write_sigmf(cap, out, overwrite=args.overwrite, **kwargs)
    elif suffix == ".wav":
        kwargs = {"dtype": args.out_dtype} if args.out_dtype else {}
        path = io.write_wav(cap, out, overwrite=args.overwrite, **kwargs)
    elif suffix in (".nc", ".zarr", ".npy"):
        path = io.write(cap, out, overwrite=args.overwrite)
    else:
        if not args.out_dtype:
            raise _UserError(
                f"convert: {out} is a raw file; give its sample format with --out-dtype "
                "(for example ci16_le or cf32_le)"
            )
        path = io.write_raw(cap, out, dtype=args.out_dtype, overwrite=args.overwrite)
    print(f"wrote {path or out}")
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from . import demo

    if Path(args.dir).exists() and not Path(args.dir).is_dir():
        raise _UserError(f"{args.dir} exists and is not a folder; name a folder for the demo files")
    written = demo.write_demo(args.dir, overwrite=args.overwrite)
    print(f"wrote {len(written)} demo captures to {args.dir}:")
    for path, text in written:
        print(f"  {path.name:<28} {text}")
    first = written[0][0]
    print("\nTry next:")
    print(f"  quadkit inspect {first}")
    print(f"  quadkit inspect {first} --json")
    for path, _ in written:
        if "qpsk" in path.name:
            print(f"  quadkit inspect {path} --scheme qpsk --symbol-rate 250e3")
    print(f"  quadkit report {first} -o bench_tone.html")
    return 0


def _add_raw_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--dtype", help=_RAW_HELP)
    p.add_argument("--sample-rate", type=float, help="sample rate in Hz (raw files, or override)")
    p.add_argument("--center-frequency", type=float,
                   help="RF frequency in Hz of baseband 0 Hz (raw files, or override)")


def _add_measure_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--scheme", help="modulation scheme for EVM/MER: bpsk, qpsk, 16qam, 64qam, ...")
    p.add_argument("--symbol-rate", type=float, help="symbol rate in Hz (with --scheme)")
    p.add_argument("--rolloff", type=float, default=0.35, help="RRC roll-off (default 0.35)")
    p.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="show a progress bar (default: when stderr is a terminal)")


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    parser = _Parser(prog="quadkit", description="Measure, check and convert IQ captures.")
    parser.add_argument("--version", action="version", version=f"quadkit {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("inspect", help="print the standard figures of a capture")
    p.add_argument("file")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    _add_raw_options(p)
    _add_measure_options(p)
    p.set_defaults(func=_cmd_inspect)

    p = sub.add_parser("report", help="write a self-contained HTML report of a capture")
    p.add_argument("file")
    p.add_argument("-o", "--output", required=True, help="the HTML file to write")
    p.add_argument("--overwrite", action="store_true", help="replace an existing file")
    _add_raw_options(p)
    _add_measure_options(p)
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("convert", help="convert between raw, WAV, SigMF, netCDF, Zarr and .npy")
    p.add_argument("input")
    p.add_argument("output")
    p.add_argument("--out-dtype", help="sample format of the output (SigMF name; raw needs it)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing file")
    _add_raw_options(p)
    p.set_defaults(func=_cmd_convert)

    p = sub.add_parser("demo", help="write the demo captures and say what to try next")
    p.add_argument("dir", nargs="?", default="quadkit-demo")
    p.add_argument("--overwrite", action="store_true", help="replace existing demo files")
    p.set_defaults(func=_cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``quadkit`` command; returns the exit status."""
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if getattr(args, "scheme", None) and getattr(args, "symbol_rate", None) is None:
            raise _UserError("--scheme needs --symbol-rate (in Hz)")
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            status = int(args.func(args) or 0)
        seen = set()
        for w in caught:  # quadkit's own warnings, one line each, like the errors
            text = str(w.message).strip().splitlines()[0] if str(w.message).strip() else ""
            if "quadkit" in str(w.filename) and text and text not in seen and issubclass(
                    w.category, (UserWarning, RuntimeWarning)):
                seen.add(text)
                print(f"quadkit: warning: {text}", file=sys.stderr)
        return status
    except (_UserError, CaptureError, MeasurementError, ValueError, FileNotFoundError,
            FileExistsError, IsADirectoryError, PermissionError) as exc:
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        if isinstance(exc, (FileNotFoundError, FileExistsError, PermissionError,
                            IsADirectoryError)) and exc.filename and str(exc.filename) not in msg:
            msg = f"{msg}: {exc.filename}"
        msg = msg.replace("pass overwrite=True", "pass --overwrite")
        msg = msg.replace("pass sample_rate=", "pass --sample-rate")
        print(f"quadkit: error: {msg}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("quadkit: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
