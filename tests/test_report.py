"""The HTML report: self-contained, escaped, tables as CSV, atomic; renders in Chromium."""

import base64
import csv
import os
import re
import shutil
import subprocess

import numpy as np
import pytest
from matplotlib.figure import Figure

from attractorfit import plots as P
from attractorfit._output import format_float
from attractorfit.errors import InputError
from attractorfit.report import (MODEL_NOT_BRAIN, FigureBlock, Section, TableBlock, Verdict,
                                 _width_inches, build_report)

HOSTILE = "<script>alert('x')</script>&\"u1\""


def _small_figure():
    fig = Figure(figsize=(3.5, 2.0))
    ax = fig.add_subplot()
    ax.plot([0, 1], [0, 1])
    ax.set_xlabel("time (s)")
    return fig


@pytest.fixture(scope="module")
def figure_files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("figs")
    fig = P.occupancy_bars([0.5, 0.3, 0.2], [0.45, 0.35, 0.2], state_labels=["LL", "HL", HOSTILE])
    png, svg = P.save_figure(fig, folder, "occupancy", dpi=60)
    return png, svg


def _build(path, figure_files, **kw):
    png, svg = figure_files
    sections = [
        Section("States " + HOSTILE, [
            "Paragraph one.\n\nParagraph two " + HOSTILE,
            FigureBlock(png, caption="Occupancy " + HOSTILE, name=HOSTILE),
            FigureBlock(svg, caption="Same figure as SVG"),
            FigureBlock(_small_figure(), caption="A figure object", dpi=50),
            TableBlock("state_summary", ["state", "vertex", "occupancy"],
                       [[0, "LL", 0.5], [1, HOSTILE, 1 / 3], [2, "LH", float("nan")]],
                       caption="States"),
            Verdict("Inline verdict", "consistent", None, "Fine.", {}),
        ]),
        Section("States " + HOSTILE, ["Same title twice gets its own anchor."]),
    ]
    args = dict(
        title="Report " + HOSTILE,
        summary={"recording": {"units": 12, "trials": 40}, "discreteness p": 0.0123456,
                 "rate R2": float("nan"), HOSTILE: "text"},
        sections=sections,
        verdicts=[Verdict("Discreteness", "not_discrete", 0.31,
                          "Delay activity is described as well by a continuous latent.",
                          {"bin size": "20 ms", "null": "continuous latent + PSTHs + drift",
                           "number of states": "4 (held-out likelihood), rechosen per replicate"},
                          {"statistic": 1.5})],
        methods="Spikes were binned at 20 ms.\n\nUnit " + HOSTILE + " was kept.",
        cautions=["W = E D ignores Dale's law.", "A multi-unit is not a single cell."],
        versions={"attractorfit": "0.1.0", "numpy": np.__version__},
        input_hash="sha256:" + "0" * 64,
        tables={"unit_rates": (["unit", "rate (Hz)"], [[HOSTILE, 3.25], ["u2", None]])},
    )
    args.update(kw)
    return build_report(path, **args)


def test_report_is_self_contained_and_escaped(tmp_path, figure_files):
    files = _build(tmp_path / "run" / "report.html", figure_files)
    with open(files.html, encoding="utf-8") as fh:
        page = fh.read()
    # no outside resources: every src is a data URI, no scripts, no remote URLs
    assert "http://" not in page and "https://" not in page
    assert 'src="/' not in page and "url(" not in page and "@import" not in page
    srcs = re.findall(r'\ssrc="([^"]*)"', page)
    assert len(srcs) == 3 and all(s.startswith("data:image/") for s in srcs)
    assert all(h.startswith("#") for h in re.findall(r'\shref="([^"]*)"', page))
    assert "<script" not in page.lower()
    assert "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt;&amp;&quot;u1&quot;" in page
    # the embedded PNG is the saved file, byte for byte
    png_uri = srcs[0]
    with open(figure_files[0], "rb") as fh:
        assert base64.b64decode(png_uri.split(",", 1)[1]) == fh.read()
    # every table-of-contents link points at an element of the page
    for target in re.findall(r'href="#([^"]+)"', page):
        assert f'id="{target}"' in page
    assert len(set(re.findall(r'\sid="([^"]+)"', page))) == len(re.findall(r'\sid="', page))
    # verdict with its assumptions and the model-not-brain caution
    assert "not discrete" in page and "p = 0.31" in page and "20 ms" in page
    assert page.count(MODEL_NOT_BRAIN) == 3  # cautions list + the two verdicts
    assert "Dale&#x27;s law" in page and "sha256:" + "0" * 64 in page
    assert "0.01235" in page and "n/a" in page  # 4 significant digits; NaN shown as n/a
    assert "@media print" in page


def test_report_caution_count_without_model_caution(tmp_path, figure_files):
    files = _build(tmp_path / "report.html", figure_files,
                   cautions=["Results are evidence, not proof about a brain."], verdicts=[])
    with open(files.html, encoding="utf-8") as fh:
        page = fh.read()
    # a caution already saying "not proof": the default one is not added to the list;
    # the inline verdict still carries it
    assert page.count(MODEL_NOT_BRAIN) == 1


