"""Tests of quadkit.report: content, escaping, atomic writing, size, and the page in a real
headless Chromium with no network (Debian's chromium + chromium-driver, as .ci/run installs).
"""

from __future__ import annotations

import html
import os
import re
import shutil
import tempfile
import time

import numpy as np
import pytest

import quadkit
from quadkit import impairments, report

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
CHROMEDRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"

# Markup an attacker (or a careless tool) might leave in a capture's metadata.
EVIL = '<script>window.__qk_injected = 1</script><b onmouseover="x()">bold</b> & "q"'
BUDGET_BYTES = 5 * 1024 * 1024


@pytest.fixture(scope="module")
def bench_cap():
    cap = quadkit.synth.tone(125e3, sample_rate=1e6, n_samples=2**16, amplitude=0.5,
                             center_frequency=915e6)
    bad = impairments.apply(cap, gain_imbalance_db=0.7, phase_skew_deg=2.5, dc_i=0.004)
    bad = quadkit.synth.add_noise(bad, snr_db=60, rng=2)
    bad.attrs.update(
        description=EVIL, hardware="board <C> rev 2", start_time="2026-11-30T09:15:00Z",
        annotations=[{"start_sample": 0, "sample_count": 1024, "label": "<i>tone</i>",
                      "comment": "</td></tr></table><script>window.__qk_injected=2</script>"}],
        **{"bench:operator": "<img src=x onerror=alert(1)>"})
    return bad


@pytest.fixture(scope="module")
def page(bench_cap):
    return report.render(bench_cap, source_name="bench<1>.sigmf-meta", title="Tone <check>")


def test_page_is_self_contained(page):
    # BokehJS inline: no script or stylesheet fetched from anywhere.
    assert "BEGIN bokeh.min.js" in page and "BEGIN bokeh-gl.min.js" in page
    assert not re.search(r"<script[^>]+src=", page)
    assert not re.search(r"<link[^>]+href=", page)
    assert "cdn.bokeh.org" not in page


def test_metadata_strings_are_escaped(page):
    for raw in (EVIL, "board <C> rev 2", "<i>tone</i>", "bench<1>.sigmf-meta", "Tone <check>",
                "<img src=x onerror=alert(1)>"):
        assert html.escape(raw, quote=True) in page, raw
    assert "window.__qk_injected" not in page.replace(html.escape(EVIL, quote=True), "") \
        .replace(html.escape("</td></tr></table><script>window.__qk_injected=2</script>",
                             quote=True), "")
    assert "<img src=x" not in page and "<b onmouseover" not in page


def test_summary_units_warnings_tones_and_cautions(bench_cap, page):
    s = quadkit.summarize(bench_cap)
    # Every scalar figure with its unit, as the summary gives them.
    for name in ("mean_power_dbfs", "image_rejection_db", "gain_imbalance_db", "dc_i"):
        assert f"<code>{name}</code>" in page
    assert f"{float(s.gain_imbalance_db):.2f}</td><td class='unit'>dB</td>" in page
    assert f"{float(s.mean_power_dbfs):.2f}</td><td class='unit'>dBFS</td>" in page
    for w in s.attrs["warnings"]:
        assert html.escape(w, quote=True) in page
    # The tone at 915.125 MHz is listed.
    assert "915,125,000.0" in page
    for c in report.CAUTIONS:
        assert html.escape(c) in page
    assert "radio regulations" in page and "attenuators" in page


def test_a_given_summary_is_used_as_it_is(bench_cap):
    s = quadkit.summarize(bench_cap)
    s["mean_power_dbfs"] = s.mean_power_dbfs * 0 - 12.3456
    s.mean_power_dbfs.attrs.update(units="dBFS", long_name="mean power")
    out = report.render(bench_cap, summary=s)
    assert "-12.35</td><td class='unit'>dBFS" in out


def test_write_is_atomic_and_never_overwrites_unasked(bench_cap, tmp_path):
    target = tmp_path / "r.html"
    target.write_text("keep me")
    with pytest.raises(FileExistsError):
        report.write(bench_cap, target)
    assert target.read_text() == "keep me"
    out = report.write(bench_cap, target, overwrite=True, summary=quadkit.summarize(bench_cap))
    assert out == target and target.read_text().startswith("<!DOCTYPE html>")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.html"]  # no temporary left
    # An error while rendering leaves nothing behind.
    with pytest.raises(ValueError):
        report.write(np.zeros(10), tmp_path / "bad.html")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.html"]


