import base64
import csv
import html
import io
import json
import re
import struct
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

import librosa
import numpy as np
import pytest

from audiodsm.errors import OutputError, ParameterError
from audiodsm.evaluate import plotting
from audiodsm.evaluate.grade import collect_profiles, grade_batch
from audiodsm.evaluate.report import (
    CSV_COLUMNS,
    REPORT_FILES,
    batch_to_csv,
    batch_to_dict,
    curve_to_csv,
    report_curves,
    write_report,
)
from audiodsm.spec import parse_spec

SPEC = """
name = "report sheet"
description = "made up for a test"

[[target]]
metric = "dynamic_range_db_a"
at_least = 112.0

[[target]]
metric = "thd_n_db"
at_level_dbfs = -20.0
at_most = -90.0
note = "a <note> & more"
"""


def full_curves(order):
    """Curves of every kind the battery gives, shaped as the battery shapes them."""
    f = np.linspace(0.0, 1.5e6, 2049)
    levels = np.array([0.0, -1.0, -20.0, -40.0, -60.0, -80.0, -100.0])
    offs = np.geomspace(1e-6, 1e-2, 4)
    edges = np.tile(np.linspace(-1.0, 1.0, 17), (order, 1))
    curves = {
        "spectrum": {
            "frequency_hz": f,
            "level_dbfs": -150.0 + 20.0 * np.log10(1.0 + f / 2e4),
            "ntf_gain_db": -100.0 + 0.0 * f,
        },
        "thd_n_vs_level": {
            "level_dbfs": levels,
            "thd_n_db": -95.0 - levels * 0.0 - order,
            "thd_n_db_a": -97.0 + 0.0 * levels,
        },
        "idle_tone_map": {
            "dc_offset": np.concatenate([-offs[::-1], offs]),
            "line_dbfs": np.array([np.nan, -140.0, np.nan, -150.0, np.nan, -145.0, np.nan, -139]),
            "detection_limit_dbfs": np.full(8, -155.0),
        },
        "state_histograms": {
            "edges": edges,
            "counts": np.ones((order, 16)),
            "state_bound": np.array([1e6]),
        },
        "frequency_response": {
            "frequency_hz": np.array([20.0, 997.0, 20000.0]),
            "gain_db": np.array([-0.01, 0.0, -0.05]),
        },
    }
    fa = np.linspace(0.0, 24000.0, 4097)
    curves["spectrum"]["density_dbfs_per_hz"] = -180.0 + 20.0 * np.log10(1.0 + f / 2e4)
    curves["spectrum"]["predicted_density_dbfs_per_hz"] = -181.0 + 20.0 * np.log10(1.0 + f / 2e4)
    curves["spectrum"]["out_of_band_hz"] = np.array([20000.0, 500000.0])
    curves["audio_spectrum"] = {
        "frequency_hz": fa,
        "density_dbfs_per_hz": np.full(fa.size, -170.0 - order),
        "predicted_density_dbfs_per_hz": np.where(fa <= 20000.0, -171.0 - order, np.nan),
        "resolution_hz": np.array([5.86]),
    }
    ft = np.array([20.0, 100.0, 997.0, 10000.0, 20000.0])
    curves["thd_n_vs_frequency"] = {
        "frequency_hz": ft,
        "level_dbfs": np.array([-1.0, -20.0]),
        "thd_n_db": np.array([-110.0 + 0.0 * ft - order, -95.0 + 0.0 * ft - order]),
        "invalid_reason": np.array([[""] * 5, [""] * 5]),
    }
    curves["idle_tone_map"]["line_hz"] = np.array(
        [np.nan, 1234.0, np.nan, 50.0, np.nan, 7000.0, np.nan, 15000.0]
    )
    sigma = np.array([1e-12, 1e-11, 1e-10])
    predicted = jitter_prediction(120.0 - order, -150.0, sigma)
    curves["dynamic_range_vs_jitter"] = {
        "sigma_s": sigma,
        "dynamic_range_db": predicted + 0.3,
        "dynamic_range_db_a": predicted + 2.3,
        "predicted_dynamic_range_db": predicted,
        "invalid_reason": np.array(["", "", ""]),
    }
    return curves


