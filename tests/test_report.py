"""`calib report` and the factor-set figures, on the shared demo run (conftest.demo_run).

The browser test opens the demo's report in Debian's chromium (installed by .ci/run) and is
skipped, with the reason printed, where chromium is absent.
"""

from __future__ import annotations

import base64
import html
import io
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calib import plots
from calib.cli import main
from calib.report import SECTIONS, calibration_design, write_report

ROOT = Path(__file__).resolve().parent.parent
ARTIFACTS = ROOT / "test-artifacts"


# ----------------------------------------------------------------------------- helpers


class _Page(HTMLParser):
    """Headings, image sources and any external references of an HTML page."""

    def __init__(self):
        super().__init__()
        self.h2: list[str] = []
        self.images: list[dict] = []
        self.external: list[str] = []
        self.tags: list[str] = []
        self._in_h2 = False
        self.attrs_of: dict[str, dict] = {}

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        self.attrs_of.setdefault(tag, a)
        if tag == "h2":
            self._in_h2 = True
            self.h2.append("")
        if tag == "img":
            self.images.append(a)
        for key in ("src", "href"):
            value = a.get(key) or ""
            if value and not value.startswith(("data:", "#")):
                self.external.append(f"{tag} {key}={value}")

    def handle_endtag(self, tag):
        if tag == "h2":
            self._in_h2 = False

    def handle_data(self, data):
        if self._in_h2:
            self.h2[-1] += data


def parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    return page


def png_pixels(data: bytes) -> np.ndarray:
    """RGB pixels of PNG bytes (0-255)."""
    import matplotlib.image as mpimg

    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pixels = mpimg.imread(io.BytesIO(data), format="png")
    return np.round(pixels[..., :3] * 255).astype(int)


def assert_drawn(data: bytes, min_ink: float = 0.01) -> np.ndarray:
    """A figure that holds something: not blank, several colours, some share of non-white pixels."""
    px = png_pixels(data)
    assert px.shape[0] > 100 and px.shape[1] > 100
    ink = (px < 245).any(axis=2).mean()
    assert ink > min_ink, f"only {ink:.3%} of the pixels are not white"
    sample = px[::3, ::3].reshape(-1, 3)  # a thinned grid is enough to count colours
    assert len(np.unique(sample[:, 0] * 65536 + sample[:, 1] * 256 + sample[:, 2])) > 10
    return px


def has_colour(px: np.ndarray, hex_colour: str) -> bool:
    rgb = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)])
    return bool((np.abs(px - rgb).max(axis=2) <= 2).any())


@pytest.fixture(scope="module")
def demo_results(demo_run):
    out = demo_run["out"]
    factors = pd.read_csv(out / "factors" / "factors.csv")
    checks = pd.read_csv(out / "factors" / "checks.csv")
    manifest = json.loads((out / "factors" / "manifest.json").read_text())
    return {"factors": factors, "checks": checks, "manifest": manifest, **demo_run}


# ----------------------------------------------------------------------------- figures


def test_forest_plot_shows_every_status_in_its_colour(demo_results):
    table = demo_results["factors"]
    px = assert_drawn(plots.figure_png(plots.plot_forest(table, reference="otter_trawl_new")))
    for status in table["status"].unique():  # markers are drawn solid in the status colour
        assert has_colour(px, plots.STATUS_COLOURS[status]), status


def test_convergence_and_ppc_figures_draw_the_demo_checks(demo_results):
    rules = demo_results["manifest"]["status_rules"]
    assert_drawn(plots.figure_png(plots.plot_convergence(demo_results["factors"], rules=rules)))
    px = assert_drawn(plots.figure_png(plots.plot_ppc(demo_results["checks"], rules=rules)))
    colours = plots.categorical_colours(sorted(demo_results["checks"]["gear"].unique()))
    for colour in colours.values():
        assert has_colour(px, colour)


def test_gear_network_from_the_demo_design(demo_results):
    summary, note = calibration_design(demo_results["manifest"])
    assert summary is not None, note
    combos = {" + ".join(c["gears"]): c["n_groups"] for c in summary.combos}
    # demo_paired_tows/README.md: 140 trawl pairs, 72 seine groups of which 8 also had the legacy trawl
    assert combos == {"otter_trawl_new + otter_trawl_old": 140, "beach_seine + otter_trawl_new": 64,
                      "beach_seine + otter_trawl_new + otter_trawl_old": 8}
    px = assert_drawn(plots.figure_png(plots.plot_gear_network(summary.combos, reference="otter_trawl_new")))
    assert has_colour(px, plots.HARMONIZED)  # the reference gear, drawn filled


def test_factor_by_length_figure(demo_results):
    """The demo factor set has no length classes: the figure is drawn on three species' demo factors
    spread over four length classes (a made-up shape; only the drawing is tested here)."""
    table = demo_results["factors"]
    table = table[table["species"].isin(["pinfish", "blue crab", "southern flounder"])]
    rows = []
    for length in (40.0, 60.0, 80.0, 100.0):
        part = table.copy()
        part["length_mm"] = length
        for col in ("factor_median", "factor_lower", "factor_upper"):
            part[col] = part[col] * (1 + length / 200)
        rows.append(part)
    px = assert_drawn(plots.figure_png(plots.plot_factor_by_length(pd.concat(rows))))
    assert has_colour(px, plots.CATEGORICAL[0])


