"""Bench sheet: content, stimulus charge, PDF pages, the model's predictions from a real run, and bad input."""

from __future__ import annotations

import argparse
import hashlib
import html
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import protolang
from protolang.language.errors import ProtocolError
from protolang.report import sheet as sheet_module
from protolang.report.sheet import MEASURED_COLUMN, NOTES_COLUMN, add_sheet_parser, write_sheet

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "protolang" / "demo"



@pytest.fixture(scope="module")
def protocol(small_pair_protocol) -> Path:
    return small_pair_protocol


@pytest.fixture(scope="module")
def plain_sheet(protocol, tmp_path_factory) -> dict:
    """A sheet without a run folder (no Brian2)."""
    return write_sheet(protocol, tmp_path_factory.mktemp("plain") / "sheet")


@pytest.fixture(scope="module")
def run_dir(small_pair_run) -> Path:
    """One small real run of the protocol (Brian2), shared with other test files."""
    return small_pair_run


def page_text(paths: dict) -> str:
    return html.unescape(paths["sheet.html"].read_text(encoding="utf-8"))


def read_stimulus(path: Path):
    lines = path.read_text().splitlines()
    header = [line[2:] for line in lines if line.startswith("#")]
    data = np.loadtxt(path, delimiter=",", comments="#", skiprows=len(header) + 1)
    return header, data


def pdf_pages(path: Path) -> int:
    """Page objects of a PDF (object dictionaries are not compressed by matplotlib)."""
    return len(re.findall(rb"/Type\s*/Page(?![a-zA-Z])", path.read_bytes()))