def jitter_prediction(dr0_db, jitter_1ps_dbfs, sigma_s):
    """The dynamic range with white jitter: the jitter-free noise (-dr0 dBFS) plus jitter noise
    that grows as 20 log10(sigma / 1 ps) (Schreier & Temes 2005, clock jitter of
    continuous-time DACs: noise power proportional to sigma^2), powers added."""
    jitter = jitter_1ps_dbfs + 20.0 * np.log10(np.asarray(sigma_s) / 1e-12)
    return -10.0 * np.log10(10.0 ** (-dr0_db / 10.0) + 10.0 ** (jitter / 10.0))


def report_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    order = profile.modulator.order
    if order == 7:
        raise ValueError("no luck")
    return SimpleNamespace(
        metrics={"dynamic_range_db_a": 100.0 + 3.0 * order, "idle_tone_max_dbfs": None},
        curves=full_curves(order),
        notes=("a note",),
    )


@pytest.fixture
def batch(tmp_path):
    pdir = tmp_path / "profiles"
    pdir.mkdir()
    for name, order in (("third", 3), ("fifth", 5), ("broken", 7)):
        (pdir / f"{name}.toml").write_text(f'name = "{name}"\n[modulator]\norder = {order}\n')
    return grade_batch(
        collect_profiles([pdir]), parse_spec(SPEC, path="sheet.toml"), battery=report_battery,
        jobs=1,
    )  # fmt: skip


def png_size(data: bytes):
    # PNG (ISO/IEC 15948:2004, also RFC 2083 sec. 3.1 and 4.1.1): an 8-byte signature, then
    # the IHDR chunk (length, type, width, height as big-endian 32-bit integers)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    length, kind, width, height = struct.unpack(">I4sII", data[8:24])
    assert kind == b"IHDR" and length == 13
    return width, height


def test_report_files_and_embedded_images(tmp_path, batch):
    out = tmp_path / "report"
    written = write_report(batch, out)
    assert {k: p.name for k, p in written.items()} == REPORT_FILES
    assert sorted(p.name for p in out.iterdir()) == sorted(REPORT_FILES.values())  # no leftovers
    page = (out / "grades.html").read_text()
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    # the overview chart, the plots of every profile together, then each profile's plots
    assert len(images) == 1 + len(plotting.OVERLAYS) + len(plotting.PLOTS) * 2
    for b64 in images:
        w, h = png_size(base64.b64decode(b64, validate=True))
        assert w >= 300 and h >= 150
    # self-contained: nothing fetched from anywhere
    assert not re.search(r'(src|href)="(https?:|//|file:)', page)
    assert "battery crashed: ValueError: no luck" in page
    assert "a &lt;note&gt; &amp; more" in page  # text is escaped
    assert page.index("fifth") < page.index("third")  # ranked


def test_plot_size_matches_the_figure():
    fig = plotting.plot_frequency_response(full_curves(3))
    from audiodsm.evaluate.report import figure_to_png

    w, h = png_size(figure_to_png(fig))
    # figure size in inches x 100 dpi (matplotlib savefig contract)
    assert (w, h) == tuple(int(round(v * 100)) for v in fig.get_size_inches())


def test_json_and_csv_carry_the_grades(tmp_path, batch):
    data = batch_to_dict(batch)
    json.dumps(data, allow_nan=False)  # strict JSON: no NaN or inf anywhere
    names = [p["name"] for p in data["profiles"]]
    assert names == ["fifth", "third", "broken"]
    fifth = data["profiles"][0]
    assert fifth["targets"][0]["margin"] == pytest.approx(115.0 - 112.0)
    assert fifth["targets"][1]["value"] == pytest.approx(-100.0)
    assert data["profiles"][2]["worst_margin"] is None  # -inf is not JSON
    rows = list(csv.reader(io.StringIO(batch_to_csv(batch))))
    assert tuple(rows[0]) == CSV_COLUMNS
    assert len(rows) == 1 + 3 * 2
    third_dr = next(r for r in rows[1:] if r[1] == "third" and r[3] == "dynamic_range_db_a")
    assert float(third_dr[CSV_COLUMNS.index("margin")]) == pytest.approx(109.0 - 112.0)
    assert third_dr[CSV_COLUMNS.index("passed")] == "fail"