# ----------------------------------------------------------------------------- the report


def test_demo_report_is_self_contained_with_every_section(demo_run):
    path = demo_run["report"]
    assert str(path) in demo_run["printed"]
    text = Path(path).read_text()
    page = parse(text)
    assert [h.strip() for h in page.h2] == [h for _, h in SECTIONS]
    assert page.external == []  # nothing to fetch: no links, scripts or images from elsewhere
    assert "script" not in page.tags and "link" not in page.tags
    # network, forest, convergence, ppc, series bands, gear mix, per-source series, artifact bars
    assert len(page.images) == 8
    for img in page.images:
        assert img["src"].startswith("data:image/png;base64,")
        assert_drawn(base64.b64decode(img["src"].split(",", 1)[1]), min_ink=0.001)
        assert img.get("alt")
    assert "@media print" in text
    manifest = json.loads((demo_run["out"] / "factors" / "manifest.json").read_text())
    assert manifest["factor_set_id"] in text
    sentences = [ln.strip() for ln in (demo_run["out"] / "trend" / "summary.md").read_text().splitlines()
                 if "Verdict:" in ln]
    assert len(sentences) == 12  # one per demo species, each in the report's plain-words part
    for sentence in sentences:
        assert html.escape(sentence) in text
    assert "No model comparison was run" in text and "Not fitted" in text


def _copy_factor_set(src: Path, dst: Path) -> Path:
    dst.mkdir()
    for name in ("factors.csv", "checks.csv", "manifest.json"):
        shutil.copy(src / name, dst / name)
    return dst


def test_report_escapes_file_text_and_shows_length_and_comparison(demo_run, tmp_path):
    """Text from files is escaped; a comparison file and length rows switch their sections on."""
    fdir = _copy_factor_set(demo_run["out"] / "factors", tmp_path / "factors")
    table = pd.read_csv(fdir / "factors.csv")
    evil = "<script>alert('x')</script> & co"
    table.loc[0, "reason"] = evil
    length_rows = table[table["species"] == "pinfish"].assign(length_mm=50.0)
    pd.concat([table, length_rows]).to_csv(fdir / "factors.csv", index=False)
    pd.DataFrame({"model": ["gamma", "lognormal"], "elpd_loo": [-1234.5, -1240.1], "elpd_diff": [0.0, 5.6],
                  "dse": [0.0, 2.1]}).to_csv(fdir / "comparison.csv", index=False)
    manifest = json.loads((fdir / "manifest.json").read_text())
    del manifest["inputs"]  # a factor set that names no input tables: the design is what the fit recorded
    manifest["comparison"] = {"verdict": "The data support 'length' <b>.", "kept": "length",
                              "how": "on the length-class cells"}
    (fdir / "manifest.json").write_text(json.dumps(manifest))
    out = write_report(tmp_path / "r.html", fdir)
    text = out.read_text()
    assert "the fit&#x27;s manifest names no input tables" in text
    assert evil not in text and "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt; &amp; co" in text
    assert "<script" not in text
    assert "lognormal" in text and "-1,240" in text and "No model comparison was run" not in text
    assert "The data support &#x27;length&#x27; &lt;b&gt;. Kept: length. Scored on the length-class cells." in text
    assert "Not fitted" not in text and "factors by length class" in text
    assert "No series given" in text and "No trend attribution given" in text
    assert [h.strip() for h in parse(text).h2] == [h for _, h in SECTIONS]


def test_report_command(demo_run, tmp_path, capsys):
    """calib report writes the file and says where; a factor set whose input tables changed since
    the fit is reported with the design the fit recorded, and says so."""
    out_dir = demo_run["out"]
    fdir = _copy_factor_set(out_dir / "factors", tmp_path / "factors")
    manifest = json.loads((fdir / "manifest.json").read_text())
    manifest["inputs"]["hauls"]["sha256"] = "0" * 64  # as if hauls.csv had been edited after the fit
    (fdir / "manifest.json").write_text(json.dumps(manifest))
    target = tmp_path / "sub" / "report.html"
    code = main(["report", "--factors", str(fdir), "--converted", str(out_dir / "converted"), "--out", str(target)])
    assert code == 0 and target.is_file()
    assert str(target) in capsys.readouterr().out
    text = target.read_text()
    assert "hauls changed since" in text and "the design below is what the fit recorded" in text
    assert "n groups" in text and "212" in text  # the fit's own count of calibration groups
    # A folder that is not a factor set: exit 1, the message names the file and the fix, nothing written.
    bad = tmp_path / "bad.html"
    code = main(["report", "--factors", str(out_dir / "series"), "--out", str(bad)])
    err = capsys.readouterr().err
    assert code == 1 and not bad.exists()
    assert "factors.csv" in err and "calib fit" in err
    # The report may not be written into a result folder.
    inside = out_dir / "factors" / "report.html"
    assert main(["report", "--factors", str(out_dir / "factors"), "--out", str(inside)]) == 1
    assert not inside.exists()