def _cli(argv):
    parser = argparse.ArgumentParser(prog="protolang")
    add_sheet_parser(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return args.func(args)


def test_sheet_states_solutions_cells_recording_timing_definitions_and_cautions(plain_sheet, protocol):
    assert set(plain_sheet) == {"sheet.html", "sheet.pdf", "stimuli/pre_sweeptype1.csv", "figures/pre_sweeptype1.png"}
    text = page_text(plain_sheet)
    # cautions, first thing on the page
    body = text[text.index("<body>"):]
    assert body.index("Read first") < body.index("Purpose")
    for needle in ("generated from an in-silico protocol run on a computational model",
                   "Model predictions are model outputs, not measurements",
                   "not a substitute for the lab's own approvals, safety rules and animal-care protocols",
                   "amplifier limits and the cell's health",
                   "under the lab's own standard operating procedures",
                   "describes itself as invented"):
        assert needle in text, needle
    # purpose: title, the file's comments, its name and sha256
    assert "small test: deep pyramid pairs" in text
    assert "Invented test scenario: deep pyramid pairs" in text
    assert hashlib.sha256(protocol.read_text().encode()).hexdigest() in text
    # solutions
    assert "<dt>calcium</dt><dd>2 mM (as the protocol states)</dd>" in text
    assert "<dt>magnesium</dt><dd>1 mM (as the protocol states)</dd>" in text
    assert "<dt>temperature</dt><dd>34 degC (the model circuit's default" in text
    assert "<dt>receptor blocks</dt><dd>none</dd>" in text
    # cells: class, layer, distance, connection, number wanted
    assert "within 150 um of pre (soma to soma)" in text
    assert "receiving a connection from pre" in text
    assert "deep (500 to 1100 um below the model slab's top face)" in text
    assert "4 pairs (the protocol's repeat 4)" in text
    # recording configuration; recording noise is not an instruction
    assert "-70 mV, reached by a bias current set per cell at the rig" in text
    assert "none (the cell at rest, no bias current)" in text
    assert "0.03 mV" not in text.split("Protocol file as written")[0]
    # timing table, events, sweeps
    assert ("<tr><td>pre</td><td>20</td><td>train</td><td>100</td><td>2 each</td><td>1.5 nA</td><td>20 Hz</td>"
            "<td>4</td><td>last pulse at 250 ms</td></tr>") in text
    assert "<td>pre</td><td>21</td><td>pulse</td><td>500</td><td>2</td><td>1.5 nA</td>" in text
    assert "100, 150, 200, 250, 500 (probe)" in text
    assert "<dt>sweeps</dt><dd>3, one every 1 s (start to start)</dd>" in text
    assert "<dt>sweep length</dt><dd>802 ms</dd>" in text
    # analysis definitions in words
    for needle in ("Paired-pulse ratio (PPR): mean second response / mean first response",
                   "Failure: an amplitude below 3 x the baseline noise SD", "or below 0.05 mV",
                   "CV: SD / mean of the first response", "over the 2 ms before each event",
                   "for up to 40 ms", "latency (ms)</dt>"):
        assert needle in text, needle
    # without a run: room for the measured values, no model numbers
    assert "No model run was given" in text
    assert f"<th>{MEASURED_COLUMN}</th><th>{NOTES_COLUMN}</th>" in text
    # self-contained: the figure is embedded
    assert '<img src="data:image/png;base64,' in text
    assert 'src="figures/' not in text


def test_sheet_charge_equals_the_integral_of_its_stimulus_file(plain_sheet):
    header, data = read_stimulus(plain_sheet["stimuli/pre_sweeptype1.csv"])
    dt = np.diff(data[:, 0])
    np.testing.assert_allclose(dt, 1 / 20e3, rtol=0, atol=1e-12)
    q_file = data[:, 1].sum() * 1e-12 / 20e3          # sample-and-hold: rectangle sum
    # Q = I x t: 5 pulses of 1.5 nA for 2 ms (common practice, no single source)
    assert q_file == pytest.approx(5 * 1.5e-9 * 2e-3, rel=1e-9)
    text = page_text(plain_sheet)
    stated = f"{q_file * 1e12:.4g}"
    assert stated == "15"
    assert f"<td>pre</td><td>1 of 1</td><td>1-3</td><td>0 to 1500 pA</td><td>{stated}</td>" in text
    assert f"injected charge {stated} pC per sweep" in text
    assert any(line.startswith(f"injected charge: {stated} pC per sweep") for line in header)


def test_pdf_is_a_multi_page_document(plain_sheet):
    pdf = plain_sheet["sheet.pdf"]
    assert pdf.read_bytes()[:5] == b"%PDF-"
    assert pdf_pages(pdf) > 1


def test_voltage_clamp_scan_point(tmp_path):
    paths = write_sheet(DEMO / "epsc_train_frequencies.protocol", tmp_path / "sheet", point=2)
    text = page_text(paths)
    assert "3 of 3: @rate = 50 Hz" in text
    assert "<td>50 Hz</td><td>8</td><td>last pulse at 240 ms</td>" in text
    assert "-70 mV command potential" in text
    assert "<td>10 MOhm</td>" in text
    assert "an inward current counts positive" in text
    assert "<td>amplitude</td><td>post</td><td>pre</td><td>pA</td>" in text
    header, data = read_stimulus(paths["stimuli/post_sweeptype1.csv"])
    np.testing.assert_allclose(data[:, 1], -70.0)          # no command steps: the holding potential throughout


def _protocol_copy(protocol: Path, folder: Path, edit: str = "") -> Path:
    path = folder / "copy.protocol"
    path.write_text(protocol.read_text() + edit)
    return path


def _fake_run(folder: Path, sha: str, tables: bool, circuit: str | None = None, kind: str | None = None) -> Path:
    folder.mkdir(parents=True)
    prov = {"protocol_sha256": sha, "circuit_sha256": circuit}
    if kind:
        prov["kind"] = kind
    (folder / "provenance.json").write_text(json.dumps(prov))
    if tables:
        (folder / "tables").mkdir()
    return folder


def test_bad_input_gives_clear_errors_and_writes_nothing(protocol, tmp_path):
    out = tmp_path / "sheet"
    sha = hashlib.sha256(protocol.read_text().encode()).hexdigest()
    circuit = protolang.load(protocol).plan().circuit_hash
    cases = [
        (dict(protocol_path=tmp_path / "missing.protocol"), "protocol file", "not found"),
        (dict(run_dir=tmp_path / "no_run"), "run folder", "not found"),
        (dict(run_dir=tmp_path), "provenance.json", "not a run folder"),
        (dict(run_dir=_fake_run(tmp_path / "other", "0" * 64, tables=True)), "another protocol text",
         "predictions would be for another protocol"),
        (dict(run_dir=_fake_run(tmp_path / "empty", sha, tables=True, circuit=circuit)), "has no table 'connections'",
         "tables/connections.parquet"),
        # predictions of another circuit, or a lab's recordings shown as model output, would mislead
        (dict(run_dir=_fake_run(tmp_path / "recircuited", sha, tables=True, circuit="0" * 64)), "another circuit",
         "predictions would be for another model"),
        (dict(run_dir=_fake_run(tmp_path / "lab", sha, tables=True, circuit=circuit, kind="recordings")),
         "is a recording set", "model outputs only"),
        (dict(point=3), "--point 4 is outside", "1 to 1"),
    ]
    for kwargs, needle, more in cases:
        args = dict(protocol_path=protocol, out_dir=out) | kwargs
        with pytest.raises(ProtocolError) as exc:
            write_sheet(**args)
        message = str(exc.value)
        assert needle in message and more in message, message
        if "run_dir" in kwargs:
            assert "expected:" in message and "hint:" in message
        assert not out.exists()
    for bad in ("fast", "-5 kHz", "3 mV"):
        with pytest.raises(ProtocolError, match="--rate") as exc:
            _cli(["sheet", str(protocol), "--out", str(out), "--rate", bad])
        assert "expected:" in str(exc.value)
        assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]


