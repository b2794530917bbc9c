"""Run folder report: a real run's report.html opened from disk in headless Chromium, its DOM and
screenshot checked; scans, recording sets, big tables and bad input."""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import protolang
from protolang.language.errors import ProtocolError
from conftest import SMALL_PAIR_EVENTS
from protolang.report.run_report import MAX_TABLE_ROWS, add_report_parser, write_report

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync"]
SECTIONS = ["Contents", "Summary", "Protocol", "Tables", "Figures", "Resolved plan", "Provenance", "Files"]



# -- helpers --------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def run_folder(small_pair_run) -> Path:
    """One real run, shared by the tests (tests copy it before changing it)."""
    return small_pair_run


def copy_run(run_folder: Path, tmp_path: Path) -> Path:
    folder = tmp_path / "run"
    shutil.copytree(run_folder, folder, ignore=shutil.ignore_patterns("report.html", "recordings.npz"))
    return folder


def need_chromium() -> None:
    if not CHROMIUM.exists():
        pytest.fail(f"{CHROMIUM} is missing: install Chromium (`make test` installs it, or "
                    f"`apt-get install -y chromium` on Debian) to test the HTML report")


def chromium(page: Path, workdir: Path, *extra: str) -> subprocess.CompletedProcess:
    """Open ``page`` from a file:// URL in headless Chromium with a fresh profile."""
    need_chromium()
    profile = tempfile.mkdtemp(prefix="chromium-profile-", dir=workdir)
    cmd = [str(CHROMIUM), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *extra, page.resolve().as_uri()]
    try:
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=60, cwd=workdir)
    except subprocess.TimeoutExpired:
        pytest.fail(f"headless Chromium did not finish within 60 s: {' '.join(cmd)}")
    assert done.returncode == 0, f"chromium failed ({done.returncode}): {done.stderr[-2000:]}"
    return done


