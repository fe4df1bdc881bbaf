"""The HTML report: its sections follow the records present, user text is escaped, nothing
is fetched from outside, and a real browser draws it without errors.

The cohort is invented, with its structure planted: three tissues shifting three blocks of
features, a technical batch shifting a fourth block, one constant feature, one missing cell,
some held-out (supplementary) samples, and new samples of which one is far off the model.
Ids and annotation values carry HTML's special characters. The outside references are the
HTML parser of the standard library (``html.parser``) and headless Chromium.
"""

from __future__ import annotations

import base64
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.errors import OptionError
from axiscope.report.html import CAUTIONS, build_report, sanitise_svg
from axiscope.report.interactive import EXTREMES_PER_SIDE, sample_map, thin

N, P = 90, 40
AWKWARD_IDS = ['<script>alert("x")</script>', "a&b", 'say "hi"', "it's", "</script><b>x</b>"]
TISSUES = ("<i>liver</i>", "&kidney", 'heart "left"')
FULL_SECTIONS = {"run", "variance", "axes", "maps", "scoring", "warnings", "cautions"}


def _invoke(*args: str) -> None:
    result = CliRunner().invoke(app, list(args))
    assert result.exit_code == 0, result.output


@pytest.fixture(scope="module")
def cohort(tmp_path_factory) -> Path:
    """Inputs of the full result: matrix, ids, annotations and new samples."""
    d = tmp_path_factory.mktemp("cohort")
    rng = np.random.default_rng(1)
    tissue = np.repeat(np.array(TISSUES), N // 3)
    batch = np.where(np.arange(N) % 2 == 0, "b1", "b2")
    X = rng.normal(size=(N, P))
    for j, name in enumerate(TISSUES[:2]):
        X[:, 10 * j:10 * (j + 1)] += 6 * (tissue == name)[:, None]
    X[:, 20:30] += 3 * (batch == "b1")[:, None]
    X[:, 39] = 1.0  # constant: dropped
    X[5, 3] = np.nan  # one cell imputed
    ids = AWKWARD_IDS + [f"s{i:03d}" for i in range(len(AWKWARD_IDS), N)]
    features = ["<f&0>"] + [f"f{j:02d}" for j in range(1, P)]
    np.save(d / "x.npy", X)
    (d / "ids.txt").write_text("\n".join(ids) + "\n")
    (d / "fids.txt").write_text("\n".join(features) + "\n")
    pd.DataFrame({"sample_id": ids, "tissue": tissue, "batch": batch, "age": rng.integers(20, 80, N),
                  "holdout": np.where(np.arange(N) % 9 == 8, "true", "false")}).to_csv(
        d / "ann.tsv", sep="\t", index=False)
    Y = rng.normal(size=(12, P))
    Y[:, :10] += 6
    Y[0] += 20  # far off the model: flagged
    np.save(d / "y.npy", Y)
    (d / "yids.txt").write_text("\n".join(f"new<{i}>" for i in range(12)) + "\n")
    return d


@pytest.fixture(scope="module")
def full(cohort) -> Path:
    """A fit with annotations, supplementary samples, a report from ``fit --report`` and a score run."""
    d = cohort
    _invoke("fit", str(d / "x.npy"), "--sample-ids", str(d / "ids.txt"), "--feature-ids", str(d / "fids.txt"),
            "-k", "4", "--method", "exact", "--out", str(d / "res"), "--annotations", str(d / "ann.tsv"),
            "--technical", "batch", "--supplementary-samples-column", "holdout", "--missing", "mean",
            "--report", "--quiet")
    _invoke("score", str(d / "res"), str(d / "y.npy"), "--sample-ids", str(d / "yids.txt"),
            "--feature-ids", str(d / "fids.txt"), "--out", str(d / "sc"), "--quiet")
    figures = d / "res" / "figures"
    assert (d / "res" / "report.html").is_file() and (figures / "samples_PC1_PC2.svg").is_file()  # fit --report
    shutil.rmtree(figures)  # the page's tests below embed a figures folder of their own
    figures.mkdir()
    (figures / "contributions_PC1.svg").write_text(_HOSTILE_SVG)
    (figures / "variance.svg").write_text(_HOSTILE_SVG)  # drawn interactively: left out
    return d


@pytest.fixture(scope="module")
def full_html(full) -> Path:
    return build_report(full / "res", scores_dir=full / "sc", out=full / "full.html")


_HOSTILE_SVG = """<?xml version="1.0" encoding="utf-8"?>
<!DOCTYPE svg PUBLIC "-//W3C//DTD SVG 1.1//EN" "http://www.w3.org/Graphics/SVG/1.1/DTD/svg11.dtd">
<svg xmlns="http://www.w3.org/2000/svg" xmlns:xlink="http://www.w3.org/1999/xlink" width="40" height="20"
     onload="alert(1)">
 <metadata><rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"/></metadata>
 <style>@import url(https://example.org/x.css); .a { fill: url(#grad); } .b { fill: url('https://example.org/p') }</style>
 <defs><linearGradient id="grad"><stop offset="0" stop-color="#000"/></linearGradient></defs>
 <script>alert(2)</script>
 <foreignObject><div xmlns="http://www.w3.org/1999/xhtml">x</div></foreignObject>
 <image xlink:href="https://example.org/tracker.png" width="1" height="1"/>
 <use href="#grad"/>
 <rect class="a" width="40" height="20" style="fill: url(http://example.org/f)" clip-path="url(#grad)"/>
</svg>"""


# ------------------------------------------------------------------------------ parsing


class _Page(HTMLParser):
    """Elements, attributes, text and script contents of a page (standard-library parser)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self.scripts: list[str] = []
        self.styles: list[str] = []
        self._in: str | None = None

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in = tag if tag in ("script", "style") else None

    def handle_endtag(self, tag):
        self._in = None

    def handle_data(self, data):
        if self._in == "script":
            self.scripts.append(data)
        elif self._in == "style":
            self.styles.append(data)
        else:
            self.text.append(data)

    def ids(self, tag: str) -> set[str]:
        return {a["id"] for t, a in self.tags if t == tag and a.get("id")}


def _parse(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    return page


_EXTERNAL = re.compile(r"^\s*(https?:|//|ftp:)", re.IGNORECASE)
_CSS_EXTERNAL = re.compile(r"url\(\s*['\"]?\s*(https?:|//)|@import", re.IGNORECASE)


def _external_references(page: _Page) -> list[str]:
    """Every attribute or style that would make a browser fetch from outside the file."""
    found = []
    for tag, attrs in page.tags:
        if tag in ("link", "iframe", "object", "embed", "base"):
            found.append(f"<{tag}>")
        for name, value in attrs.items():
            if value is None:
                continue
            if name in ("src", "href", "xlink:href", "action", "poster", "data", "srcset", "background") \
                    and _EXTERNAL.search(value):
                found.append(f"<{tag} {name}={value!r}>")
            if name == "style" and _CSS_EXTERNAL.search(value):
                found.append(f"<{tag} style={value!r}>")
    found += [f"<style>{s[:60]}" for s in page.styles if _CSS_EXTERNAL.search(s)]
    return found


# --------------------------------------------------------------------------------- tests


def test_fit_report_flag_writes_the_report_inside_the_result(full):
    report = full / "res" / "report.html"
    assert report.is_file()
    page = _parse(report)
    assert FULL_SECTIONS - {"scoring"} <= page.ids("section")  # no score run yet when fit wrote it


def test_full_result_has_every_section(full_html, full):
    page = _parse(full_html)
    assert page.ids("section") == FULL_SECTIONS
    text = " ".join(page.text)
    cards = [a["id"] for t, a in page.tags if t == "article"]
    assert cards == ["axis-1", "axis-2", "axis-3", "axis-4"]
    for title, _ in CAUTIONS:
        assert title in text
    charts = {a["data-chart"] for t, a in page.tags if t == "div" and "data-chart" in a}
    assert charts == {"variance", "sample_map", "feature_map", "diagnostics"}
    # warnings from the records: the constant feature, the imputed cell, the batch axis
    assert "1 feature left out of the axes (constant)" in text
    assert "1 missing cell was filled" in text
    assert "Technical axis." in text and "batch" in text
    # the numbers shown are those of the records, formatted (components.tsv, diagnostics.tsv)
    components = pd.read_csv(full / "res" / "components.tsv", sep="\t")
    assert f"{100 * components.variance_ratio[0]:.2f} %" in text
    diagnostics = pd.read_csv(full / "sc" / "diagnostics.tsv", sep="\t", keep_default_na=False)
    assert "new<0>" in text and diagnostics.loc[diagnostics.sample_id == "new<0>", "flag"].item() != "within"
    # the static figure found in figures/ is embedded, cleaned
    images = [a["src"] for t, a in page.tags if t == "img"]
    assert len(images) == 1 and images[0].startswith("data:image/svg+xml;base64,")
    svg = base64.b64decode(images[0].split(",", 1)[1]).decode()
    assert "script" not in svg and "onload" not in svg and "example.org" not in svg and "foreignObject" not in svg


def test_sections_without_records_are_left_out(cohort, tmp_path):
    from axiscope import fit, open_matrix

    with open_matrix(cohort / "x.npy", sample_ids=str(cohort / "ids.txt")) as src:
        result = fit(src, n_components=3, preprocess=_mean_filled())
    result.write(tmp_path / "plain")
    for name in ("feature_statistics.tsv", "dropped_features.tsv"):
        (tmp_path / "plain" / name).unlink(missing_ok=True)
    manifest = json.loads((tmp_path / "plain" / "manifest.json").read_text())
    manifest["features_dropped"], manifest["n_missing_imputed"] = {}, 0
    (tmp_path / "plain" / "manifest.json").write_text(json.dumps(manifest))
    page = _parse(build_report(tmp_path / "plain"))
    assert page.ids("section") == {"run", "variance", "maps", "cautions"}
    charts = {a["data-chart"] for t, a in page.tags if t == "div" and "data-chart" in a}
    assert charts == {"variance", "sample_map"}

    # the slots for the number of axes and for groups fill when their records appear
    manifest["signal_axes"] = 2
    (tmp_path / "plain" / "manifest.json").write_text(json.dumps(manifest))
    pd.DataFrame({"group": ["g<1>", "g2"], "samples": [40, 50]}).to_csv(
        tmp_path / "plain" / "groups.tsv", sep="\t", index=False)
    with pytest.raises(OptionError, match="already exists"):  # an existing page is never replaced unasked
        build_report(tmp_path / "plain")
    with pytest.raises(OptionError, match="is a folder"):
        build_report(tmp_path / "plain", out=tmp_path / "plain" / "model", overwrite=True)
    page = _parse(build_report(tmp_path / "plain", overwrite=True))
    assert page.ids("section") == {"run", "variance", "maps", "groups", "cautions"}
    text = " ".join(page.text)
    assert "Axes above the noise: 2" in " ".join(text.split()) and "g<1>" in text


def _mean_filled():
    from axiscope import PreprocessSpec

    return PreprocessSpec(missing="mean")


def test_user_strings_are_escaped(full_html):
    raw = full_html.read_text(encoding="utf-8")
    page = _parse(full_html)
    text = "\n".join(page.text)
    # each awkward id and annotation value reaches the page as text, never as markup
    for value in [*AWKWARD_IDS, *TISSUES, "<f&0>", "new<0>"]:
        assert value in text, value
    assert "&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;" in raw or "&lt;script&gt;alert(&quot;x&quot;)" in raw
    assert "a&amp;b" in raw and "&lt;i&gt;liver&lt;/i&gt;" in raw
    assert not [a for t, a in page.tags if t in ("b", "i")]  # no element made from an id or a value
    # inside scripts (the chart data), ids stay in escaped JSON strings: no markup can start there
    chart_data = [s for s in page.scripts if "sample-points" in s]
    assert len(chart_data) == 1
    assert "&lt;script&gt;alert" in chart_data[0]  # the chart library escapes its data as HTML entities
    assert not re.search(r"<\s*/?\s*(script|b|i)\b", chart_data[0], re.IGNORECASE)
    scripts = [t for t, _ in page.tags if t == "script"]
    assert len(scripts) == raw.count("</script>")


def test_no_external_url(full_html):
    page = _parse(full_html)
    assert _external_references(page) == []
    assert page.scripts and all("src" not in a for t, a in page.tags if t == "script")  # everything inline


def test_sanitise_svg_keeps_the_drawing_and_drops_the_rest():
    clean = sanitise_svg(_HOSTILE_SVG)
    for gone in ("<script", "alert", "onload", "foreignObject", "metadata", "example.org", "@import"):
        assert gone not in clean, gone
    assert 'href="#grad"' in clean and "url(#grad)" in clean and "<rect" in clean
    with pytest.raises(ValueError):
        sanitise_svg('<!DOCTYPE x [<!ENTITY a "b">]><svg xmlns="http://www.w3.org/2000/svg">&a;</svg>')


def test_thinning_keeps_extremes_and_marked_points():
    rng = np.random.default_rng(0)
    values = rng.normal(size=(50_000, 3))
    keep = np.zeros(50_000, dtype=bool)
    keep[[7, 12_345]] = True
    drawn = thin(50_000, 5_000, keep=keep, extremes=values)
    assert drawn.size == 5_000 and np.all(np.diff(drawn) > 0)
    assert {7, 12_345} <= set(drawn.tolist())
    for j in range(3):
        order = np.argsort(values[:, j])
        assert set(order[:EXTREMES_PER_SIDE]) <= set(drawn) and set(order[-EXTREMES_PER_SIDE:]) <= set(drawn)
    np.testing.assert_array_equal(drawn, thin(50_000, 5_000, keep=keep, extremes=values))
    np.testing.assert_array_equal(thin(800, 5_000), np.arange(800))


def test_thinned_map_says_so():
    from bokeh.models import ColumnDataSource

    rng = np.random.default_rng(0)
    scores = pd.DataFrame({"sample_id": [f"s{i}" for i in range(3_000)], "PC1": rng.normal(size=3_000),
                           "PC2": rng.normal(size=3_000)})
    layout, note = sample_map(scores, ["PC1", "PC2"], ratios={"PC1": 0.2, "PC2": 0.1}, limit=1_000)
    sources = [m for m in layout.references() if isinstance(m, ColumnDataSource) and m.name == "sample-points"]
    assert len(sources[0].data["sample_id"]) == 1_000
    assert note.startswith("1,000 of 3,000 samples are drawn")


def test_report_command(full, tmp_path):
    out = tmp_path / "r.html"
    result = CliRunner().invoke(app, ["report", str(full / "res"), "--scores-dir", str(full / "sc"),
                                      "--annotations", str(full / "ann.tsv"), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert result.output.strip() == f"report in {out}"
    assert _parse(out).ids("section") == FULL_SECTIONS
    missing = CliRunner().invoke(app, ["report", str(tmp_path / "nothing")])
    assert missing.exit_code == 2 and "no such result directory" in missing.output
    exists = CliRunner().invoke(app, ["report", str(full / "res")])
    assert exists.exit_code == 2 and "pass --overwrite to replace it, or another path as --out ..." in exists.output
    not_scored = CliRunner().invoke(app, ["report", str(full / "res"), "--scores-dir", str(tmp_path), "--overwrite"])
    assert not_scored.exit_code == 2 and "no diagnostics.tsv" in not_scored.output
    assert not (full / "res" / "report.html.tmp").exists()
    assert not list((full / "res").glob(".report.html.*"))


# ------------------------------------------------------------------------- real browser

#: Injected into a copy of the report for the test only: records uncaught errors and
#: console errors, and after the charts drew, counts their canvas and SVG elements (Bokeh
#: draws inside shadow roots, which a DOM dump does not show) into attributes of <html>.
_PROBE_HEAD = """<script>
window.__errors = [];
window.addEventListener('error', e => window.__errors.push('Uncaught ' + e.message));
window.addEventListener('unhandledrejection', e => window.__errors.push('Unhandled ' + e.reason));
const __consoleError = console.error;
console.error = function (...a) { window.__errors.push(a.join(' ')); __consoleError.apply(console, a); };
</script>"""
_PROBE_TAIL = """<script>
function __walk(node, visit, chart) {
  if (node.nodeType === 1) {
    chart = node.getAttribute('data-chart') || chart;
    visit(node, chart);
    if (node.shadowRoot) { __walk(node.shadowRoot, visit, chart); }
  }
  for (const child of node.children || []) { __walk(child, visit, chart); }
}
setTimeout(function () {
  const counts = {};
  __walk(document.body, function (node, chart) {
    const tag = node.tagName.toLowerCase();
    if (chart && (tag === 'canvas' || tag === 'svg')) {
      counts[chart] = counts[chart] || {canvas: 0, svg: 0, pixels: 0};
      counts[chart][tag] += 1;
      if (tag === 'canvas') { counts[chart].pixels += node.width * node.height; }
    }
  }, null);
  document.documentElement.setAttribute('data-drawn', JSON.stringify(counts));
  // hover the sample whose id is HOVER_ID, as a mouse would, and switch the colouring
  const probe = {};
  try {
    const doc = Bokeh.documents[0];
    const source = doc.get_model_by_name('sample-points');
    const view = Bokeh.index.find_one(doc.get_model_by_name('samples')).parent;
    const i = Array.from(source.data.sample_id).indexOf(HOVER_ID);
    const events = view.canvas_view.events_el;
    const box = events.getBoundingClientRect();
    const x = box.left + view.frame.x_scale.compute(source.data.PC1[i]);
    const y = box.top + view.frame.y_scale.compute(source.data.PC2[i]);
    for (const type of ['pointerenter', 'pointerover', 'pointermove']) {
      events.dispatchEvent(new PointerEvent(type, {clientX: x, clientY: y, bubbles: true, composed: true,
                                                   pointerType: 'mouse', isPrimary: true}));
    }
    const select = Array.from(doc.all_models).find(m => m.constructor.__name__ === 'Select' && m.title === 'Colour by');
    const glyph = doc.get_model_by_name('samples').glyph;
    probe.colour_before = glyph.fill_color.field;
    select.value = String(select.options.findIndex(o => o[1] === 'batch'));
    probe.glyph = glyph;
  } catch (e) { window.__errors.push('probe: ' + e); }
  setTimeout(function () {
    if (probe.glyph) { probe.colour_after = probe.glyph.fill_color.field; delete probe.glyph; }
    const tips = [];
    __walk(document.body, function (node) {
      if (String(node.className || '').includes('tooltip') && node.textContent.trim()) { tips.push(node.textContent); }
    }, null);
    probe.tooltips = tips;
    document.documentElement.setAttribute('data-probe', JSON.stringify(probe));
    document.documentElement.setAttribute('data-errors', JSON.stringify(window.__errors));
    // every resource the page asked for, loaded or failed (resource timing lists both)
    const asked = performance.getEntriesByType('resource').map(e => e.name);
    document.documentElement.setAttribute('data-resources', JSON.stringify(asked));
  }, 500);
}, 4000);
</script>"""
HOVER_ID = "a&b"


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(_chromium() is None, reason="chromium is not installed (.ci/run installs Debian's chromium)")
def test_report_renders_in_a_real_browser(full_html, tmp_path):
    from PIL import Image

    html = full_html.read_text(encoding="utf-8")
    probe = tmp_path / "probe.html"
    head, tail = html.replace("<head>", "<head>" + _PROBE_HEAD, 1).rsplit("</body>", 1)
    probe.write_text(head + _PROBE_TAIL.replace("HOVER_ID", json.dumps(HOVER_ID)) + "</body>" + tail,
                     encoding="utf-8")
    base = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--host-resolver-rules=MAP * ~NOTFOUND", "--enable-logging=stderr", "--v=0",
            "--virtual-time-budget=20000", "--window-size=1280,1600"]
    shot = tmp_path / "shot.png"
    ran = subprocess.run(base + [f"--user-data-dir={tmp_path / 'profile1'}", f"--screenshot={shot}",
                                 probe.as_uri()], capture_output=True, text=True, timeout=180)
    dump = subprocess.run(base + [f"--user-data-dir={tmp_path / 'profile2'}", "--dump-dom", probe.as_uri()],
                          capture_output=True, text=True, timeout=180)
    assert dump.returncode == 0, dump.stderr[-2000:]
    log = ran.stderr + dump.stderr
    assert "Uncaught" not in log and "net::ERR" not in log, log[-3000:]

    # the page rendered: the screenshot is not blank (pixel variance of the grey levels)
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=np.float64)
    assert pixels.std() > 10.0

    root = re.search(r"<html[^>]*>", dump.stdout).group(0)
    drawn = json.loads(_attribute(root, "data-drawn"))
    errors = json.loads(_attribute(root, "data-errors"))
    assert errors == []
    asked = json.loads(_attribute(root, "data-resources"))
    assert [url for url in asked if not url.startswith(("data:", "blob:"))] == []  # nothing fetched
    for chart in ("variance", "sample_map", "feature_map", "diagnostics"):
        assert chart in drawn and drawn[chart]["canvas"] >= 1 and drawn[chart]["pixels"] > 10_000, drawn
    # hovering a point names the sample and shows its annotations, as text; the colouring switches
    probe = json.loads(_attribute(root, "data-probe"))
    tip = " ".join(" ".join(probe["tooltips"]).split())
    assert "sample: a&b" in tip and "tissue: <i>liver</i>" in tip and "batch: b2" in tip, probe
    assert (probe["colour_before"], probe["colour_after"]) == ("annotation_0", "annotation_1")  # tissue, then batch
    # the rendered DOM still holds the report's own text, escaped ids included
    assert "Before reading further" in dump.stdout and "a&amp;b" in dump.stdout


def _attribute(tag: str, name: str) -> str:
    import html

    match = re.search(rf'{name}="([^"]*)"', tag)
    assert match, f"{name} missing: the probe did not run"
    return html.unescape(match.group(1))


def test_annotations_missing_for_some_samples(full, tmp_path):
    table = pd.read_csv(full / "ann.tsv", sep="\t", dtype=str, keep_default_na=False)
    table.iloc[10:17].to_csv(tmp_path / "few.tsv", sep="\t", index=False)  # rows of 7 samples only
    page = _parse(build_report(full / "res", annotations=tmp_path / "few.tsv", out=tmp_path / "r.html"))
    text = " ".join(" ".join(page.text).split())
    assert f"{N - 7} samples have no row there" in text
    chart_data = next(s for s in page.scripts if "sample-points" in s)
    tissue = re.search(r'\["annotation_0",\{"type":"ndarray","array":\[(.*?)\]', chart_data).group(1)
    values = json.loads(f"[{tissue}]")
    assert values.count("") == N - 7 and "nan" not in values  # missing rows hover as empty, never "nan"


def test_a_scoring_run_of_another_model_is_refused(full, tmp_path):
    """Samples scored against one model are never drawn on another fit's axes."""
    from axiscope import fit
    from axiscope.errors import InputError
    from axiscope.io import array_source

    other = fit(array_source(np.random.default_rng(3).standard_normal((30, 8))), n_components=2)
    other.write(tmp_path / "other")
    with pytest.raises(InputError, match="scored against another model"):
        build_report(tmp_path / "other", scores_dir=full / "sc", out=tmp_path / "mixed.html")
    assert not (tmp_path / "mixed.html").exists()


def test_cards_of_a_later_explain_are_the_ones_shown(full, tmp_path):
    """After 'axiscope explain RESULT' (cards in RESULT/explanation), report and figures use those."""
    res = tmp_path / "res"
    shutil.copytree(full / "res", res)
    before = " ".join(_parse(build_report(res, out=tmp_path / "before.html")).text)
    assert "Technical axis." in before  # the fit's cards mark batch as technical
    explained = CliRunner().invoke(app, ["explain", str(res), "--annotations", str(full / "ann.tsv"),
                                         "--ignore", "holdout", "--quiet"])
    assert explained.exit_code == 0, explained.output
    after = " ".join(_parse(build_report(res, out=tmp_path / "after.html")).text)
    assert "Technical axis." not in after  # re-explained without --technical