def test_tables_written_as_csv(tmp_path, figure_files):
    files = _build(tmp_path / "report.html", figure_files, tables_dir=tmp_path / "t")
    assert sorted(os.path.basename(p) for p in files.tables) == ["state_summary.csv",
                                                                "unit_rates.csv"]
    with open(tmp_path / "t" / "state_summary.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["state", "vertex", "occupancy"]
    assert rows[2] == ["1", HOSTILE, format_float(1 / 3)] and rows[2][2] == "0.3333333333"
    assert rows[3][2] == ""  # non-finite -> empty cell
    with open(tmp_path / "t" / "unit_rates.csv", newline="", encoding="utf-8") as fh:
        assert list(csv.reader(fh))[1] == [HOSTILE, "3.25"]


def test_report_is_atomic_and_deterministic(tmp_path, figure_files):
    a = _build(tmp_path / "a" / "report.html", figure_files)
    b = _build(tmp_path / "b" / "report.html", figure_files)
    with open(a.html, "rb") as fa, open(b.html, "rb") as fb:
        assert fa.read() == fb.read()
    leftovers = [f for _, _, fs in os.walk(tmp_path) for f in fs if f.endswith(".part")]
    assert leftovers == []
    # a failure part-way leaves no report and no temporary file behind
    bad = tmp_path / "c" / "report.html"
    with pytest.raises(InputError, match="section block"):
        _build(bad, figure_files, sections=[Section("x", [FigureBlock(figure_files[0]), 42])])
    assert not bad.exists()
    assert not (tmp_path / "c").exists() or not os.listdir(tmp_path / "c")


def test_display_width_from_file_metadata(tmp_path):
    # The figure's physical width (7.0 in) is recovered from the PNG pHYs chunk and
    # from the SVG width in points (72 pt per inch).
    fig = P.occupancy_bars([0.5, 0.5, 0, 0, 0])
    assert fig.get_size_inches()[0] == pytest.approx(7.0)
    png, svg = P.save_figure(fig, tmp_path, "f", dpi=80)
    for path, mime in ((png, "image/png"), (svg, "image/svg+xml")):
        with open(path, "rb") as fh:
            assert _width_inches(fh.read(), mime) == pytest.approx(7.0, abs=0.02)


@pytest.mark.parametrize("kw, match", [
    (dict(sections=[Section("x", [FigureBlock(b"GIF89a")])]), "neither PNG nor SVG"),
    (dict(sections=[Section("x", [FigureBlock("/nonexistent/fig.png")])]), "cannot be read"),
    (dict(sections=[Section("x", [FigureBlock(__file__)])]), "expected a PNG or SVG"),
    (dict(sections=[Section("x", [FigureBlock(3.5)])]), "expected a matplotlib Figure"),
    (dict(tables={"../up": (["a"], [[1]])}), "table name"),
    (dict(tables={"t": (["a", "b"], [[1]])}), r"table 't' row 0: expected 2"),
    (dict(verdicts=["discrete"]), "expected Verdict objects"),
    (dict(sections=[Section("x", [None])]), "section block"),
    (dict(summary=[1, 2]), "summary: expected a dict"),
    (dict(sections=["text"]), "expected Section objects"),
    (dict(tables=[("t", [], [])]), "tables: expected a dict"),
    (dict(tables={"t": ["a"]}), r"tables\['t'\]: expected \(header, rows\)"),
    (dict(tables={"state_summary": (["a"], [[1]])}),
     "'state_summary' is used by more than one"),
])
def test_bad_report_input_raises(tmp_path, figure_files, kw, match):
    with pytest.raises(InputError, match=match):
        _build(tmp_path / "report.html", figure_files, **kw)
    assert not (tmp_path / "report.html").exists()


def _chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return "/usr/bin/chromium" if os.path.exists("/usr/bin/chromium") else None


_PROBE = ("<script>window.addEventListener('load',function(){var im=document.images,ok=0;"
          "for(var i=0;i<im.length;i++){if(im[i].complete&&im[i].naturalWidth>0)ok++;}"
          "var d=document.createElement('div');d.id='image-probe';"
          "d.textContent='loaded '+ok+' of '+im.length;document.body.appendChild(d);});"
          "</script>")


def test_report_renders_in_headless_chromium(tmp_path, figure_files):
    browser = _chromium()
    if browser is None:  # .ci/run installs Debian's chromium where apt-get works
        pytest.skip("no chromium binary found")
    files = _build(tmp_path / "run" / "report.html", figure_files)
    with open(files.html, encoding="utf-8") as fh:
        page = fh.read()
    # test copy only: a probe script, and one deliberately broken image (negative control:
    # the probe must be able to see a figure that did not load)
    broken = '<img src="data:image/png;base64,AAAA" alt="broken">'
    copy = tmp_path / "probe.html"
    copy.write_text(page.replace("</body>", broken + _PROBE + "</body>"), encoding="utf-8")
    profile = tmp_path / "profile"
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", "--disable-dev-shm-usage", f"--user-data-dir={profile}",
           "--virtual-time-budget=5000", "--dump-dom", copy.as_uri()]
    out = subprocess.run(cmd, capture_output=True, text=True, timeout=120,
                         stdin=subprocess.DEVNULL)
    m = re.search(r'id="image-probe">loaded (\d+) of (\d+)<', out.stdout)
    assert m, f"probe not found; chromium exit {out.returncode}: {out.stderr[-2000:]}"
    loaded, total = int(m.group(1)), int(m.group(2))
    assert total == 4  # PNG file, SVG file, Figure object, broken control
    assert loaded == 3, "a figure of the report did not load in the browser"
