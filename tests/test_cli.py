"""The command line, run as a user runs it: in a subprocess."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import quadkit
from quadkit import io, synth

ROOT = Path(__file__).resolve().parents[1]


def run(*args, cwd=None):
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    return subprocess.run([sys.executable, "-m", "quadkit.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=300)


@pytest.fixture(scope="module")
def tone_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    cap = synth.add_noise(synth.tone(50e3, sample_rate=1e6, n_samples=2**15, amplitude=0.25,
                                     center_frequency=144.3e6), snr_db=40, rng=0)
    path = d / "tone.sigmf-meta"
    io.write_sigmf(cap, path, dtype="cf32_le")
    return path


def test_inspect_json(tone_file):
    r = run("inspect", tone_file, "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["samples"] == 2**15
    assert out["sample_rate_hz"] == 1e6
    assert out["center_frequency_hz"] == 144.3e6
    # amplitude 0.25: 20 log10(0.25) = -12.04 dBFS (DESIGN power convention)
    assert out["mean_power_dbfs"] == pytest.approx(20 * np.log10(0.25), abs=0.01)
    assert out["tones"][0]["frequency_hz"] == pytest.approx(144.35e6, abs=30)


def test_inspect_table(tone_file):
    r = run("inspect", tone_file)
    assert r.returncode == 0, r.stderr
    assert "mean_power_dbfs" in r.stdout and "dBFS" in r.stdout
    assert r.stdout.rstrip().splitlines()[-1].strip().startswith("warnings") or "warnings" in r.stdout
    assert "Traceback" not in r.stderr


def test_raw_needs_dtype_and_rate(tmp_path):
    raw = tmp_path / "capture.bin"
    (np.arange(8, dtype=np.int16)).tofile(raw)
    r = run("inspect", raw)
    assert r.returncode == 2
    assert r.stderr.startswith("quadkit: error:") and len(r.stderr.strip().splitlines()) == 1
    r = run("inspect", raw, "--dtype", "ci16_le", "--sample-rate", "1e6", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["samples"] == 4


@pytest.mark.parametrize("args", [
    ["inspect", "does-not-exist.sigmf-meta"],
    ["inspect"],
    ["frobnicate"],
    ["convert", "does-not-exist.wav", "out.sigmf-meta"],
])
def test_user_errors_are_one_line(args, tmp_path):
    r = run(*args, cwd=tmp_path)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("quadkit: error:"), r.stderr
    assert "Traceback" not in r.stderr


def test_convert_raw_to_sigmf_and_back(tmp_path):
    x = (np.array([1, 2, -3, -4, 100, -100], dtype=np.int16))
    raw = tmp_path / "in.iq"
    x.tofile(raw)
    meta = tmp_path / "out.sigmf-meta"
    r = run("convert", raw, meta, "--dtype", "ci16_le", "--sample-rate", "2e6",
            "--center-frequency", "868e6")
    assert r.returncode == 0, r.stderr
    cap = io.read(meta)
    assert cap.attrs["sample_rate"] == 2e6 and cap.attrs["center_frequency"] == 868e6
    # ci16 scales by 1/32768 (SigMF integer convention used by quadkit)
    np.testing.assert_array_equal(cap.values, (x[0::2] + 1j * x[1::2]) / 32768)
    back = tmp_path / "back.iq"
    r = run("convert", meta, back, "--out-dtype", "ci16_le")
    assert r.returncode == 0, r.stderr
    assert back.read_bytes() == raw.read_bytes()
    # nothing is overwritten without --overwrite
    r = run("convert", meta, back, "--out-dtype", "ci16_le")
    assert r.returncode == 2 and "exist" in r.stderr


def test_demo_writes_and_refuses_to_overwrite(tmp_path):
    r = run("demo", tmp_path / "d")
    assert r.returncode == 0, r.stderr
    metas = sorted((tmp_path / "d").glob("*.sigmf-meta"))
    assert len(metas) == 4
    assert "quadkit inspect" in r.stdout
    r = run("demo", tmp_path / "d")
    assert r.returncode == 2 and "--overwrite" in r.stderr


def test_errors_speak_the_command_line(tmp_path):
    (tmp_path / "folder").mkdir()
    r = run("inspect", tmp_path / "folder")
    assert r.returncode == 2 and "is a folder" in r.stderr
    r = run("inspect", tmp_path / "missing.bin")
    assert r.returncode == 2 and "no such file" in r.stderr
    raw = tmp_path / "x.bin"
    raw.write_bytes(b"\0" * 16)
    r = run("inspect", raw)
    assert r.returncode == 2 and "--dtype and --sample-rate" in r.stderr
    (tmp_path / "afile").write_text("")
    r = run("demo", tmp_path / "afile")
    assert r.returncode == 2 and "not a folder" in r.stderr


def test_lost_metadata_is_one_warning_line(tone_file, tmp_path):
    r = run("convert", tone_file, tmp_path / "t.wav")
    assert r.returncode == 0, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert lines == [ln for ln in lines if ln.startswith("quadkit: warning:")]
    assert any("center_frequency" in ln for ln in lines)