def test_existing_folder_needs_force_and_a_failure_leaves_nothing(protocol, tmp_path, monkeypatch, capsys):
    out = tmp_path / "sheet"
    out.mkdir()
    with pytest.raises(ProtocolError, match="already exists") as exc:
        _cli(["sheet", str(protocol), "--out", str(out)])
    assert "--force" in str(exc.value)
    assert list(out.iterdir()) == []
    assert _cli(["sheet", str(protocol), "--out", str(out), "--force", "--rate", "10 kHz"]) == 0
    assert "approvals" in capsys.readouterr().out
    assert (out / "sheet.pdf").exists()
    header, data = read_stimulus(out / "stimuli" / "pre_sweeptype1.csv")
    assert any(line.startswith("sample rate: 10000 Hz") for line in header)
    (out / "mine.txt").write_text("keep")
    with pytest.raises(ProtocolError, match="did not write"):
        _cli(["sheet", str(protocol), "--out", str(out), "--force"])
    assert (out / "mine.txt").exists()

    def broken(*args, **kwargs):
        raise RuntimeError("disk full")
    monkeypatch.setattr(sheet_module, "render_pdf", broken)
    fresh = tmp_path / "fresh"
    with pytest.raises(RuntimeError):
        write_sheet(protocol, fresh)
    assert not fresh.exists()
    assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]


def _cell(value) -> str:
    return "" if isinstance(value, float) and np.isnan(value) else (
        str(int(value)) if isinstance(value, (int, np.integer)) else f"{value:.4g}")


@pytest.mark.brian2
@pytest.mark.slow
def test_predictions_are_the_run_tables_numbers(protocol, run_dir, tmp_path, capsys):
    out = tmp_path / "sheet"
    assert _cli(["sheet", str(protocol), "--out", str(out), "--run", str(run_dir)]) == 0
    text = html.unescape((out / "sheet.html").read_text(encoding="utf-8"))
    assert "Model outputs, not measurements" in text
    assert str(run_dir) in text
    pathways = pd.read_csv(run_dir / "tables" / "pathways.csv")
    row = pathways[pathways["pathway"] == "pyramidal_deep->pyramidal_deep"].iloc[0]
    assert int(row["n_pairs"]) == 4
    expected = {"amplitude": ("amplitude_mean_mV", "mV"), "cv": ("cv", ""), "failures": ("failure_rate", "fraction"),
                "latency": ("latency_ms", "ms"), "rise": ("rise_20_80_ms", "ms"), "decay": ("decay_tau_ms", "ms"),
                "ppr": ("ppr", ""), "recovery": ("recovery_ratio", "")}
    for measure, (metric, unit) in expected.items():
        mean, sd, n = row[f"{metric}_mean"], row[f"{metric}_sd"], int(row[f"{metric}_n"])
        line = (f"<tr><td>{measure}</td><td>post</td><td>pre</td><td>{unit}</td><td class=\"num\">{_cell(mean)}</td>"
                f"<td class=\"num\">{_cell(sd)}</td><td class=\"num\">{n}</td>"
                f"<td class=\"blank\"></td><td class=\"blank\"></td></tr>")
        assert line in text, measure
    # every pair was chosen connected: the sheet does not offer a connection probability to measure
    assert "<td>probability</td>" not in text
    assert pdf_pages(out / "sheet.pdf") > 1


@pytest.mark.brian2
@pytest.mark.slow
def test_run_of_another_protocol_text_is_refused(protocol, run_dir, tmp_path):
    changed = _protocol_copy(protocol, tmp_path, edit="# an added comment changes the text\n")
    with pytest.raises(ProtocolError) as exc:
        write_sheet(changed, tmp_path / "sheet", run_dir=run_dir)
    message = str(exc.value)
    assert "another protocol text" in message
    assert "hint: give the run folder of this protocol, or run it again: protolang run" in message
    assert not (tmp_path / "sheet").exists()
    # the unchanged copy matches the run (the hash is of the text, not of the file name)
    same = tmp_path / "same"
    same.mkdir()
    shutil.copy(protocol, same / "renamed.protocol")
    paths = write_sheet(same / "renamed.protocol", tmp_path / "ok", run_dir=run_dir)
    assert "Model outputs, not measurements" in paths["sheet.html"].read_text(encoding="utf-8")
