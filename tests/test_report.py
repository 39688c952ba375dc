"""Tests of the report folder: contents, atomic replacement, escaping, a real browser."""

from __future__ import annotations

import base64
import json
import os
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402

import fitdyn  # noqa: E402
from fitdyn import plots, report  # noqa: E402
from fitdyn.errors import ReportError  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "data_demo"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
XSS = "<script>alert(1)</script>"


@pytest.fixture(scope="module")
def boot_fit():
    return fitdyn.fit(
        DEMO / "torsion_rig.csv", method="integral", bootstrap=200, seed=1, quiet=True
    )


@pytest.fixture(scope="module")
def report_dir(boot_fit, tmp_path_factory):
    folder = tmp_path_factory.mktemp("rep") / "torsion report"
    path = report.write_report(boot_fit, folder)
    assert path == folder / "index.html"
    return folder


def _images(html: str) -> list[str]:
    return re.findall(r'<img\s[^>]*src="([^"]*)"', html)


def test_folder_has_page_figures_json_and_csv(report_dir, boot_fit):
    names = sorted(p.name for p in report_dir.iterdir())
    expected = {"index.html", "result.json", "cleaned.csv", "fitdyn-manifest.json"}
    for kind in plots.KINDS:
        expected |= {f"figure-{kind}.png", f"figure-{kind}.svg"}
    assert set(names) == expected
    # the manifest lists every other file, so a later run may replace the folder
    listed = json.loads((report_dir / "fitdyn-manifest.json").read_text())["files"]
    assert set(listed) == expected - {"fitdyn-manifest.json"}
    for kind in plots.KINDS:
        assert (report_dir / f"figure-{kind}.png").read_bytes().startswith(PNG_MAGIC)
        root = ET.parse(report_dir / f"figure-{kind}.svg").getroot()
        assert root.tag.endswith("svg")
    data = json.loads((report_dir / "result.json").read_text())
    assert data["schema"] == "fitdyn/1"
    assert data["classification"]["label"] == boot_fit.label
    assert data["uncertainty"]["replicates"] == 200
    frame = pd.read_csv(report_dir / "cleaned.csv")
    assert len(frame) == boot_fit.recording.n_samples == 250
    assert "angle [rad]" in frame.columns


def test_page_is_self_contained(report_dir):
    html = (report_dir / "index.html").read_text(encoding="utf-8")
    # nothing that a browser could fetch from elsewhere
    assert not re.search(r"https?://", html)
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*//""", html)
    assert "@import" not in html and "@font-face" not in html
    assert not re.search(r"url\(\s*['\"]?(?!data:)", html)
    assert "<script" not in html
    assert "Content-Security-Policy" in html and "default-src 'none'" in html
    srcs = _images(html)
    assert len(srcs) == len(plots.KINDS)
    for src in srcs:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1]).startswith(PNG_MAGIC)
    # links point at files of the folder only
    for href in re.findall(r'href="([^"]*)"', html):
        assert (report_dir / href).is_file(), href


def test_page_shows_numbers_log_methods_and_cautions(report_dir, boot_fit):
    html = (report_dir / "index.html").read_text(encoding="utf-8")
    unc = boot_fit.uncertainty
    assert boot_fit.label in html
    # values rounded to two significant digits of their interval's width (common
    # practice, no source)
    mi = unc.intervals["matrix"]
    for (i, j), v in np.ndenumerate(boot_fit.matrix):
        lo, hi = mi[i][j]
        d = 1 - int(np.floor(np.log10(hi - lo)))
        assert f"{v:.{max(d, 0)}f}" in html
    lo, hi = unc.intervals["trace"]
    d = 1 - int(np.floor(np.log10(hi - lo)))
    assert f"[{lo:.{d}f}, {hi:.{d}f}]" in html
    assert f"P(stable) = {unc.p_stable:.2f}" in html
    # cleaning log counts
    log = boot_fit.recording.log
    assert re.search(rf"<th>Input rows</th><td class=\"num\">{log.input_rows}</td>", html)
    # methods paragraph: estimator, scheme, replicates, confidence, seed, version
    methods = html[html.index('id="methods"') :]
    assert "integral form" in methods.lower()
    assert "200 bootstrap replicates" in methods
    assert "moving-block bootstrap" in methods and "Künsch" in methods
    assert "random seed 1" in methods and "95 %" in methods
    assert f"fitdyn {fitdyn.__version__}" in methods
    assert "Ljung" in methods
    # cautions
    assert "linearisation" in html
    assert "large disturbances" in html
    assert "safety, health or compliance defer to local codes and licensed practice" in html


def test_methods_name_the_derivative_rule_and_no_uncertainty():
    rec = fitdyn.simulate(
        [[-0.5, 0.2], [0.1, -0.3]], [1.0, 0.0], [3.0, 2.0], np.linspace(0, 10, 101), seed=0
    )
    res = fitdyn.fit(rec, method="derivative", settings={"derivative": "savgol"}, bootstrap=0)
    paras, refs = report.methods_text(res)
    text = " ".join(paras)
    assert "Savitzky–Golay" in text and "Savitzky & Golay, 1964" in text
    assert any(r.startswith("Savitzky, A. & Golay") for r in refs)
    assert "No resampling" in text
    assert not any("Künsch" in r for r in refs)


