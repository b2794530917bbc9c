"""Round trip: a run exported to NWB, read back and analysed by the importer gives the run's own tables.

Checked against the outside world by pynwb (the NWB reference API) reading the file in
between, and by ``protolang compare`` finding zero difference between the model run and its
own export.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import protolang
from protolang.cli import main
from protolang.report.importer import import_recordings

pytestmark = [pytest.mark.brian2, pytest.mark.slow]

REPO = Path(__file__).resolve().parents[1]
CIRCUIT = REPO / "protolang" / "demo" / "slab.circuit.yaml"

TEMPLATE = """# Invented test protocol: small deep-pyramid pairs for the NWB round trip
protocol "NWB round trip ({mode})"
circuit "{circuit}" seed 5

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 4

sweeps 3 every 1 s

record pre: current clamp
record post: {record}

stimulate pre:
    train 3 pulses of 1.5 nA for 2 ms at 20 Hz from 50 ms
    pulse 1.5 nA for 2 ms at 400 ms

measure post:
    responses to pre
"""

MODES = {
    "current clamp": "current clamp, holding -70 mV, noise 0.03 mV",
    "voltage clamp": "voltage clamp, holding -70 mV",
}


@pytest.fixture(scope="module", params=sorted(MODES))
def exported(request, tmp_path_factory):
    mode = request.param
    folder = tmp_path_factory.mktemp(mode.replace(" ", "_"))
    path = folder / "pair.protocol"
    path.write_text(TEMPLATE.format(mode=mode, circuit=CIRCUIT, record=MODES[mode]))
    result = protolang.load(path).run(folder / "run", nwb=True)
    return mode, path, result


def _same(a: pd.DataFrame, b: pd.DataFrame, name: str) -> None:
    assert list(a.columns) == list(b.columns), name
    assert len(a) == len(b), name
    for col in a.columns:
        x, y = a[col], b[col]
        if pd.api.types.is_numeric_dtype(x) and pd.api.types.is_numeric_dtype(y) \
                and not pd.api.types.is_bool_dtype(x):
            np.testing.assert_allclose(x.to_numpy(dtype=float), y.to_numpy(dtype=float), rtol=1e-9, atol=1e-12,
                                       equal_nan=True, err_msg=f"{name}.{col}")
        else:
            assert x.astype(str).tolist() == y.astype(str).tolist(), f"{name}.{col}"


def test_export_reads_back_in_pynwb(exported):
    # pynwb, the NWB reference API (Rubel et al. 2022, eLife; from memory), reads the file on its
    # own, not through protolang's reader
    from pynwb import NWBHDF5IO

    mode, _path, result = exported
    nwb_path = result.out_dir / "recordings.nwb"
    with NWBHDF5IO(str(nwb_path), "r") as io:
        f = io.read()
        series = [s for s in f.acquisition.values()]
        plan = result.plan
        assert len(series) == 2 * plan.n_repeat * plan.n_sweeps        # pre and post recorded
        post = [s for s in series if "post" in s.electrode.name]
        expected_unit = "amperes" if mode == "voltage clamp" else "volts"
        assert {s.unit for s in post} == {expected_unit}
        assert {round(s.rate) for s in series} == {round(1 / plan.sample_dt)}


def test_import_of_the_export_gives_the_run_tables(exported, tmp_path):
    mode, path, result = exported
    back = import_recordings(path, tmp_path / "set", nwb=str(result.out_dir / "recordings.nwb"))
    # a lossless export and import must give the same numbers (common practice, no single source)
    for name in ("responses", "connections", "pathways"):
        _same(result.tables[name], back.tables[name], name)
    assert set(back.tables) == set(result.tables)


def test_compare_cli_finds_no_difference(exported, tmp_path, capsys):
    mode, path, result = exported
    assert main(["import", str(path), "--nwb", str(result.out_dir / "recordings.nwb"), "--out",
                 str(tmp_path / "set"), "--quiet"]) == 0
    assert main(["compare", str(result.out_dir), str(tmp_path / "set"), "--out", str(tmp_path / "cmp")]) == 0
    table = pd.read_csv(tmp_path / "cmp" / "tables" / "comparison.csv")
    judged = table[table["reference_sd"].notna()]
    assert len(judged) >= 5
    # every pair was chosen as connected in both: no probability row (it would measure nothing)
    assert "probability" not in set(table["measure"])
    # identical data: every difference is 0 and every judged measure agrees (the rule's arithmetic)
    assert np.allclose(judged["difference"].fillna(0.0), 0.0, atol=1e-9)
    assert (judged["agreement"] == "yes").all()
    out = capsys.readouterr().out
    assert "measures agree within 2 SD of the recordings" in out


def test_compare_refuses_a_model_run_as_recordings(exported, tmp_path, capsys):
    _mode, _path, result = exported
    assert main(["compare", str(result.out_dir), str(result.out_dir)]) == 1
    err = capsys.readouterr().err
    assert "is not a recording set" in err and "protolang import" in err


def test_provenance_lists_the_nwb_file(exported):
    _mode, _path, result = exported
    assert (result.out_dir / "recordings.nwb").stat().st_size > 10_000
    prov = json.loads((result.out_dir / "provenance.json").read_text())
    assert prov["nwb_file"] == "recordings.nwb" and prov["seed"] == 5
    assert Path(prov["protocol_path"]).is_absolute()


def test_simulated_data_stay_marked_after_import(exported, tmp_path, capsys):
    # the export says SIMULATED; read back it must not pass for recordings from cells
    from protolang.report.run_report import write_report

    _mode, path, result = exported
    back = import_recordings(path, tmp_path / "set", nwb=str(result.out_dir / "recordings.nwb"))
    assert back.provenance["simulated"] is True
    assert "SIMULATED data read back" in write_report(back.out_dir).read_text(encoding="utf-8")
    assert main(["compare", str(result.out_dir), str(tmp_path / "set")]) == 0
    assert "holds simulated data" in capsys.readouterr().err
    # the comparison may not overwrite a run folder's own tables
    assert main(["compare", str(result.out_dir), str(tmp_path / "set"), "--out", str(result.out_dir)]) == 1
    assert "would be replaced" in capsys.readouterr().err


CELLS = """# Invented test protocol: two classes characterised with a small step family
protocol "NWB round trip of the cell measures"
circuit "{circuit}" seed 4

