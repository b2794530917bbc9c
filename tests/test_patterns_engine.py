"""The published adaptive exponential firing-pattern sets, simulated by protolang's Brian2 engine,
get the labels their paper gives them."""

from __future__ import annotations

import numpy as np
import pytest

from protolang.measure import cell as C
from protolang.plan.model import WaveSegment

from test_cell_features import NAUD_2008, NAUD_ONSET, NAUD_STEP
from test_engine import cell, make_plan

pytestmark = pytest.mark.brian2


@pytest.mark.slow
def test_naud_sets_through_the_engine():
    # Naud, Marcille, Clopath and Gerstner 2008, Biol Cybern 99:335-347: parameter sets and the
    # pattern each produces (Delta_T 2 mV, V_T -50 mV, spike cut at 0 mV, 600 ms steps).
    from protolang.engine import run_plan

    roles = []
    for k, (name, ((c, gl, el, a, tw, b, vr, i), _)) in enumerate(NAUD_2008.items()):
        r = cell(f"n{k}", 1, recorded=True, C=c * 1e-12, gL=gl * 1e-9, EL=el * 1e-3, VT=-50e-3, DeltaT=2e-3,
                 a=a * 1e-9, tau_w=tw * 1e-3, b=b * 1e-12, Vr=vr * 1e-3, Vcut=0.0, t_ref=0.0)
        r.segments = [WaveSegment("square", NAUD_ONSET, NAUD_ONSET + NAUD_STEP, amplitude=i * 1e-12)]
        roles.append(r)
    plan = make_plan(roles, n_repeat=1, dt=2.5e-5, sample_dt=1e-4, sweep_length=NAUD_ONSET + NAUD_STEP)
    rec = run_plan(plan, target="numpy")
    got = {}
    for k, name in enumerate(NAUD_2008):
        spikes = np.asarray(rec.spikes[f"n{k}"][0][0])
        got[name] = C.firing_pattern(spikes, NAUD_ONSET, NAUD_ONSET + NAUD_STEP).label
    expected = {name: label for name, (_, label) in NAUD_2008.items()}
    agree = [n for n in expected if got[n] == expected[n]]
    # the issue asks for at least 6 of the published patterns; report all disagreements
    assert len(agree) >= 6, {n: (got[n], expected[n]) for n in expected if got[n] != expected[n]}
    print({n: got[n] for n in expected})