def test_rerun_replaces_and_failure_keeps_the_old_folder(boot_fit, tmp_path, monkeypatch):
    folder = tmp_path / "out"
    report.write_report(boot_fit, folder, formats=("png",), kinds=("phase",))
    old = {p.name: p.read_bytes() for p in folder.iterdir()}
    assert "figure-phase.svg" not in old

    # success replaces the folder's content entirely
    report.write_report(boot_fit, folder, formats=("svg",), kinds=("eigen",))
    now = sorted(p.name for p in folder.iterdir())
    assert now == [
        "cleaned.csv",
        "figure-eigen.svg",
        "fitdyn-manifest.json",
        "index.html",
        "result.json",
    ]
    old = {p.name: p.read_bytes() for p in folder.iterdir()}

    # a failing figure leaves the previous report untouched and no temporary folder
    def broken(*args, **kwargs):
        raise RuntimeError("figure failed")

    monkeypatch.setitem(plots._DRAW, "tracedet", broken)
    with pytest.raises(RuntimeError, match="figure failed"):
        report.write_report(boot_fit, folder, kinds=("phase", "tracedet"))
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]
    # and on a fresh path nothing at all is left behind
    with pytest.raises(RuntimeError):
        report.write_report(boot_fit, tmp_path / "fresh", kinds=("tracedet",))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_a_folder_that_is_not_a_report_is_never_replaced(boot_fit, tmp_path):
    data = tmp_path / "my data"
    data.mkdir()
    (data / "run1.csv").write_text("t,a,b\n")
    with pytest.raises(ReportError, match=r"files fitdyn did not list as its own \(run1.csv"):
        report.write_report(boot_fit, data, kinds=("phase",))
    assert sorted(p.name for p in data.iterdir()) == ["run1.csv"]
    # an index.html that fitdyn did not write is not replaced either
    (data / "run1.csv").unlink()
    (data / "index.html").write_text("<html>my notes</html>")
    with pytest.raises(ReportError, match=r"did not list as its own \(index.html"):
        report.write_report(boot_fit, data, kinds=("phase",))
    assert (data / "index.html").read_text() == "<html>my notes</html>"
    # an empty folder is fine
    empty = tmp_path / "empty"
    empty.mkdir()
    assert report.write_report(boot_fit, empty, formats=(), kinds=("eigen",)).is_file()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty", "my data"]


def test_bad_arguments_raise_report_errors(boot_fit, tmp_path):
    with pytest.raises(ReportError, match="unknown figure format"):
        report.write_report(boot_fit, tmp_path / "a", formats=("gif",))
    with pytest.raises(ReportError, match="unknown figure kind"):
        report.write_report(boot_fit, tmp_path / "a", kinds=("pie",))
    (tmp_path / "file").write_text("x")
    with pytest.raises(ReportError, match="not a folder"):
        report.write_report(boot_fit, tmp_path / "file")
    assert not (tmp_path / "a").exists()


@pytest.fixture(scope="module")
def xss_dir(tmp_path_factory):
    """A report of a recording whose file, column, unit and trajectory names are markup."""
    import dataclasses

    d = tmp_path_factory.mktemp("xss")
    t = np.linspace(0, 12, 121)
    rec = fitdyn.simulate(
        [[-0.5, 0.2], [0.1, -0.3]],
        [1.0, 0.0],
        [[3.0, 2.0], [-1.0, 1.5]],
        t,
        measurement_noise=0.02,
        seed=4,
        channels=(XSS, "y"),
        units=("<i>mol</i>", "a&b"),
        time_unit="<u>s</u>",
    )
    source = "<b onmouseover=alert(3)>data.csv"
    rec = dataclasses.replace(
        rec,
        source=source,
        trajectory_names=("<img src=x onerror=alert(2)>", "b&b"),
        log=dataclasses.replace(rec.log, source=source, notes=("<em>note</em>",)),
    )
    res = fitdyn.fit(rec, method="integral", bootstrap=0)
    assert res.recording.channels[0] == XSS
    out = d / "report"
    report.write_report(res, out, kinds=("phase", "series"))
    return out


def test_user_strings_are_escaped(xss_dir):
    html = (xss_dir / "index.html").read_text(encoding="utf-8")
    assert XSS not in html
    assert "<script" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<img src=x" not in html and "&lt;img src=x onerror=alert(2)&gt;" in html
    assert "<i>mol</i>" not in html and "&lt;i&gt;mol&lt;/i&gt;" in html
    assert "<b onmouseover" not in html and "&lt;b onmouseover=alert(3)&gt;data.csv" in html
    assert "b&amp;b" in html and "a&amp;b" in html
    assert "<u>s</u>" not in html and "<em>note</em>" not in html
    # the SVG files carry the names as text too, escaped by matplotlib's writer
    for svg in xss_dir.glob("*.svg"):
        body = svg.read_text(encoding="utf-8")
        assert "<script" not in body
        ET.fromstring(body)  # still well-formed XML