# ----------------------------------------------------------------------------- a real browser

CHROMIUM_FLAGS = [
    # As on the machine page: root needs --no-sandbox; no background networking on a closed network.
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--hide-scrollbars", "--virtual-time-budget=3000",
]

# Marks, after load, every image that did not decode (naturalWidth 0), and counts the images.
PROBE = """
<img id="probe-broken" alt="deliberately broken" src="data:image/png;base64,AAAA">
<script>
window.addEventListener('load', function () {
  var broken = [];
  for (var i = 0; i < document.images.length; i++) {
    var im = document.images[i];
    if (!im.complete || im.naturalWidth === 0) { broken.push(im.id || ('image-' + i)); }
  }
  document.body.setAttribute('data-images', String(document.images.length));
  document.body.setAttribute('data-broken', broken.join(' '));
});
</script>
"""


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    return None


def test_report_renders_in_a_real_browser(demo_run, tmp_path, capsys):
    browser = _chromium()
    if browser is None:
        reason = "chromium not installed (`.ci/run` installs Debian's chromium; apt-get install chromium)"
        with capsys.disabled():
            print(f"\nSKIPPED: {reason}")
        pytest.skip(reason)
    ARTIFACTS.mkdir(exist_ok=True)
    text = Path(demo_run["report"]).read_text()
    n_images = len(parse(text).images)
    probe = ARTIFACTS / "report_probe.html"
    probe.write_text(text.replace("</body>", PROBE + "</body>"))
    screenshot = ARTIFACTS / "report.png"
    screenshot.unlink(missing_ok=True)
    def run(*extra, profile):
        return subprocess.run([browser, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / profile}", *extra,
                               probe.as_uri()], capture_output=True, text=True, timeout=120)

    shot = run("--window-size=1280,4000", f"--screenshot={screenshot}", profile="shot")
    assert screenshot.is_file(), shot.stderr[-2000:]
    with capsys.disabled():  # shown in every run, not only with -s
        print(f"\nscreenshot of the report (test artifact): {screenshot}")
    px = assert_drawn(screenshot.read_bytes())
    assert has_colour(px, plots.HARMONIZED)  # the header band

    dom = run("--dump-dom", profile="dom")
    assert dom.returncode == 0, dom.stderr[-2000:]
    body = re.search(r"<body([^>]*)>", dom.stdout)
    assert body, dom.stdout[:500]
    attrs = dict(re.findall(r'(data-[a-z]+)="([^"]*)"', body.group(1)))
    assert attrs.get("data-images") == str(n_images + 1), attrs  # the script ran over every image
    assert attrs.get("data-broken", "").split() == ["probe-broken"]  # only the deliberately broken one
    headings = [h.strip() for h in parse(dom.stdout).h2]
    assert headings == [h for _, h in SECTIONS]


def test_report_of_a_factor_set_made_without_a_sampler(tmp_path):
    """A factor set from known draws (no sampler, no predictive check, blank summaries, no input
    tables): every section is still there and says what does not apply."""
    import xarray as xr

    from calib.factors import factor_set_from_draws

    rng = np.random.default_rng(5)
    theta = np.zeros((1, 200, 2, 2))
    theta[0, :, 1, :] = [-0.4, 0.7] + 0.1 * rng.standard_normal((200, 2))
    draws = xr.DataArray(theta, dims=("chain", "draw", "gear", "species"),
                         coords={"gear": ["ref_trawl", "<b>seine</b>"], "species": ["pinfish", "blue crab"]})
    fdir = factor_set_from_draws(draws, reference="ref_trawl", factor_set_id="fs-test").save(tmp_path / "f")
    text = write_report(tmp_path / "r.html", fdir).read_text()
    assert [h.strip() for h in parse(text).h2] == [h for _, h in SECTIONS]
    assert "No sampler diagnostics: this factor set was made by the synthetic method" in text
    assert "No posterior predictive check" in text
    assert "&lt;b&gt;seine&lt;/b&gt;" in text and "<b>seine" not in text


def test_report_of_a_factor_set_with_length_classes_only(demo_run, tmp_path):
    """A factor set whose factors.csv has only length-class rows (as a length fit writes): the
    factors section lists them by class, and Factor by length draws them."""
    fdir = _copy_factor_set(demo_run["out"] / "factors", tmp_path / "factors")
    table = pd.read_csv(fdir / "factors.csv")
    table = table[table["species"].isin(["pinfish", "blue crab"])]
    table = pd.concat([table.assign(length_mm=float(mm)) for mm in (30, 40, 50)])
    table.to_csv(fdir / "factors.csv", index=False)
    manifest = json.loads((fdir / "manifest.json").read_text())
    del manifest["inputs"]
    (fdir / "manifest.json").write_text(json.dumps(manifest))
    text = write_report(tmp_path / "r.html", fdir).read_text()
    assert "factors by length class only" in text and "length class (mm)" in text
    assert "12 factors by length class for 2 species" in text
    assert 'alt="factor by length"' in text and 'alt="forest plot of conversion factors"' not in text
