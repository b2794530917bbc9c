"""Tests of the replay library in protocols/: every replay checks, cites its sources, marks recalled values, and one runs.

The replays compare the invented demo circuit with published values (REFERENCES.md, the team's table of check values kept beside the repository,
section B). These tests do not ask the demo to agree with the papers (it is invented, and
disagreement is reported, not tuned away); they check that the library is well formed, that
every value REFERENCES.md tags as recalled from memory (status M) is marked `from memory`, and
that the comparison table of a real run is consistent with the tables it is computed from.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest

from protolang.api import load

ROOT = Path(__file__).resolve().parents[1]
LIBRARY = ROOT / "protocols"
PROTOCOLS = sorted(LIBRARY.glob("*.protocol"))
# The first "status X" in a reference's note is the REFERENCES.md tag of the published value itself
# (C: confirmed in a stored copy, C*: confirmed in a third-party reimplementation, M: from memory).
STATUS = re.compile(r"\bstatus (C\*|C|M)\b")
# Measured on this machine (cython target, warm cache): the shortest replay of the library, about 5 s;
# on the numpy target about 7 s.
SHORTEST = LIBRARY / "holmgren_2003_distance.protocol"
# Reference measure -> column of the `connections` table it is read from (docs/measures.md).
CONNECTION_COLUMNS = {"amplitude": "amplitude_mean_mV", "cv": "cv", "failures": "failure_rate",
                      "latency": "latency_ms", "rise": "rise_20_80_ms", "decay": "decay_tau_ms",
                      "ppr": "ppr", "recovery": "recovery_ratio"}


def test_the_library_holds_at_least_eight_replays():
    assert len(PROTOCOLS) >= 8, [p.name for p in PROTOCOLS]


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.stem)
def test_replay_passes_the_front_end_check_and_cites_a_source(path):
    experiment = load(path)
    experiment.check()      # raises ProtocolError on any error
    references = experiment.protocol.references
    assert references, f"{path.name} has no reference block"
    for ref in references:
        assert ref.authors.strip() and ref.journal.strip() and 1900 < ref.year < 2100, ref


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.stem)
def test_replay_runs_the_demo_circuit_and_says_so_in_its_header(path):
    text = path.read_text(encoding="utf-8")
    header = []
    for line in text.splitlines():
        if not line.startswith("#"):
            break
        header.append(line)
    header_text = "\n".join(header)
    assert header, f"{path.name} does not start with a comment block"
    assert "INVENTED" in header_text, f"{path.name}: the header must say the circuit is invented"
    assert "from memory" in header_text.lower(), f"{path.name}: the header must say which values are from memory"
    experiment = load(path)
    assert experiment.circuit_path == (ROOT / "demo" / "slab.circuit.yaml").resolve()


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.stem)
def test_values_recalled_from_memory_are_marked_so(path):
    # REFERENCES.md, legend: status M = "from memory, verify against the paper".
    for ref in load(path).protocol.references:
        where = f"{path.name}: reference {ref.measure} of {ref.cell} (line {ref.span.line})"
        assert ref.note, f"{where} has no note stating its REFERENCES.md status"
        found = STATUS.search(ref.note)
        assert found, f"{where}: the note {ref.note!r} names no REFERENCES.md status (C, C* or M)"
        if found.group(1) == "M":
            assert ref.from_memory, f"{where}: status M in the note but not marked `from memory`"


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.stem)
def test_every_condition_difference_is_accepted_knowingly(path):
    # A reference whose stated bath differs from the replay's must say `accept different ...`.
    assert load(path).check() == []


@pytest.mark.brian2
@pytest.mark.slow
def test_shortest_replay_runs_and_its_comparison_matches_its_own_tables():
    # A consistency check, not a check against the outside world: the comparison table's model
    # mean must equal the mean recomputed here, independently of protolang.measure.compare,
    # from the per-connection (`connections`) or per-cell (`cells`) table of the same run.
    experiment = load(SHORTEST)
    result = experiment.run(target="numpy")
    comparison = result.tables["comparison"]
    references = experiment.protocol.references
    assert len(comparison) == len(references)
    assert set(comparison["agreement"]) <= {"yes", "no", "no data"}
    for ref, (_, row) in zip(references, comparison.iterrows()):
        assert (row["measure"], row["cell"]) == (ref.measure, ref.cell)
        if ref.measure == "probability" or ref.measure in CONNECTION_COLUMNS:
            table = result.tables["connections"]
            rows = table[(table["post"] == ref.cell) & (table["pre"] == ref.source_cell)]
            if ref.measure == "probability":
                values = rows["connected"].astype(float).to_numpy()
            else:
                values = rows.loc[rows["connected"].astype(bool), CONNECTION_COLUMNS[ref.measure]]
                values = values.astype(float).to_numpy()
        else:
            pytest.fail(f"the consistency check does not know measure {ref.measure!r}")
        values = values[np.isfinite(values)]
        assert int(row["model_n"]) == values.size > 0
        assert math.isclose(float(row["model_mean"]), float(values.mean()), rel_tol=1e-12, abs_tol=1e-15)
        if row["agreement"] != "no data" and ref.rule == "absolute" and \
                ref.measure in ("probability", "cv", "failures", "ppr", "recovery"):
            # the judgement itself, recomputed for a unit-free measure: |model mean - published| <= tolerance
            agrees = abs(values.mean() - ref.value.si) <= ref.tolerance.si * (1 + 1e-9)
            assert row["agreement"] == ("yes" if agrees else "no")
