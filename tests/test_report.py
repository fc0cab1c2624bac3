"""`--report FILE.html` (qhl.report): one self-contained HTML file with the content of `--json`.

Each command runs once in this process on an invented three-spin cluster whose name and experiment
name carry HTML (`<script>`, `<b>`, quotes, `&`), once with `--json` and once with `--report`. The
report is read back with the standard library's `html.parser` (an independent HTML reader) and checked:
- the section headings are there, and every top-level key of the command's own `--json` output is
  visible outside the embedded JSON block;
- the embedded JSON (collapsible block and download data URI) equals what `--json` printed;
- every <img> is a base64 PNG that decodes (PNG signature, ISO/IEC 15948:2004 / RFC 2083, section 3.1)
  and that matplotlib's reader (an independent PNG decoder, Pillow) reads as a picture;
- no user string is left unescaped: no <script> element at all, and the cluster's name reads back as
  the text it is (OWASP Cross Site Scripting Prevention Cheat Sheet, rule 1: encode before putting
  untrusted data into HTML element content or attributes).
"""

import base64
import contextlib
import io
import json
import shlex
from html.parser import HTMLParser

import numpy as np
import pytest

from qhl.cli import main

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"   # RFC 2083, section 3.1
HEADINGS = ("Command line", "Versions", "Summary", "Plots", "Assumptions", "JSON data")
NAME = "<script>alert('x')</script> & \"tiny\""

CLUSTER = '''name = "<script>alert('x')</script> & \\"tiny\\""
field_tesla = 9.4
observe = "1H"
reference_ppm = 3.0

[[spin]]
label = "A"
isotope = "1H"
position_angstrom = [0.0, 0.0, 0.0]
shift_ppm = 1.2

[[spin]]
label = "B"
isotope = "1H"
position_angstrom = [1.8, 0.0, 0.0]
shift_ppm = 2.5

[[spin]]
label = "C"
isotope = "1H"
position_angstrom = [0.4, 2.4, 0.9]
shift_ppm = 3.9

[[experiment]]
name = "fid<b>"
t_max_s = 2e-3
points = 64
noise = 1e-3
'''

# command -> (arguments after the cluster file, number of plots the report must embed)
RUNS = {
    "budget": (["--no-classical", "--sweep-time", "1e-4:1e-3:3"], 1),
    "learn": ([], 1),
    "check": (["--time", "1e-4", "--steps", "2", "--shots", "200"], 1),
    "scan": (["--dipolar-scale", "0.5:1:2", "--workers", "0", "--out", "{tmp}/scan.csv"], 3),
    "design": (["--scales", "0.5:1:2"], 1),
}