def test_plot_data_stays_under_the_budget_for_a_long_capture():
    n = 2**23
    rng = np.random.default_rng(8)
    x = (0.01 * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)
    x[5_000_001] = 0.9j
    cap = quadkit.capture(x, sample_rate=10e6, center_frequency=2.4e9)
    summary = quadkit.summarize(cap.isel(time=slice(0, 65536)))
    page = report.render(cap, summary=summary)
    js = sum(len(m) for m in re.findall(r"<script>\s*/\* BEGIN.*?</script>", page, re.S))
    assert len(page) - js < BUDGET_BYTES
    assert len(page) < BUDGET_BYTES + 3 * 1024 * 1024  # BokehJS core + WebGL add ~1.7 MB


def test_multichannel_report_has_a_column_per_channel():
    x = np.stack([quadkit.synth.tone(f, sample_rate=1e6, n_samples=8192).values * a
                  for f, a in ((100e3, 0.5), (-200e3, 0.25))])
    cap = quadkit.capture(x, sample_rate=1e6, center_frequency=100e6)
    cap = quadkit.synth.add_noise(cap, snr_db=50, rng=1)
    out = report.render(cap)
    assert "<th>channel 0</th><th>channel 1</th>" in out
    # spectrum, spectrogram (a column of two), time, phase noise (a tone dominates)
    assert out.count("data-root-id") == 4


def test_command_line_report_writes_an_escaped_page(tmp_path, bench_cap):
    from quadkit import cli, io

    meta = tmp_path / "bench.sigmf-meta"
    io.write_sigmf(bench_cap, meta)
    out = tmp_path / "bench.html"
    assert cli.main(["report", str(meta), "-o", str(out)]) == 0
    text = out.read_text()
    assert html.escape(EVIL, quote=True) in text and EVIL not in text
    assert cli.main(["report", str(meta), "-o", str(out)]) != 0  # exists: refused


# ------------------------------------------------------------------------------------------
# in a real browser
# ------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def browser():
    if not (os.path.exists(CHROMIUM) and os.path.exists(CHROMEDRIVER)):
        pytest.fail("the browser test needs Debian's chromium and chromium-driver "
                    "(apt-get install chromium chromium-driver; .ci/run does it)")
    from selenium import webdriver
    from selenium.webdriver.chrome.options import Options
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="qk-chromium-")
    opts = Options()
    for arg in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                "--no-first-run", "--disable-background-networking",
                "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
                "--window-size=1280,2400"):
        opts.add_argument(arg)
    opts.binary_location = CHROMIUM
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def _wait(driver, script, timeout=90.0):
    end = time.monotonic() + timeout  # generous: CI has 2 cores and inlined BokehJS
    while time.monotonic() < end:
        value = driver.execute_script(script)
        if value:
            return value
        time.sleep(0.2)
    return driver.execute_script(script)


def test_report_renders_in_headless_chromium(browser, page, tmp_path_factory):
    path = tmp_path_factory.mktemp("report") / "bench.html"
    path.write_text(page, encoding="utf-8")
    browser.get(path.as_uri())
    assert browser.execute_script("return typeof window.Bokeh") == "object"
    n_roots = page.count("data-root-id")
    # Every plot root got its rendered bokeh element (class bk-Figure / bk-Column).
    rendered = _wait(browser, f"""
        const roots = [...document.querySelectorAll('[data-root-id]')];
        const done = roots.filter(e => e.firstElementChild &&
                                       /bk-/.test(e.firstElementChild.className));
        return done.length === {n_roots} && roots.length === {n_roots} ? done.length : 0;""")
    assert rendered == n_roots == 4  # spectrum, spectrogram, time, phase noise
    # BokehJS built a view for every root (its index also holds the document's own models).
    missing = _wait(browser, """
        const ids = [...document.querySelectorAll('[data-root-id]')].map(e => e.dataset.rootId);
        const have = Object.keys(Bokeh.index || {});
        const lost = ids.filter(i => !have.includes(i));
        return lost.length === 0 ? 'none' : '';""")
    assert missing == "none"
    # The description shows as text, and none of the injected scripts ran.
    assert browser.execute_script("return window.__qk_injected") is None
    body = browser.execute_script("return document.body.textContent")  # folds included
    assert "<script>window.__qk_injected = 1</script>" in body
    assert "board <C> rev 2" in body and "<img src=x onerror=alert(1)>" in body
    # Nothing fetched from the network: every resource is the file itself or inline.
    urls = browser.execute_script(
        "return performance.getEntriesByType('resource').map(e => e.name)")
    assert all(not u.startswith(("http:", "https:")) for u in urls), urls
    logs = browser.get_log("browser")
    severe = [e for e in logs if e["level"] == "SEVERE"]
    assert severe == [], severe
    assert not any("ERROR" in e["message"] and "Bokeh" in e["message"] for e in logs)
