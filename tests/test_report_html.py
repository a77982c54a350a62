"""``boxwood verify --report-html``: one self-contained page, rendered in headless Chromium.

A zoo model is verified against its own export (PASS) and against a copy with one leaf
changed (FAIL). Each page must exist, make no network request (no external reference of
any kind: every image a PNG data URI), lead with the verdict, show the failing check, and
hold one image per promised plot (boxwood.verify.html.figure_count). Chromium renders both
pages; the screenshot must not be blank, and the blank check is itself shown to reject the
screenshot of an empty page. Chromium missing: the rendering test skips, but fails under CI
(.ci/run installs Debian's chromium).
"""
from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import joblib
import pytest

import zoo
from boxwood import pages
from boxwood.cli import main
from boxwood.verify import verify
from boxwood.verify.html import BOARDS, c_tables_bytes, figure_count, footprint, verify_page
from test_verify import document, write

NAME = "gbc_binary"  # a binary classifier: label flips and raw-score crossings have something to show
PROBES = "800"
DATA_URI = re.compile(r"data:image/png;base64,[A-Za-z0-9+/=]+")


@pytest.fixture(scope="module")
def pages_made(tmp_path_factory):
    """(folder, {"clean"/"faulty": (exit code, html text, html path)}, model path, artefact paths)."""
    folder = tmp_path_factory.mktemp("html")
    case, _, data = zoo.exported(NAME)
    model = folder / "model.joblib"
    joblib.dump(case.model, model)
    clean = folder / "clean.json"
    clean.write_bytes(data)
    _, doc = document(NAME)
    tree = doc["ensemble"]["trees"][0]
    leaf = tree["feature"].index(-1)
    tree["value"][leaf] = tree["value"][leaf] + 8.0  # one leaf moved far: routing equal, values not
    faulty = write(doc, folder / "faulty.json")
    out = {}
    for kind, art in (("clean", clean), ("faulty", faulty)):
        page = folder / ("%s.html" % kind)
        code = main(["verify", str(model), str(art), "--probes", PROBES, "--quiet", "--report-html", str(page)])
        out[kind] = (code, page.read_text(encoding="utf-8"), page)
    return folder, out, model, (clean, faulty)


def external_references(text):
    """Everything in the page that could make the browser fetch something: an empty list
    for a self-contained page."""
    found = []
    bare = DATA_URI.sub("data:", text)
    for needle in ("http:", "https:", "//", "<link", "url(", "@import", "<iframe", "<object", "<embed"):
        if needle in bare.lower():
            found.append(needle)
    found += ["src=%s" % m for m in re.findall(r"src\s*=\s*[\"']?([^\"' >]{0,40})", text)
              if not m.startswith("data:image/png;base64,")]
    found += ["script with src" for _ in re.findall(r"<script[^>]*\bsrc", text, re.I)]
    return found


def test_clean_page(pages_made):
    folder, out, model, (clean, _) = pages_made
    code, text, _ = out["clean"]
    assert code == 0
    assert external_references(text) == []
    assert text.lstrip().startswith("<!DOCTYPE html>")
    first = text.index('class="verdict')
    assert "PASS: model.joblib vs clean.json" in text[first:first + 300]
    # the verdict leads: it comes before the first table and the first image
    assert first < text.index("<table") < text.index("<img")
    result = verify(str(model), [str(clean)], probes=int(PROBES), progress=False)
    assert text.count("<img") == figure_count(result) == 5
    assert len(DATA_URI.findall(text)) == 5
    for caption in ("Probe coverage per feature", "the largest difference in ulps", "the certified bound",
                    "label flips per evaluator", "memory need"):
        assert caption in text, caption
    assert "from memory of the vendor&#x27;s datasheet" in text
    for board, chip, _, _ in BOARDS:
        assert chip in text


def test_faulty_page_shows_the_failing_checks(pages_made):
    _, out, _, _ = pages_made
    code, text, _ = out["faulty"]
    assert code == 1
    assert external_references(text) == []
    first = text.index('class="verdict fail')
    assert "FAIL: model.joblib vs faulty.json" in text[first:first + 300]
    assert text.count("<img") == 5
    # the checks table marks the failing checks, and the 'where' table says where
    def row(check):
        found = re.search(r"<tr><td>%s</td>(.*?)</tr>" % re.escape(check), text)
        assert found, check
        return found.group(1)

    for check in ("bound: raw", "empirical: raw", "empirical: decisions"):
        assert "FAIL" in row(check), check
    assert "FAIL" not in row("structure") and "1 value difference" in row("structure")
    assert "label flips" in text and "source says" in text  # the flipped rows are listed
    assert "Where the failures are" in text
    assert "largest: tree 0: 8" in text  # the bound names the tree whose leaf moved


def test_page_is_written_on_bad_input(tmp_path, pages_made):
    _, _, model, _ = pages_made
    page = tmp_path / "bad.html"
    code = main(["verify", str(model), str(tmp_path / "missing.json"), "--quiet", "--report-html", str(page)])
    assert code == 2
    text = page.read_text(encoding="utf-8")
    assert "bad input" in text and "missing.json" in text and "<img" not in text
    assert external_references(text) == []
    # an unreadable model: the run raises before any result; the page still says why
    junk = tmp_path / "junk.joblib"
    junk.write_bytes(b"not a pickle")
    page2 = tmp_path / "bad2.html"
    code = main(["verify", str(junk), str(tmp_path / "x.json"), "--quiet", "--report-html", str(page2)])
    assert code == 2 and "bad input" in page2.read_text(encoding="utf-8")