class _Page(HTMLParser):
    """Headings, images, elements, visible text (outside the JSON <pre>) and the JSON <pre> text."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.images, self.links, self.headings = [], [], [], []
        self.text, self.json_text = [], []
        self._stack = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag == "img":
            self.images.append(a)
        if tag == "a":
            self.links.append(a)
        if tag not in ("img", "meta", "br", "link", "input"):
            self._stack.append((tag, a))

    def handle_endtag(self, tag):
        while self._stack:
            if self._stack.pop()[0] == tag:
                break

    def handle_data(self, data):
        inside = [t for t, _ in self._stack]
        if any(a.get("id") == "json-text" for _, a in self._stack):
            self.json_text.append(data)
        elif "style" not in inside:
            self.text.append(data)
        if inside and inside[-1] in ("h1", "h2") or "h2" in inside:
            self.headings.append(data.strip())


def _run(argv):
    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
        rc = main(argv)
    return rc, out.getvalue()


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    cluster = tmp / "tiny<i>.toml"             # a file name with markup too (shown in the command line)
    cluster.write_text(CLUSTER)
    out = {}
    for command, (extra, plots) in RUNS.items():
        args = [a.format(tmp=tmp) for a in extra]
        rc, printed = _run([command, str(cluster), *args, "--json"])
        assert rc == 0, command
        if command == "scan":                   # the second run resumes the same results: same --json
            (tmp / "scan.csv").unlink()
        report = tmp / f"{command}.html"
        argv = [command, str(cluster), *args, "--report", str(report)]
        rc, _ = _run(argv)
        assert rc == 0, command
        html = report.read_text(encoding="utf-8")
        page = _Page()
        page.feed(html)
        page.close()
        out[command] = {"json": json.loads(printed), "html": html, "page": page, "plots": plots, "argv": argv}
    return out


@pytest.mark.parametrize("command", list(RUNS))
def test_sections_and_every_json_key_are_shown(runs, command):
    r = runs[command]
    page, data = r["page"], r["json"]
    assert page.headings[0].startswith(f"qhl {command} report")
    for heading in HEADINGS:
        assert heading in page.headings, heading
    visible = " ".join(page.text)
    missing = [k for k in data if k not in visible]
    assert missing == []
    # the command line, as run, quoted for a POSIX shell (the standard library's shlex)
    assert "qhl " + shlex.join(r["argv"]) in visible


@pytest.mark.parametrize("command", list(RUNS))
def test_embedded_json_is_what_json_prints(runs, command):
    r = runs[command]
    shown = json.loads("".join(r["page"].json_text))
    download = [a["href"] for a in r["page"].links if a.get("href", "").startswith("data:application/json;base64,")]
    assert len(download) == 1
    downloaded = json.loads(base64.b64decode(download[0].split(",", 1)[1], validate=True))
    data = r["json"]
    if command in ("check", "scan", "design"):  # run times differ between the two runs; the rest is identical
        for d in (data, shown, downloaded):
            d.pop("seconds", None)
            for row in d.get("rows", []):
                row.pop("seconds", None)
    if command == "scan":
        for d in (data, shown, downloaded):
            d.pop("results", None)
            d.pop("plots", None)
    assert shown == downloaded == data


@pytest.mark.parametrize("command", list(RUNS))
def test_images_are_valid_base64_png(runs, command):
    import matplotlib.image as mpimg

    r = runs[command]
    assert len(r["page"].images) == r["plots"]
    for img in r["page"].images:
        head, _, payload = img["src"].partition(",")
        assert head == "data:image/png;base64"
        raw = base64.b64decode(payload, validate=True)
        assert raw[:8] == PNG_SIGNATURE
        pixels = mpimg.imread(io.BytesIO(raw), format="png")
        assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 100
        assert float(np.std(pixels[..., :3])) > 0.01        # not a blank picture
        assert img.get("alt")


@pytest.mark.parametrize("command", list(RUNS))
def test_user_strings_are_escaped(runs, command):
    r = runs[command]
    assert "script" not in r["page"].tags                   # no element made from the cluster's name
    assert not any(tag in r["html"] for tag in ("<script>", "<b>", "<i>"))
    assert "tiny&lt;i&gt;.toml" in r["html"]
    assert ("&lt;script&gt;" in r["html"]) == (command != "scan")     # scan's JSON holds no cluster name
    if command != "scan":                                    # scan's subject is the file name
        assert NAME in " ".join(r["page"].text)
    assert r["page"].headings[0].endswith(NAME if command != "scan" else "tiny<i>.toml")


def test_budget_assumptions_all_shown_with_sources(runs):
    r = runs["budget"]
    visible = " ".join(r["page"].text)
    for key, text in r["json"]["assumptions"].items():
        assert f"assumptions.{key}" in visible
        if isinstance(text, str):
            assert text in visible
    # an assumption with a published source, as the budget states it (Hoeffding 1963)
    assert "Hoeffding, J. Amer. Statist. Assoc. 58, 13 (1963)" in visible


def test_versions_match_the_imported_libraries(runs):
    import qiskit
    import scipy

    visible = " ".join(runs["learn"]["page"].text)
    for name, module in (("numpy", np), ("scipy", scipy), ("qiskit", qiskit)):
        assert module.__version__ in visible, name
    for name in ("python", "qhl", "qiskit-aer"):
        assert name in visible


def test_report_path_is_checked_before_the_run(tmp_path, capsys):
    with pytest.raises(SystemExit) as stop:          # argparse refuses it, before any work
        main(["budget", "--report", str(tmp_path / "missing" / "r.html")])
    err = capsys.readouterr().err.strip()
    assert stop.value.code == 2
    assert len(err.splitlines()) == 1 and "--report" in err and "does not exist" in err


def test_render_without_plots_and_nested_values():
    """render_report on an invented dictionary: nested tables, matrices, an escaped key and value, notes."""
    from qhl.report import render_report

    data = {"cluster": "a<b", "time_s": 1e-3, "precision": 0.01, "tiers": {"exact": "used"},
            "sweep": {"tables": {"x": [[1.0, 2.0], [3.0, "inf"]]}}, "notes": [],
            "rows": [{"p": "<i>", "v": None}], "assumptions": {"k": "a source (Someone 2000)"}}
    html = render_report("budget", data, argv=["budget", "--report", "r.html"])
    page = _Page()
    page.feed(html)
    visible = " ".join(page.text)
    assert "<i>" not in html and "&lt;i&gt;" in html
    assert "no sweep was computed" in visible
    assert "assumptions.k" in visible and "a source (Someone 2000)" in visible
    assert page.images == []
    assert json.loads("".join(page.json_text)) == data
    with pytest.raises(ValueError, match="unknown command"):
        render_report("fit", data)


def test_collect_assumptions_walks_nested_keys():
    from qhl.report.report import COMMON_ASSUMPTIONS, collect_assumptions

    data = {"assumptions": {"a": "x"}, "classical": {"assumptions": ["y", "z"]}, "bias_rule": "r",
            "rows": [{"power_rule": "q"}]}
    got = dict(collect_assumptions("budget", data))
    assert {k: got[k] for k in ("assumptions.a", "classical.assumptions[0]", "classical.assumptions[1]",
                                "bias_rule", "rows[0].power_rule")} == {
        "assumptions.a": "x", "classical.assumptions[0]": "y", "classical.assumptions[1]": "z",
        "bias_rule": "r", "rows[0].power_rule": "q"}
    assert set(COMMON_ASSUMPTIONS) <= set(got)


def test_long_tables_are_cut_but_the_json_keeps_everything():
    from qhl.report import render_report
    from qhl.report.report import MAX_CELLS, MAX_ROWS

    data = {"cluster": "c", "rows": [{"i": k} for k in range(MAX_ROWS + 7)],
            "grid": {"t": [[0.5] * 100] * (MAX_CELLS // 100 + 1)}}
    page = _Page()
    page.feed(render_report("check", data))
    visible = " ".join(page.text)
    assert f"the first {MAX_ROWS} of {MAX_ROWS + 7} rows" in visible
    assert f"{MAX_CELLS // 100 + 1} x 100 values" in visible
    assert page.tags.count("tr") < MAX_ROWS + 50
    assert json.loads("".join(page.json_text)) == data