class Dom(HTMLParser):
    """What the tests read from a page: element ids, section headings, tables, images, links."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.ids: dict[str, dict] = {}
        self.h2: list[str] = []
        self.title = ""
        self.h1 = ""
        self.images: list[str] = []
        self.links: list[str] = []
        self.scripts: list[dict] = []
        self.tables: list[dict] = []       # {"classes", "section", "header", "rows": [[cell text]]}
        self.pre: list[str] = []
        self._sections: list[str | None] = []
        self._row: list[str] = []
        self._row_has_td = False
        self._tag_text: str | None = None
        self._buf: list[str] = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids[a["id"]] = a
        if tag == "section":
            self._sections.append(a.get("id"))
        elif tag == "table":
            self.tables.append({"classes": (a.get("class") or "").split(), "header": [], "rows": [],
                                "section": next((s for s in reversed(self._sections) if s), None)})
        elif tag == "tr" and self.tables:
            self._row, self._row_has_td = [], False
        elif tag in ("td", "th", "h2", "h1", "title", "pre"):
            self._tag_text, self._buf = tag, []
        elif tag == "img":
            self.images.append(a.get("src") or "")
        elif tag in ("a", "link"):
            self.links.append(a.get("href") or "")
        elif tag == "script":
            self.scripts.append(a)

    def handle_endtag(self, tag):
        if tag == "section" and self._sections:
            self._sections.pop()
        elif tag in ("td", "th", "h2", "h1", "title", "pre") and self._tag_text == tag:
            text = "".join(self._buf)
            self._tag_text = None
            if tag in ("td", "th"):
                self._row.append(text)
                self._row_has_td |= tag == "td"
                if tag == "th":
                    self.tables[-1]["header"].append(text)
            elif tag == "h2":
                self.h2.append(text)
            elif tag == "pre":
                self.pre.append(text)
            else:
                setattr(self, tag, text)
        elif tag == "tr" and self.tables:
            if self._row_has_td:           # a data row (the header row holds th cells only)
                self.tables[-1]["rows"].append(self._row)
            self._row, self._row_has_td = [], False

    def handle_data(self, data):
        if self._tag_text is not None:
            self._buf.append(data)

    def table_in(self, section: str) -> dict:
        found = [t for t in self.tables if t["section"] == section]
        assert len(found) == 1, f"expected one table in section {section!r}, found {len(found)}"
        return found[0]


def dumped_dom(page: Path, workdir: Path) -> Dom:
    return Dom(chromium(page, workdir, "--dump-dom").stdout)


def render_status(dom: Dom) -> tuple[int, int, int]:
    status = dom.ids.get("render-status")
    assert status is not None, "the page has no render-status element"
    assert "data-images" in status, "the page's inline script did not run (no data-images attribute)"
    return int(status["data-images"]), int(status["data-images-loaded"]), int(status["data-tables"])


# -- the real run in a browser --------------------------------------------------------------------
@pytest.mark.brian2
@pytest.mark.slow
def test_report_renders_tables_and_figures_in_chromium(run_folder, tmp_path):
    folder = copy_run(run_folder, tmp_path)
    page = write_report(folder)
    assert page == folder / "report.html" and page.is_file()
    source = page.read_text(encoding="utf-8")
    dom = dumped_dom(page, tmp_path)

    # Independent check: Chromium's own HTML parser, script engine and PNG decoder (common
    # practice, no single source) against the files of the run folder read by pandas and pathlib.
    pngs = sorted((folder / "figures").glob("*.png"))
    csvs = sorted((folder / "tables").glob("*.csv"))
    assert len(pngs) >= 2 and len(csvs) >= 3
    images, loaded, tables = render_status(dom)
    assert images == len(pngs), f"{images} images on the page, {len(pngs)} PNG files in figures/"
    assert loaded == images, f"only {loaded} of {images} figures decoded in Chromium"
    assert tables == len(csvs)
    assert all(src.startswith("data:image/png;base64,") for src in dom.images)

    plan = json.loads((folder / "plan.json").read_text())
    assert dom.title == plan["title"] == dom.h1
    assert dom.h2 == SECTIONS
    # every link of the contents list leads to an element of the page
    local = [h for h in dom.links if h.startswith("#")]
    assert len(local) >= len(SECTIONS) - 1 + len(csvs) + len(pngs)
    missing = [h for h in local if h[1:] not in dom.ids]
    assert not missing, f"contents links without a target: {missing}"

    # the connections table: header = the CSV's columns, one data row per tested pair
    connections = pd.read_csv(folder / "tables" / "connections.csv")
    shown = dom.table_in("table-connections")
    assert shown["header"] == list(connections.columns)
    assert len(shown["rows"]) == len(connections) == plan["n_repeat"] == 4
    col = list(connections.columns).index("distance_um")
    shown_distance = np.array([float(r[col]) for r in shown["rows"]])
    np.testing.assert_allclose(shown_distance, connections["distance_um"].to_numpy(), rtol=1e-3)
    responses = pd.read_csv(folder / "tables" / "responses.csv")
    assert len(dom.table_in("table-responses")["rows"]) == len(responses) == 4 * 3 * SMALL_PAIR_EVENTS  # pairs x sweeps x events

    # the protocol text that ran is shown, since the file is unchanged
    protocol_text = Path(json.loads((folder / "provenance.json").read_text())["protocol_file"]).read_text()
    assert protocol_text.strip() in [p.strip() for p in dom.pre]

    # self-contained: nothing is fetched from anywhere (no external scripts, styles, fonts, images)
    assert not any(s.get("src") for s in dom.scripts)
    for needle in ('src="http', "src='http", 'src="//', "<link", "@import", "url(http", "@font-face"):
        assert needle not in source, f"the page refers to something outside itself: {needle}"


@pytest.mark.brian2
@pytest.mark.slow
def test_report_screenshot_is_not_blank(run_folder, tmp_path):
    from PIL import Image

    folder = copy_run(run_folder, tmp_path)
    page = write_report(folder)
    shot = tmp_path / "shot.png"
    chromium(page, tmp_path, "--hide-scrollbars", "--window-size=1200,1600", f"--screenshot={shot}")
    # Independent check: Pillow decodes the PNG Chromium wrote (common practice, no single source).
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.shape == (1600, 1200)
    inked = float(np.mean(pixels < 200))
    assert inked > 0.01, f"the screenshot is nearly blank ({inked:.2%} of pixels not white)"
    assert float(np.mean(pixels < 60)) > 0.002, "no dark pixels: no text was drawn"


@pytest.mark.brian2
@pytest.mark.slow
def test_damaged_figure_is_counted_as_not_shown(run_folder, tmp_path):
    folder = copy_run(run_folder, tmp_path)
    pngs = sorted((folder / "figures").glob("*.png"))
    broken = pngs[0]
    broken.write_bytes(broken.read_bytes()[:120])       # PNG signature and header, no image data
    dom = dumped_dom(write_report(folder), tmp_path)
    images, loaded, _ = render_status(dom)
    # Independent check: Chromium's PNG decoder refuses a truncated file (common practice, no single source).
    assert images == len(pngs) and loaded == len(pngs) - 1
    assert dom.ids["render-status"].get("class") == "caution"


@pytest.mark.brian2
@pytest.mark.slow
def test_report_without_figures_still_works(run_folder, tmp_path):
    folder = copy_run(run_folder, tmp_path)
    shutil.rmtree(folder / "figures")
    page = write_report(folder)
    assert "no figures" in page.read_text(encoding="utf-8")
    dom = dumped_dom(page, tmp_path)
    assert render_status(dom) == (0, 0, len(list((folder / "tables").glob("*.csv"))))
    assert dom.h2 == SECTIONS


@pytest.mark.brian2
@pytest.mark.slow
def test_report_command_writes_where_asked(run_folder, tmp_path, capsys):
    folder = copy_run(run_folder, tmp_path)
    parser = argparse.ArgumentParser(prog="protolang")
    add_report_parser(parser.add_subparsers(dest="command", required=True))
    out = tmp_path / "elsewhere" / "pair.html"
    args = parser.parse_args(["report", str(folder), "--out", str(out)])
    assert args.func(args) == 0
    printed = capsys.readouterr().out
    assert str(out.resolve()) in printed and out.resolve().as_uri() in printed
    assert out.is_file() and not (folder / "report.html").exists()
    assert "<h2>Tables</h2>" in out.read_text(encoding="utf-8")
    # an existing folder as --out gets report.html inside it
    args = parser.parse_args(["report", str(folder), "--out", str(tmp_path)])
    assert args.func(args) == 0 and (tmp_path / "report.html").is_file()


@pytest.mark.brian2
@pytest.mark.slow
def test_protocol_text_only_when_unchanged(run_folder, tmp_path):
    folder = copy_run(run_folder, tmp_path)
    prov_path = folder / "provenance.json"
    prov = json.loads(prov_path.read_text())
    protocol_text = Path(prov["protocol_file"]).read_text()

    prov["protocol_sha256"] = "0" * 64
    prov_path.write_text(json.dumps(prov))
    dom = Dom(write_report(folder).read_text(encoding="utf-8"))
    assert protocol_text.strip() not in [p.strip() for p in dom.pre]
    assert "has changed since the run" in (folder / "report.html").read_text(encoding="utf-8")

    prov["protocol_file"] = str(tmp_path / "gone.protocol")
    prov.pop("protocol_path", None)
    prov_path.write_text(json.dumps(prov))
    assert "no longer exists" in write_report(folder).read_text(encoding="utf-8")


@pytest.mark.brian2
@pytest.mark.slow
def test_protocol_text_found_from_another_folder(run_folder, tmp_path, monkeypatch):
    # a relative protocol_file is found through the absolute path the run also recorded
    folder = copy_run(run_folder, tmp_path)
    prov_path = folder / "provenance.json"
    prov = json.loads(prov_path.read_text())
    absolute = Path(prov["protocol_path"])
    prov["protocol_file"] = absolute.name          # as if run from the protocol's own folder
    prov_path.write_text(json.dumps(prov))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    text = write_report(folder).read_text(encoding="utf-8")
    assert "unchanged since the run" in text and "no longer exists" not in text


@pytest.mark.brian2
@pytest.mark.slow
def test_scan_recording_set_and_comparison_folders(run_folder, tmp_path):
    # a scanned run keeps its plans in points/NN/plan.json and no plan.json of its own
    scan = copy_run(run_folder, tmp_path)
    (scan / "points" / "01").mkdir(parents=True)
    (scan / "plan.json").rename(scan / "points" / "01" / "plan.json")
    prov = json.loads((scan / "provenance.json").read_text())
    prov["scan_points"] = [{"calcium": "1.0 mM"}, {"calcium": "2.0 mM"}]
    (scan / "provenance.json").write_text(json.dumps(prov))
    text = write_report(scan).read_text(encoding="utf-8")
    assert "points/01/plan.json" in text and "2 points: @calcium = 1.0 mM; @calcium = 2.0 mM" in text

    # a recording set: provenance of kind "recordings" without an engine section
    rec = tmp_path / "recset"
    shutil.copytree(run_folder, rec, ignore=shutil.ignore_patterns("report.html", "recordings.npz"))
    (rec / "provenance.json").write_text(json.dumps({
        "kind": "recordings", "protocol_file": None, "sources": [{"file": "pair01.csv", "sha256": "ab" * 32}],
        "conditions_recorded": {"calcium_mM": 2.0, "blocks": {}}, "timings": {"import_s": 0.25}}))
    text = write_report(rec).read_text(encoding="utf-8")
    assert "recordings are not simulated" in text and "Report of a recording set" in text
    assert "imported (not simulated): pair01.csv" in text and "import time" in text
    assert Dom(text).table_in("provenance")["rows"] == [["pair01.csv", "ab" * 32]]

    # a comparison table leads the tables
    pd.DataFrame({"measure": ["ppr"], "model_mean": [0.8], "agreement": ["yes"]}).to_csv(
        rec / "tables" / "comparison.csv", index=False)
    text = write_report(rec).read_text(encoding="utf-8")
    assert "Agreement with the published references (1): 1 yes." in text
    dom = Dom(text)
    data = [t["section"] for t in dom.tables if "data" in t["classes"]]
    assert data[0] == "table-comparison" and len(data) == 1 + len(list((run_folder / "tables").glob("*.csv")))


# -- folders made by hand (no Brian2) -------------------------------------------------------------
def minimal_folder(path: Path) -> Path:
    (path / "tables").mkdir(parents=True)
    (path / "plan.json").write_text(json.dumps({"title": "hand-made folder"}))
    (path / "provenance.json").write_text(json.dumps({"seed": 3}))
    return path


def test_long_table_is_cut_with_a_note(tmp_path):
    folder = minimal_folder(tmp_path / "big")
    n = MAX_TABLE_ROWS + 250
    frame = pd.DataFrame({"row": np.arange(n), "value_mV": np.linspace(0, 1, n),
                          "label": ["two\nlines" if i == 3 else f"r{i}" for i in range(n)]})
    frame.to_csv(folder / "tables" / "big.csv", index=False)
    dom = Dom(write_report(folder).read_text(encoding="utf-8"))
    shown = dom.table_in("table-big")
    assert len(shown["rows"]) == MAX_TABLE_ROWS
    assert [int(r[0]) for r in shown["rows"]] == list(range(MAX_TABLE_ROWS))
    text = (folder / "report.html").read_text(encoding="utf-8")
    # the row count comes from the CSV itself (a quoted line break is one row, as pandas reads it)
    assert f"{n} rows, 3 columns" in text and "250 more rows not shown; the full table is in tables/big.csv" in text
    assert "not available" in text.lower()       # no protocol file recorded
    assert "no figures" in text


def assert_nothing_written(folder: Path) -> None:
    if folder.is_dir():
        left = [p.name for p in folder.iterdir() if p.name.endswith(".html") or p.name.startswith(".partial-")]
        assert not left, f"half-written output left behind: {left}"


def test_bad_input_gives_clear_errors(tmp_path):
    missing = tmp_path / "no_such_run"
    with pytest.raises(ProtocolError) as exc:
        write_report(missing)
    msg = str(exc.value)
    assert str(missing) in msg and "not found" in msg and "protolang run FILE --out DIR" in msg

    a_file = tmp_path / "plain.txt"
    a_file.write_text("not a folder")
    with pytest.raises(ProtocolError, match="is not a folder"):
        write_report(a_file)

    no_plan = minimal_folder(tmp_path / "no_plan")
    (no_plan / "plan.json").unlink()
    with pytest.raises(ProtocolError) as exc:
        write_report(no_plan)
    msg = str(exc.value)
    assert "plan.json" in msg and "not found" in msg and "expected:" in msg and "hint:" in msg
    assert_nothing_written(no_plan)

    no_prov = minimal_folder(tmp_path / "no_prov")
    (no_prov / "provenance.json").unlink()
    with pytest.raises(ProtocolError, match="provenance.json"):
        write_report(no_prov)
    assert_nothing_written(no_prov)

    bad_json = minimal_folder(tmp_path / "bad_json")
    (bad_json / "plan.json").write_text('{"title": "cut short",\n "seed": ')
    with pytest.raises(ProtocolError) as exc:
        write_report(bad_json)
    assert "plan.json" in str(exc.value) and "not valid JSON (line 2" in str(exc.value)
    assert_nothing_written(bad_json)

    not_object = minimal_folder(tmp_path / "list_json")
    (not_object / "provenance.json").write_text("[1, 2]")
    with pytest.raises(ProtocolError, match="JSON list, not an object"):
        write_report(not_object)

    bad_table = minimal_folder(tmp_path / "bad_table")
    (bad_table / "tables" / "broken.csv").write_bytes(b"a,b\n\xff\xfe,1\n")
    with pytest.raises(ProtocolError) as exc:
        write_report(bad_table)
    assert "broken.csv" in str(exc.value) and "cannot be read" in str(exc.value)
    assert_nothing_written(bad_table)
