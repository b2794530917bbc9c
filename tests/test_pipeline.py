"""Whole pipeline against the outside world: calcium law measured from simulated release, packaging."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.plan.resolve import hill

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo"

CALCIUM = f"""\
protocol "release probability at {{ca}} mM calcium"
circuit "{DEMO / 'slab.circuit.yaml'}" seed 21

bath:
    calcium {{ca}} mM

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 200 um of pre, receiving from pre
    repeat 40

sweeps 40 every 10 s, lasting 60 ms

record post: current clamp, holding -70 mV

stimulate pre:
    spikes at 20 ms
"""


def _first_release_fraction(ca: str, tmp_path):
    from protolang.engine import run_plan

    path = tmp_path / f"ca{ca}.protocol"
    path.write_text(CALCIUM.format(ca=ca))
    plan = protolang.load(path).plan()
    rec = run_plan(plan, target="numpy", record_release=True)
    syn = next(s for s in plan.synapses if s.name == "pre_to_post")
    released = rec.release["pre_to_post"][:, :, 0]            # (repeats, sweeps) sites released
    sites = syn.n_sites[:, None] * np.ones_like(released)
    return released.sum() / sites.sum(), plan, syn, released


@pytest.mark.brian2
@pytest.mark.slow
def test_calcium_ratio_of_release_probability_follows_hill_law(tmp_path):
    # Hill law with cooperativity ~4 (Dodge and Rahamimoff 1967, J Physiol 193:419-432); the
    # release probability per site is measured from the simulated stochastic release.
    p_lo, plan_lo, syn_lo, rel_lo = _first_release_fraction("1.0", tmp_path)
    p_hi, plan_hi, syn_hi, rel_hi = _first_release_fraction("2.0", tmp_path)
    law = plan_lo.conditions["release_law"]
    expected_ratio = hill(1.0, law["half_activation"], law["hill"]) / hill(2.0, law["half_activation"], law["hill"])
    # expected per-site probabilities: site-weighted mean of U over the selected connections
    w = syn_lo.n_sites.astype(float)
    exp_lo = float((syn_lo.U * w).sum() / w.sum())
    exp_hi = float((syn_hi.U * w).sum() / w.sum())
    assert exp_lo / exp_hi == pytest.approx(expected_ratio, rel=1e-9)
    # binomial sampling error of the pooled fraction (del Castillo and Katz 1954, J Physiol)
    n_trials = w.sum() * rel_lo.shape[1]
    se_lo = np.sqrt(exp_lo * (1 - exp_lo) / n_trials)
    se_hi = np.sqrt(exp_hi * (1 - exp_hi) / n_trials)
    assert abs(p_lo - exp_lo) < 4 * se_lo
    assert abs(p_hi - exp_hi) < 4 * se_hi
    ratio = p_lo / p_hi
    se_ratio = ratio * np.sqrt((se_lo / exp_lo) ** 2 + (se_hi / exp_hi) ** 2)
    assert abs(ratio - expected_ratio) < 4 * se_ratio, (ratio, expected_ratio, se_ratio)
    # same seed, same pairs at both calcium levels
    assert np.array_equal(plan_lo.role("post").cell_ids, plan_hi.role("post").cell_ids)


def test_import_protolang_is_light():
    code = ("import sys, protolang; "
            "print(sorted(m for m in ('brian2', 'pandas', 'matplotlib', 'scipy') if m in sys.modules))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"


@pytest.mark.slow
def test_grammar_and_demo_ship_inside_an_installed_copy(tmp_path):
    # install a real (non-editable) copy and load the grammar and demo through importlib.resources
    target = tmp_path / "site"
    r = subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation",
                        "--target", str(target), str(ROOT)], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    code = ("import importlib.resources as ir, protolang, protolang.language.parser as p; "
            "assert 'site' in protolang.__file__, protolang.__file__; "
            "root = ir.files('protolang'); "
            "g = (root / 'grammar' / 'protolang.lark').read_text(); "
            "d = (root / 'demo' / 'pyramid_pair_train.protocol').read_text(); "
            "c = (root / 'demo' / 'slab.circuit.yaml').read_text(); "
            "protolang.loads(d); print('ok', len(g) > 100, 'invented' in c.lower())")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path,
                       env=dict(os.environ, PYTHONPATH=str(target)))
    assert r.returncode == 0, r.stderr
    assert r.stdout.split() == ["ok", "True", "True"]