def test_report_written_atomically(tmp_path, batch, monkeypatch):
    import audiodsm.evaluate.report as report

    # the page's content does not matter here, only how the files are written
    monkeypatch.setattr(report, "render_html", lambda b, title=None: "<p>page</p>")
    out = tmp_path / "report"
    write_report(batch, out)
    before = (out / "grades.html").read_bytes()

    real = report.os.replace

    def failing_replace(src, dst):
        if str(dst).endswith(".html"):
            raise OSError("disk full")
        return real(src, dst)

    monkeypatch.setattr(report.os, "replace", failing_replace)
    with pytest.raises(OSError, match="disk full"):
        write_report(batch, out)
    # the old page is intact and no half-written file is left behind
    assert (out / "grades.html").read_bytes() == before
    assert sorted(p.name for p in out.iterdir()) == sorted(REPORT_FILES.values())


def test_report_never_overwrites_an_input(tmp_path, batch):
    out = tmp_path / "report"
    out.mkdir()
    clash = out / "grades.json"
    clash.write_text("{}")
    with pytest.raises(OutputError, match="input"):
        write_report(batch, out, protect=[clash])
    assert clash.read_text() == "{}"
    afile = tmp_path / "plain"
    afile.write_text("x")
    with pytest.raises(OutputError, match="folder"):
        write_report(batch, afile)


def test_weighting_overlay_is_the_a_curve():
    curves = full_curves(2)
    out = report_curves(curves)
    assert "weighting_db" not in curves["spectrum"]  # input untouched
    f = curves["spectrum"]["frequency_hz"]
    w = out["spectrum"]["weighting_db"]
    sel = (f >= 10.0) & (f <= 100e3)
    # librosa.A_weighting implements the IEC 61672-1 analytic A-curve; both normalise to
    # 0 dB at 1 kHz within the standard's rounding of A1000 (-2.000 dB), so 0.01 dB covers it
    ref = librosa.A_weighting(f[sel], min_db=None)
    np.testing.assert_allclose(w[sel], ref, atol=0.01)
    assert w[0] == -120.0  # DC floored


def test_plots_refuse_missing_curves():
    with pytest.raises(ParameterError, match="spectrum"):
        plotting.plot_spectrum({})
    with pytest.raises(ParameterError, match="edges"):
        plotting.plot_state_histograms({"state_histograms": {"counts": np.ones(3)}})


def test_plots_draw_on_a_given_axes():
    from matplotlib.figure import Figure

    fig = Figure()
    axes = fig.subplots(1, len(plotting.PLOTS))
    for ax, (_name, fn, _cap) in zip(axes, plotting.PLOTS, strict=True):
        assert fn(full_curves(3), ax=ax) is fig
    # the data drawn is the data given (plots compute nothing)
    names = [name for name, _, _ in plotting.PLOTS]
    line = axes[names.index("frequency_response")].get_lines()[0]
    np.testing.assert_array_equal(line.get_xdata(), [20.0, 997.0, 20000.0])
    np.testing.assert_array_equal(line.get_ydata(), [-0.01, 0.0, -0.05])


def test_page_layout_ships_as_package_data_and_escapes_like_html_escape(batch):
    # the layout is a Jinja2 template kept in the package; text reaches the page escaped as
    # Python's html.escape(quote=True) escapes it (the standard library as the reference)
    from importlib.resources import files

    from audiodsm.evaluate.report import render_html

    folder = files("audiodsm.evaluate").joinpath("templates")
    assert folder.joinpath("report.html.j2").is_file()
    assert folder.joinpath("report.css").is_file()
    title = 'A "quoted" & <odd> title, isn\'t it'
    page = render_html(batch, title=title)
    assert f"<title>{html.escape(title, quote=True)}</title>" in page
    assert f"<h1>{html.escape(title, quote=True)}</h1>" in page