bath:
    block AMPA
    block NMDA
    block GABA_A

cells:
    pyr is pyramidal_deep
    basket is basket_fast
    repeat 2

sweeps 4 every 2 s

record pyr: current clamp
record basket: current clamp

stimulate pyr:
    steps of -100 pA to 350 pA by 150 pA for 300 ms at 50 ms
stimulate basket:
    steps of -100 pA to 350 pA by 150 pA for 300 ms at 50 ms

measure pyr:
    passive
    firing
    fi
measure basket:
    passive
    firing
    fi
"""


def test_cell_measures_survive_the_round_trip(tmp_path):
    path = tmp_path / "cells.protocol"
    path.write_text(CELLS.format(circuit=CIRCUIT))
    result = protolang.load(path).run(tmp_path / "run", nwb=True)
    back = import_recordings(path, tmp_path / "set", nwb=str(result.out_dir / "recordings.nwb"))
    assert {"cells", "cell_sweeps", "classes"} <= set(result.tables)
    for name in ("cells", "cell_sweeps", "classes"):
        _same(result.tables[name], back.tables[name], name)


def test_import_with_another_protocol_names_both(exported, tmp_path):
    from protolang.language.errors import ProtocolError

    _mode, _path, result = exported
    other = tmp_path / "cells.protocol"
    other.write_text(CELLS.format(circuit=CIRCUIT))
    with pytest.raises(ProtocolError) as info:
        import_recordings(other, tmp_path / "set", nwb=str(result.out_dir / "recordings.nwb"))
    msg = str(info.value)
    assert "holds cells post, pre" in msg and "NWB round trip" in msg and "basket, pyr" in msg
    assert not (tmp_path / "set").exists()