# ----------------------------------------------------------------------------------
# a real browser
# ----------------------------------------------------------------------------------
_PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var fetched = performance.getEntriesByType('resource').map(function (e) { return e.name; });
  document.title = 'PROBE' + JSON.stringify({
    images: imgs.length,
    loaded: imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length,
    fetched: fetched,
    scripts: document.scripts.length
  });
});
</script>"""


def _chromium() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found:
        return found
    script = ROOT / ".ci" / "chromium.sh"
    if script.is_file() and hasattr(os, "geteuid") and os.geteuid() == 0:
        subprocess.run(["sh", str(script)], check=False, timeout=900)
        found = shutil.which("chromium") or shutil.which("chromium-browser")
        if found:
            return found
    pytest.skip(
        "headless Chromium is not installed and .ci/chromium.sh could not install it "
        "(Debian package 'chromium'); the browser rendering check did not run"
    )


def _probe(page: Path, tmp: Path) -> dict:
    """Open a copy of a page with the probe script in headless Chromium, offline."""
    html = page.read_text(encoding="utf-8")
    # the page's Content-Security-Policy forbids all scripts, the probe included; the
    # copy drops it so the probe runs and the page's own content is what is checked
    html = re.sub(r"<meta http-equiv=\"Content-Security-Policy\"[^>]*>", "", html)
    html = html.replace("</body>", _PROBE + "</body>")
    copy = page.with_name("probe-" + page.name)
    copy.write_text(html, encoding="utf-8")
    cmd = [
        _chromium(),
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-dev-shm-usage",
        f"--user-data-dir={tmp / 'profile'}",
        # no network: every host is unresolvable and the proxy is a closed port
        "--host-resolver-rules=MAP * ~NOTFOUND",
        "--proxy-server=127.0.0.1:9",
        "--proxy-bypass-list=<-loopback>",
        "--virtual-time-budget=15000",
        "--dump-dom",
        copy.as_uri(),
    ]
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    finally:
        copy.unlink()
    m = re.search(r"<title>PROBE(.*?)</title>", out.stdout, re.S)
    assert m, f"the probe did not run; chromium said: {out.stderr[-2000:]}"
    return json.loads(m.group(1).replace("&amp;", "&"))


def test_chromium_loads_every_image_and_fetches_nothing(report_dir, tmp_path):
    result = _probe(report_dir / "index.html", tmp_path)
    assert result["images"] == len(plots.KINDS)
    assert result["loaded"] == result["images"]
    assert result["fetched"] == []
    assert result["scripts"] == 1  # the probe itself


def test_chromium_probe_sees_a_fetch_and_a_broken_image(report_dir, tmp_path):
    # control: the same probe on a page that does reach out reports it
    bad = tmp_path / "bad" / "index.html"
    bad.parent.mkdir()
    html = (report_dir / "index.html").read_text(encoding="utf-8")
    bad.write_text(html.replace("<body>", '<body><img src="https://example.invalid/x.png">', 1))
    result = _probe(bad, tmp_path)
    assert result["images"] == len(plots.KINDS) + 1
    assert result["loaded"] == len(plots.KINDS)
    assert result["fetched"] == ["https://example.invalid/x.png"]


def test_chromium_keeps_markup_in_names_inert(xss_dir, tmp_path):
    result = _probe(xss_dir / "index.html", tmp_path)
    assert result["scripts"] == 1  # no script element came from the data
    assert result["loaded"] == result["images"] == 2


def test_one_point_estimate_is_named_and_the_bias_corrected_matrix_explained():
    # short record with process noise: the one-step fit is bias-corrected by default
    rec = fitdyn.simulate(
        [[-0.5, -1.0], [1.0, -0.5]], [0, 0], [1.0, 0.0], np.arange(80) * 0.1,
        process_noise=0.01, seed=2,
    )  # fmt: skip
    res = fitdyn.fit(rec, method="discrete", bootstrap=500, seed=1, quiet=True)
    unc = res.uncertainty
    assert unc.bias_corrected
    shown = "; ".join(", ".join(f"{v:.4g}" for v in row) for row in unc.point_matrix)
    rows = {r["name"]: r["value"] for r in report._summary_rows(res)}
    assert "Bias-corrected A" not in rows  # no second, unexplained matrix
    text = rows["Point estimate"]
    assert text.startswith("the fitted A (JSON 'matrix')")
    assert f"bias-corrected A = [{shown}]" in text and "shown only to explain" in text
    assert "bias-corrected A = [" in res.summary()
    # the JSON keeps both, at full precision
    d = res.to_dict()
    assert d["matrix"] == res.matrix.tolist()
    assert d["uncertainty"]["point_matrix"] == unc.point_matrix.tolist()
    # the methods paragraph says what the replicates support
    paras, _ = report.methods_text(res)
    assert "At the 95 % level the replicates support this class" in paras[1]