def test_importing_the_report_does_not_load_matplotlib():
    code = (
        "import sys, audiodsm.evaluate.report, audiodsm.evaluate.plotting, "
        "audiodsm.evaluate.grade; print('matplotlib' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_page_renders_in_headless_chromium(tmp_path, batch, browser):
    # the shared `browser` fixture (tests/conftest.py) skips with the reason when Chromium,
    # chromedriver or selenium is missing; CI installs them (.ci/run)
    out = tmp_path / "report"
    write_report(batch, out)
    shot = tmp_path / "shot.png"

    def viewport(height):
        # a fixed CSS-pixel viewport at scale 1, whatever the window's decorations; 1280 wide
        # is a common laptop screen
        browser.execute_cdp_cmd(
            "Emulation.setDeviceMetricsOverride",
            {"width": 1280, "height": height, "deviceScaleFactor": 1, "mobile": False},
        )

    viewport(2400)
    browser.get((out / "grades.html").as_uri())
    browser.execute_script("document.documentElement.style.overflow = 'hidden'")
    # usable on a laptop screen: nothing wider than the window
    assert browser.execute_script("return document.documentElement.scrollWidth") <= 1280
    height = int(browser.execute_script("return document.documentElement.scrollHeight"))
    assert height < 16000
    viewport(height)  # the whole page in one screenshot
    assert browser.save_screenshot(str(shot)), "Chromium wrote no screenshot"
    from matplotlib.image import imread

    img = imread(shot)
    assert img.shape[:2] == (height, 1280)
    # a rendered page, not a blank one: many distinct colours (tables, plots, text)
    flat = (img[..., :3] * 255).astype(np.uint8).reshape(-1, 3)
    assert len(np.unique(flat[::7], axis=0)) > 200
    # every plot is decoded and shown: its box lies on the page, and the screenshot holds
    # a drawn plot there (many colours: curves, text, grid), not an empty frame
    boxes = browser.execute_script(
        "return Array.from(document.querySelectorAll('figure img')).map(i => {"
        "const r = i.getBoundingClientRect(); return [i.complete && i.naturalWidth > 0,"
        " r.left, r.top + window.scrollY, r.width, r.height, i.alt]; })"
    )
    assert len(boxes) == 1 + len(plotting.OVERLAYS) + 2 * len(plotting.PLOTS)
    for ok, left, top, width, height_px, alt in boxes:
        assert ok, alt
        assert width >= 300 and height_px >= 150, alt
        x0, y0 = int(left), int(top)
        crop = (img[y0 : y0 + int(height_px), x0 : x0 + int(width), :3] * 255).astype(np.uint8)
        assert crop.shape[0] > 100 and crop.shape[1] > 200, alt
        assert len(np.unique(crop.reshape(-1, 3), axis=0)) > 30, alt
    Path(tmp_path / "keep").write_text(str(shot))


def invalid_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    out = report_battery(profile)
    out.metrics["dynamic_range_db_a"] = None
    out.invalid = {"dynamic_range_db_a": "loop overloaded (7 guard actions)"}
    sweep = out.curves["thd_n_vs_level"]
    sweep["thd_n_db"] = np.full(len(sweep["level_dbfs"]), -274.0)
    sweep["invalid_reason"] = np.array(["tone lost <here>"] * len(sweep["level_dbfs"]))
    return out


def test_invalid_readings_show_as_invalid_in_every_file(tmp_path):
    pdir = tmp_path / "profiles"
    pdir.mkdir()
    (pdir / "bad.toml").write_text('name = "bad"\n[modulator]\norder = 5\n')
    batch = grade_batch(
        collect_profiles([pdir]), parse_spec(SPEC, path="sheet.toml"), battery=invalid_battery,
        jobs=1,
    )  # fmt: skip
    written = write_report(batch, tmp_path / "report")
    data = json.loads(written["json"].read_text())
    (prof,) = data["profiles"]
    dr, thd = prof["targets"]
    assert dr["valid"] is False and dr["value"] is None and dr["passed"] is False
    assert dr["reason"] == "invalid: loop overloaded (7 guard actions)"
    assert thd["valid"] is False and thd["reason"] == "invalid: tone lost <here>"
    assert prof["validity"]["dynamic_range_db_a"] == {
        "valid": False,
        "reason": "loop overloaded (7 guard actions)",
    }
    assert prof["metrics"]["dynamic_range_db_a"] is None
    rows = list(csv.reader(io.StringIO(written["csv"].read_text())))
    assert [r[CSV_COLUMNS.index("valid")] for r in rows[1:]] == ["no", "no"]
    page = written["html"].read_text()
    assert "invalid <small>(loop overloaded (7 guard actions))</small>" in page
    assert "invalid: tone lost &lt;here&gt;" in page  # escaped like every other text
    assert "-274" not in page  # the invalid THD+N never shows as a number


def _graded_line(metric, limit, value, *, bound="at_most", level=None):
    from audiodsm.evaluate.grade import TargetGrade
    from audiodsm.spec import Target

    t = Target(metric=metric, bound=bound, limit=limit, at_level_dbfs=level)
    margin = limit - value if bound == "at_most" else value - limit
    return TargetGrade(target=t, value=value, margin=margin, passed=margin >= 0)


WORST_1 = "thd_n_db_worst_over_frequency_at_minus1_dbfs"


def test_limits_are_drawn_with_the_verdict_in_words_and_shape():
    curves = full_curves(3)
    passing = _graded_line("thd_n_db", -90.0, -98.0, level=-20.0)
    failing = _graded_line("thd_n_db_at_minus1_dbfs", -120.0, -98.0)
    fig = plotting.plot_thd_n_vs_level(curves, graded=[passing, failing])
    ax = fig.axes[0]
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "limit at -20 dBFS <= -90 dB: pass" in labels
    assert "limit at -1 dBFS <= -120 dB: FAIL" in labels
    # the reading is marked at its level: a circle for the pass, a cross for the fail
    marks = {
        (ln.get_xdata()[0], ln.get_marker()) for ln in ax.get_lines() if len(ln.get_xdata()) == 1
    }
    assert marks == {(-20.0, "o"), (-1.0, "X")}
    # every graded plot draws its limit, whatever the quantity
    cases = [
        (plotting.plot_thd_n_vs_frequency, WORST_1, -100.0, -113.0),
        (plotting.plot_idle_tone_map, "idle_tone_max_dbfs", -150.0, -139.0),
        (plotting.plot_noise_density, "out_of_band_noise_dbfs", -40.0, -45.0),
        (plotting.plot_audio_band_density, "dynamic_range_db", 110.0, 112.0),
        (plotting.plot_frequency_response, "passband_ripple_db", 0.1, 0.05),
        (plotting.plot_state_histograms, "state_peak_max", 1.5, 1.0),
        (plotting.plot_dynamic_range_vs_jitter, "jitter_dynamic_range_db_at_10ps", 112.0, 117.0),
    ]  # fmt: skip
    for fn, metric, limit, value in cases:
        bound = "at_least" if "dynamic_range" in metric else "at_most"
        g = _graded_line(metric, limit, value, bound=bound)
        fig = fn(curves, graded=[g])
        texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
        word = "pass" if g.passed else "FAIL"
        assert any(t.endswith(": " + word) and f"{limit:g}" in t for t in texts), (metric, texts)


def test_idle_tone_map_names_the_worst_lines_and_keeps_them_above_the_limit():
    curves = full_curves(3)
    # a stored band-wide limit above a found line (-150 dBFS at one offset)
    curves["idle_tone_map"]["detection_limit_dbfs"] = np.full(8, -148.0)
    fig = plotting.plot_idle_tone_map(curves)
    ax = fig.axes[0]
    notes = {t.get_text() for t in ax.texts}
    # the three strongest lines (-139, -140, -145 dBFS) carry their frequencies
    assert notes == {"15000 Hz", "1234 Hz", "7000 Hz"}
    dotted = [ln for ln in ax.get_lines() if ln.get_linestyle() == ":"]
    found = [ln for ln in ax.get_lines() if ln.get_marker() in ("^", "v")]
    for lim, pts in zip(dotted, found, strict=True):
        y_lim, y_pts = np.asarray(lim.get_ydata()), np.asarray(pts.get_ydata())
        ok = np.isfinite(y_pts)
        assert np.all(y_pts[ok] >= y_lim[ok])


def test_overlays_keep_each_profile_in_its_colour_and_offer_the_data(tmp_path, batch):
    out = tmp_path / "report"
    page = write_report(batch, out)["html"].read_text()
    # overview swatches: one colour-blind-safe colour per profile, in rank order; the
    # Okabe & Ito (2008) palette's blue and vermillion come first
    swatches = re.findall(r'class="swatch" style="background: (#[0-9A-Fa-f]{6})"', page)
    assert swatches[:2] == ["#0072B2", "#D55E00"]
    assert [plotting.series_style(i)["color"] for i in range(3)] == swatches
    # the overview links to every overlay plot, and every plot has its data beside it
    for kind, _caption in plotting.OVERLAYS:
        assert f'href="#overlay-{kind}"' in page and f'id="overlay-{kind}"' in page
    links = re.findall(
        r'download="([^"]+)" href="data:text/csv;charset=utf-8;base64,([^"]+)"', page
    )
    assert len(links) == len(plotting.OVERLAYS) + 2 * len(plotting.PLOTS)
    files = {name: base64.b64decode(b64).decode("utf-8") for name, b64 in links}
    rows = list(csv.reader(io.StringIO(files["fifth-thd_n_vs_frequency.csv"])))
    assert rows[0][:2] == ["frequency_hz", "thd_n_db_at_-1_dbfs"]
    f = full_curves(5)["thd_n_vs_frequency"]
    np.testing.assert_allclose([float(r[0]) for r in rows[1:]], f["frequency_hz"])
    np.testing.assert_allclose([float(r[1]) for r in rows[1:]], f["thd_n_db"][0])
    both = list(csv.DictReader(io.StringIO(files["every-profile-thd_n_vs_level.csv"])))
    assert {r["profile"] for r in both} == {"fifth", "third"}
    third = [float(r["thd_n_db"]) for r in both if r["profile"] == "third"]
    np.testing.assert_allclose(third, full_curves(3)["thd_n_vs_level"]["thd_n_db"])
    # the overlay draws the profiles in the same colours
    fig = plotting.plot_overlay(
        "thd_n_vs_level", [("fifth", full_curves(5), 0), ("third", full_curves(3), 1)]
    )
    assert [ln.get_color() for ln in fig.axes[0].get_lines()] == swatches[:2]


def test_csv_numbers_are_rounded_by_their_kind():
    # levels and gains to 0.01 dB, frequencies to 1 mHz, whole numbers as integers, others to
    # six significant digits (Python's format mini-language is the reference)
    curves = {
        "x": {
            "frequency_hz": np.array([5.859375, 1536000.0, 93.75]),
            "level_dbfs": np.array([-94.29659354163948, -0.0012, np.nan]),
            "count": np.array([2.0, 1234567.0, 0.000123456789]),
        }
    }
    rows = list(csv.reader(io.StringIO(curve_to_csv(curves, "x"))))
    assert rows[0] == ["frequency_hz", "level_dbfs", "count"]
    assert rows[1:] == [
        ["5.859", "-94.30", "2"],
        ["1536000", "0", "1234567"],
        ["93.75", "", format(0.000123456789, ".6g")],
    ]


def test_wide_spectrum_csv_is_thinned_above_the_audio_band_keeping_the_power():
    # Above 24 kHz the bins are averaged in power over 1/96-octave bands: the power of the
    # rows times their bin counts adds up to the power of all bins (the sum is the same sum,
    # regrouped), and every bin up to 24 kHz stays as it was.
    from audiodsm.evaluate.report import _thinned_wide_spectrum

    f = np.arange(16385) * 93.75  # a 3.072 MHz modulator's spectrum in 93.75 Hz bins
    rng = np.random.default_rng(2)
    level = -120.0 + 40.0 * np.log10(1.0 + f / 2e4) + rng.normal(0.0, 3.0, f.size)
    c = {"frequency_hz": f, "level_dbfs": level, "resolution_hz": np.array([93.75])}
    thin = _thinned_wide_spectrum(c)
    n = thin["bins_averaged"]
    assert n.sum() == f.size and thin["frequency_hz"].size < 1000
    low = f <= 24000.0
    assert np.array_equal(thin["level_dbfs"][: low.sum()], level[low])
    assert np.all(n[: low.sum()] == 1)
    total = np.sum(10.0 ** (thin["level_dbfs"] / 10.0) * n)
    assert total == pytest.approx(np.sum(10.0 ** (level / 10.0)), rel=1e-12)
    # bands are at most 1/96 octave wide (one bin where a band is narrower than a bin)
    hi = thin["frequency_hz"][low.sum() :]
    assert np.all(np.diff(np.log2(hi)) <= 2.0 / 96.0 + 1e-12)
    assert thin["resolution_hz"][0] == 93.75


def test_two_profile_page_with_full_size_spectra_stays_lean(tmp_path):
    # A two-profile page with spectra of the battery's real length (whole band at 3.072 MHz in
    # 93.75 Hz bins, audio band in 5.86 Hz bins) was about 7 MB, mostly CSV data; the target
    # is under 2 MB with every plot's data still beside it.
    def big_curves(order):
        curves = full_curves(order)
        f = np.arange(16385) * 93.75
        curves["spectrum"] = {
            "frequency_hz": f,
            "level_dbfs": -150.0 + 20.0 * np.log10(1.0 + f / 2e4) + np.sin(f),
            "density_dbfs_per_hz": -170.0 + 20.0 * np.log10(1.0 + f / 2e4) + np.cos(f),
            "predicted_density_dbfs_per_hz": -171.0 + 20.0 * np.log10(1.0 + f / 2e4),
            "ntf_gain_db": -100.0 + 20.0 * np.log10(1.0 + f / 2e4),
            "out_of_band_hz": np.array([20000.0, 500000.0]),
        }
        fa = np.arange(4097) * 5.859375
        curves["audio_spectrum"] = {
            "frequency_hz": fa,
            "level_dbfs": -160.0 + np.sin(fa / 7.0),
            "density_dbfs_per_hz": -170.0 + np.sin(fa / 7.0),
            "predicted_density_dbfs_per_hz": np.where(fa <= 20000.0, -171.0, np.nan),
            "resolution_hz": np.array([5.86]),
        }
        return curves

    def battery(profile, **options):
        return SimpleNamespace(
            metrics={"dynamic_range_db_a": 110.0}, curves=big_curves(5), notes=("a note",)
        )

    pdir = tmp_path / "profiles"
    pdir.mkdir()
    for name in ("third", "fifth"):
        (pdir / f"{name}.toml").write_text(f'name = "{name}"\n[modulator]\norder = 5\n')
    batch = grade_batch(
        collect_profiles([pdir]), parse_spec(SPEC, path="sheet.toml"), battery=battery, jobs=1
    )
    page = write_report(batch, tmp_path / "r")["html"].read_text()
    links = re.findall(
        r'download="([^"]+)" href="data:text/csv;charset=utf-8;base64,([^"]+)"', page
    )
    files = {name: base64.b64decode(b64).decode("utf-8") for name, b64 in links}
    wide = list(csv.DictReader(io.StringIO(files["fifth-spectrum.csv"])))
    assert 256 < len(wide) < 1000 and max(int(r["bins_averaged"]) for r in wide) > 50
    audio = list(csv.DictReader(io.StringIO(files["fifth-audio_spectrum.csv"])))
    assert len(audio) == 4097  # the audio band keeps its fine bins
    overlay = list(csv.DictReader(io.StringIO(files["every-profile-noise_density.csv"])))
    assert len(overlay) == 2 * (4097 // 8)  # as drawn: power means of 8 bins
    assert len(page.encode("utf-8")) < 2_000_000, len(page)


def _no_reading(metric, limit, *, bound="at_least"):
    from dataclasses import replace

    return replace(_graded_line(metric, limit, limit, bound=bound), value=None, margin=None,
                   passed=False)  # fmt: skip


def _at_10ps(limit, curves):
    """A ``jitter_dynamic_range_db_at_10ps`` target graded on the curve's 10 ps reading."""
    value = float(curves["dynamic_range_vs_jitter"]["dynamic_range_db"][1])
    return _graded_line("jitter_dynamic_range_db_at_10ps", limit, value, bound="at_least")


def test_jitter_plot_shows_the_readings_beside_the_textbook_prediction_and_the_limits():
    curves = full_curves(3)
    c = curves["dynamic_range_vs_jitter"]
    c["dynamic_range_db"][2] = np.nan
    c["invalid_reason"] = np.array(["", "", "the -60 dBFS tone was lost"])
    passing = _at_10ps(112.0, curves)
    failing = _no_reading("jitter_dynamic_range_db_at_100ps", 100.0)
    fig = plotting.plot_dynamic_range_vs_jitter(curves, graded=[passing, failing])
    ax = fig.axes[0]
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    # drawn in ps as given (the plot computes nothing)
    sim = lines["simulated, unweighted"]
    np.testing.assert_allclose(sim.get_xdata(), [1.0, 10.0, 100.0])
    np.testing.assert_array_equal(sim.get_ydata(), c["dynamic_range_db"])
    # the prediction drawn is the textbook one: jitter noise 20 log10(sigma / 1 ps) above its
    # 1 ps value, added in power to the jitter-free noise (Schreier & Temes 2005)
    pred = next(ln for k, ln in lines.items() if k.startswith("predicted"))
    np.testing.assert_allclose(
        pred.get_ydata(), jitter_prediction(117.0, -150.0, [1e-12, 1e-11, 1e-10]), atol=1e-9
    )
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "limit at 10 ps >= 112 dB: pass" in labels
    assert "limit at 100 ps >= 100 dB: FAIL (no valid reading)" in labels
    assert "100 ps: no reading (the -60 dBFS tone was lost)" in labels
    marks = {
        (ln.get_xdata()[0], ln.get_marker()) for ln in ax.get_lines() if len(ln.get_xdata()) == 1
    }
    assert marks == {(10.0, "o")}  # the pass as a circle; the fail has no point to mark
    assert [t.get_text() for t in ax.get_xticklabels()] == ["1", "10", "100"]


def test_jitter_overlay_draws_the_shared_limit_once_and_each_verdict_in_its_colour(tmp_path):
    third, fifth = full_curves(3), full_curves(5)
    lim = 116.0  # third (117.0 at 10 ps) meets it, fifth (115.0) misses it
    graded = [
        [_at_10ps(lim, third)],
        [_at_10ps(lim, fifth), _no_reading("jitter_dynamic_range_db_at_100ps", 100.0)],
    ]
    fig = plotting.plot_overlay(
        "dynamic_range_vs_jitter", [("third", third, 0), ("fifth", fifth, 1)], graded=graded
    )
    ax = fig.axes[0]
    colours = [plotting.series_style(i)["color"] for i in range(2)]
    drawn = [ln for ln in ax.get_lines() if ln.get_label() in ("third", "fifth")]
    assert [ln.get_color() for ln in drawn] == colours
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels.count("limit at 10 ps >= 116 dB") == 1  # shared: once, without a verdict
    assert "fifth: no valid reading (limit at 100 ps >= 100 dB)" in labels
    assert labels.index("fifth") < labels.index("limit at 10 ps >= 116 dB")
    marks = {
        (ln.get_marker(), ln.get_color())
        for ln in ax.get_lines()
        if len(ln.get_xdata()) == 1 and ln.get_xdata()[0] == 10.0
    }
    assert marks == {("o", colours[0]), ("X", colours[1])}  # shape says the verdict
    with pytest.raises(ParameterError, match="graded"):
        plotting.plot_overlay("dynamic_range_vs_jitter", [("third", third, 0)], graded=[])


def test_jitter_overlay_data_sits_beside_it_on_the_page(tmp_path, batch):
    page = write_report(batch, tmp_path / "r")["html"].read_text()
    assert 'href="#overlay-dynamic_range_vs_jitter"' in page
    links = re.findall(
        r'download="([^"]+)" href="data:text/csv;charset=utf-8;base64,([^"]+)"', page
    )
    files = {name: base64.b64decode(b64).decode("utf-8") for name, b64 in links}
    table = files["every-profile-dynamic_range_vs_jitter.csv"]
    rows = list(csv.DictReader(io.StringIO(table)))
    # what the plot draws: the unweighted readings (and why a point is missing)
    assert table.splitlines()[0] == "profile,sigma_s,dynamic_range_db,invalid_reason"
    for name, order in (("third", 3), ("fifth", 5)):
        mine = [r for r in rows if r["profile"] == name]
        want = full_curves(order)["dynamic_range_vs_jitter"]
        np.testing.assert_allclose([float(r["sigma_s"]) for r in mine], want["sigma_s"])
        np.testing.assert_allclose(
            [float(r["dynamic_range_db"]) for r in mine], want["dynamic_range_db"], atol=0.005
        )
    # and each profile's own plot has its data too
    assert "fifth-dynamic_range_vs_jitter.csv" in files


def test_single_bit_prediction_states_its_limit_in_the_legend():
    # the sign quantizer's error is not white (docs/report.md): the legend must say the
    # prediction is an upper bound for a single-bit loop, and not say so for a multi-level one
    curves = full_curves(3)
    for gain, bound in ((1.0, False), (1.87, True)):
        for name in ("spectrum", "audio_spectrum"):
            curves[name]["predicted_quantizer_gain"] = np.array([gain])
        for fn in (plotting.plot_noise_density, plotting.plot_audio_band_density):
            texts = [t.get_text() for t in fn(curves).axes[0].get_legend().get_texts()]
            said = any("upper bound" in t and "not white" in t for t in texts)
            assert said is bound, (gain, texts)