def test_missing_matplotlib_is_exit_2_with_the_hint(tmp_path, pages_made, monkeypatch, capsys):
    _, _, model, (clean, _) = pages_made

    def missing():
        raise pages.MissingPlotting("HTML reports need matplotlib: pip install \"boxwood[report]\"")

    monkeypatch.setattr(pages, "pyplot", missing)
    page, report = tmp_path / "r.html", tmp_path / "r.json"
    code = main(["verify", str(model), str(clean), "--quiet", "--report-html", str(page), "--report-json", str(report)])
    assert code == 2
    assert 'pip install "boxwood[report]"' in capsys.readouterr().err
    assert not page.exists()
    doc = json.loads(report.read_text(encoding="utf-8"))
    assert doc["verdict"] == "fail" and "boxwood[report]" in doc["error"]["message"]


def test_footprint_sources(tmp_path, pages_made):
    """Not known without a manifest; a python bundle manifest that lists the file with its
    SHA-256 gives the measured MicroPython heap; a manifest for other bytes is ignored."""
    _, _, _, (clean, _) = pages_made
    folder = tmp_path / "bundle"
    folder.mkdir()
    art = folder / "model.json"
    art.write_bytes(clean.read_bytes())
    result = verify(zoo.fitted(NAME).model, [str(art)], probes=0, progress=False)
    a = result.artefacts[0]
    assert footprint(a)["ram"] is None and "not known" in footprint(a)["what"]
    manifest = {"files": {"model.json": {"bytes": art.stat().st_size,
                                         "sha256": hashlib.sha256(art.read_bytes()).hexdigest()}},
                "footprint": {"artefact_bytes": art.stat().st_size, "trees": 1, "nodes": 1, "max_depth": 1,
                              "micropython": {"measured": True, "peak_bytes": 54321, "load_peak_bytes": 1,
                                              "load_live_bytes": 1, "module_bytes": 1, "model_bytes": 1,
                                              "record_bytes": 1, "micropython": "1.27.0", "how": "test"}}}
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    foot = footprint(a)
    assert foot["ram"] == 54321 and foot["flash"] == art.stat().st_size and "MicroPython" in foot["what"]
    assert verify_page(result).html().count("<img") == figure_count(result)  # the figure draws it
    manifest["files"]["model.json"]["sha256"] = "0" * 64
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    assert footprint(a)["ram"] is None


def test_c_tables_estimate(tmp_path):
    """A C file's const tables: element counts x sizes, at least 8 bytes per node value."""
    from boxwood.export import export

    case = zoo.fitted("gbr_squared_error")
    path = tmp_path / "m.c"
    try:
        export(case.model, str(path), "c")
    except Exception as exc:  # the post-write check compiles the file
        if "compiler" not in str(exc).lower():
            raise
        pytest.skip("no C compiler: %s" % exc)
    est = c_tables_bytes(path)
    _, ens, _ = zoo.exported("gbr_squared_error")
    assert est is not None and est >= 8 * ens.n_nodes
    assert c_tables_bytes(tmp_path / "nothere.c") is None


# ----------------------------------------------------------------------------- Chromium
def chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


def require_chromium():
    binary = chromium()
    if binary is None:
        reason = "headless Chromium not found (Debian: apt-get install chromium; .ci/run installs it)"
        if os.environ.get("CI"):
            pytest.fail("CI must render the HTML report, but: %s" % reason)
        pytest.skip(reason)
    return binary


def screenshot(binary, page, png, profile):
    cmd = [binary, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
           "--user-data-dir=%s" % profile, "--screenshot=%s" % png, "--window-size=1200,2400",
           Path(page).resolve().as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    assert proc.returncode == 0 and Path(png).is_file(), (cmd, proc.stdout[-2000:], proc.stderr[-2000:])
    return png


def blank_reason(png):
    """None when the screenshot shows something, else why it looks blank: fewer than 1% of
    the pixels away from white, or fewer than 16 distinct colours."""
    from PIL import Image

    with Image.open(png) as im:
        rgb = im.convert("RGB")
        small = rgb.resize((rgb.width // 2, rgb.height // 2))
        colours = small.getcolors(maxcolors=1 << 20) or []
        pixels = small.width * small.height
        non_white = sum(n for n, c in colours if min(c) < 245)
    if non_white < pixels // 100:
        return "%d of %d pixels are not white" % (non_white, pixels)
    if len(colours) < 16:
        return "%d distinct colours" % len(colours)
    return None


def test_pages_render_in_headless_chromium_and_are_not_blank(pages_made, tmp_path):
    binary = require_chromium()
    folder, out, _, _ = pages_made
    empty = tmp_path / "empty.html"
    empty.write_text("<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"><title>empty</title></head><body></body>"
                     "</html>\n", encoding="utf-8")
    shot = screenshot(binary, empty, tmp_path / "empty.png", tmp_path / "profile-empty")
    assert blank_reason(shot) is not None  # the check rejects a blank page
    for kind in ("clean", "faulty"):
        png = screenshot(binary, out[kind][2], tmp_path / ("%s.png" % kind), tmp_path / ("profile-" + kind))
        assert blank_reason(png) is None, (kind, blank_reason(png))
