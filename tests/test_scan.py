"""Scans: `scan @name: ...` lines, one run point per value, combined tables and figures."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.language import format_protocol, parse
from protolang.language.errors import ProtocolError

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo"

TEMPLATE = f"""\
protocol "scan test"
circuit "{DEMO / 'slab.circuit.yaml'}" seed 5
{{scans}}
bath:
    calcium @ca
cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 3
sweeps 4 every 10 s
record pre: current clamp
record post: current clamp, holding -70 mV
stimulate pre:
    train 3 pulses of @amp for 2 ms at @rate from 60 ms
measure post:
    responses to pre
"""


def src(scans: str) -> str:
    return TEMPLATE.format(scans=scans)


GOOD = "scan @ca: 1 mM to 2 mM in 3 steps\nscan @amp: 1.5 nA\nscan @rate: 10 Hz to 40 Hz by 10 Hz"


def test_grid_of_points_in_order():
    p = parse(src(GOOD), "s.protocol")
    assert [x.name for x in p.scans] == ["ca", "amp", "rate"]
    assert [str(q) for q in p.scans[0].values] == ["1 mM", "1.5 mM", "2 mM"]
    assert [str(q) for q in p.scans[2].values] == ["10 Hz", "20 Hz", "30 Hz", "40 Hz"]
    assert len(p.points) == 3 * 1 * 4
    grid = [tuple(str(q) for _, q in pt.values) for pt in p.points]
    assert grid == [tuple(map(str, c)) for c in itertools.product(*(x.values for x in p.scans))]
    pt = p.points[5]
    assert dict(pt.values)["ca"].value == 1.5 and dict(pt.values)["rate"].value == 20
    bath = pt.protocol.bath[0]
    assert bath.value.si == pytest.approx(1.5) and bath.value.span.line == 7   # points at `@ca`
    assert pt.protocol.stimuli[0].items[0].rate.si == 20


def test_scan_round_trips_through_the_formatter():
    p = parse(src(GOOD), "s.protocol")
    q = parse(format_protocol(p), "t.protocol")
    assert q == p and len(q.points) == len(p.points)


@pytest.mark.parametrize("scans,line,col,needle", [
    ("scan @ca: 1 mM to 2 mM in 0 steps\nscan @amp: 1 nA\nscan @rate: 10 Hz", 3, 27, "at least 1"),
    ("scan @ca: 1 mM to 2 mM in 1 steps\nscan @amp: 1 nA\nscan @rate: 10 Hz", 3, 27, "at least 2 steps"),
    ("scan @ca: 1 mM to 2 mM by 0 mM\nscan @amp: 1 nA\nscan @rate: 10 Hz", 3, 27, "step of zero"),
    ("scan @ca: 2 mM to 1 mM by 0.5 mM\nscan @amp: 1 nA\nscan @rate: 10 Hz", 3, 27, "goes away from"),
    ("scan @ca: 1 mM, 2 mV\nscan @amp: 1 nA\nscan @rate: 10 Hz", 3, 11, "share a dimension"),
    ("scan @ca: 1 mM\nscan @amp: 1 nA", 15, 40, "@rate is not scanned"),
    ("scan @ca: 1 mM\nscan @amp: 1 nA\nscan @rate: 10 Hz\nscan @unused: 1 ms", 6, 1, "never used"),
    ("scan @ca: 1 mM\nscan @amp: 1 nA\nscan @rate: 10 Hz, 600 Hz", 16, 40, "frequency too high"),
    ("scan @ca: 1 mM\nscan @amp: 1 mV\nscan @rate: 10 Hz", 16, 23, "needs a current"),
    ("scan @ca: 1 mM\nscan @ca: 2 mM\nscan @amp: 1 nA\nscan @rate: 10 Hz", 4, 1, "duplicate scan @ca"),
])
def test_scan_errors(scans, line, col, needle):
    with pytest.raises(ProtocolError) as info:
        parse(src(scans), "s.protocol")
    text = str(info.value)
    assert f"s.protocol:{line}:{col}: error:" in text, text
    assert needle in text, text


def test_scan_point_errors_name_the_point():
    with pytest.raises(ProtocolError) as info:
        parse(src("scan @ca: 1 mM\nscan @amp: 1 nA\nscan @rate: 10 Hz, 600 Hz"), "s.protocol")
    assert "(at scan point @ca = 1 mM, @amp = 1 nA, @rate = 600 Hz)" in str(info.value)


@pytest.mark.brian2
@pytest.mark.slow
def test_scan_run_combines_points_and_follows_calcium(tmp_path):
    path = tmp_path / "s.protocol"
    path.write_text(src("scan @ca: 1 mM, 2 mM\nscan @amp: 1.5 nA\nscan @rate: 20 Hz"))
    exp = protolang.load(path)
    out = tmp_path / "run"
    result = exp.run(out, target="numpy")
    conn = result.tables["connections"]
    assert list(conn.columns[:4]) == ["point", "scan_ca_mM", "scan_amp_nA", "scan_rate_Hz"]
    assert len(conn) == 2 * 3
    # same seed: the same pairs at each point (selection does not depend on calcium)
    a, b = (conn[conn["point"] == k][["pre_id", "post_id"]].to_numpy() for k in (1, 2))
    assert np.array_equal(a, b)
    # the plan of each point carries its calcium; release probability follows the Hill law
    u1 = result.points[0].plan.synapses[0].U
    u2 = result.points[1].plan.synapses[0].U
    assert (u1 < u2).all()
    for rel in ("tables/connections.csv", "tables/pathways.parquet", "points/01/plan.json",
                "points/02/tables/responses.csv", "points/02/recordings.npz", "provenance.json",
                "figures/scan_amplitude_mean_mV_mean.png"):
        assert (out / rel).is_file(), rel
