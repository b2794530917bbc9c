"""NWB export and reading: protolang's runs written as NWB, read back by pynwb itself and by read_nwb.

The outside reference is pynwb, the NWB reference API (Ruebel et al. 2022, eLife 11:e78362,
from memory), and nwbinspector, the NWB community's best-practice checker; files written with
pynwb directly (not through protolang) stand in for a lab's recordings.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import json
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.language.errors import ProtocolError
from protolang.plan.waveforms import render
from protolang.report.nwb import add_nwb_parser, export_run_folder, read_nwb, write_nwb
from protolang.report.write import read_recordings_npz

ROOT = Path(__file__).resolve().parents[1]
CIRCUIT = ROOT / "protolang" / "demo" / "slab.circuit.yaml"

# Invented test scenario, after protolang/demo/pyramid_pair_train.protocol but small: the gap of
# 4 s between sweeps puts the sweeps in the replicas layout (3x faster than continuous time).
PAIR = f"""\
# Invented test scenario: deep pyramid pairs, a short train.
protocol "nwb test: deep pyramid pairs"
circuit "{CIRCUIT}" seed 7

bath:
    calcium 2.0 mM
    magnesium 1.0 mM
    block GABA_A

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 3

sweeps 3 every 4 s, lasting 150 ms

record pre: current clamp
record post: current clamp, holding -70 mV, noise 0.03 mV

stimulate pre:
    train 3 pulses of 1.5 nA for 2 ms at 20 Hz from 20 ms
"""

# Invented test scenario: the postsynaptic cell voltage-clamped, with a family of command steps.
CLAMP = f"""\
# Invented test scenario: EPSCs under voltage clamp and a family of command steps.
protocol "nwb test: voltage clamp"
circuit "{CIRCUIT}" seed 7

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 2

sweeps 3 every 4 s, lasting 120 ms

record post: voltage clamp, holding -70 mV, series 15 MOhm

stimulate pre:
    pulse 1.5 nA for 2 ms at 20 ms

stimulate post:
    steps of -5 mV to -15 mV by -5 mV for 20 ms at 70 ms
"""


def _read_pynwb(path):
    from pynwb import NWBHDF5IO

    io = NWBHDF5IO(str(path), "r")
    return io, io.read()


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    """The paired run: its folder, plan, in-memory recordings and its NWB export (from the folder)."""
    base = tmp_path_factory.mktemp("nwb_pair")
    proto = base / "pair.protocol"
    proto.write_text(PAIR)
    result = protolang.load(proto).run(base / "run", target="auto")
    nwb = export_run_folder(base / "run")
    return {"base": base, "protocol": proto, "run": base / "run", "result": result, "nwb": nwb}


@pytest.fixture(scope="module")
def clamp(tmp_path_factory):
    """The voltage-clamp run, exported from memory (float64 traces) with write_nwb."""
    base = tmp_path_factory.mktemp("nwb_clamp")
    proto = base / "clamp.protocol"
    proto.write_text(CLAMP)
    result = protolang.load(proto).run(target="auto")
    nwb = write_nwb(base / "clamp.nwb", result.plan, result.recordings, provenance=result.provenance,
                    protocol_text=CLAMP)
    return {"result": result, "nwb": nwb}


# --- export, read back by pynwb ----------------------------------------------------------------
@pytest.mark.brian2
@pytest.mark.slow
def test_pair_export_reads_back_with_pynwb(pair):
    # pynwb, the NWB reference API (Ruebel et al. 2022, eLife 11:e78362; from memory), reads the file on its own
    plan, rec = pair["result"].plan, pair["result"].recordings
    stored = read_recordings_npz(pair["run"] / "recordings.npz")   # float32 traces, as the export read them
    io, f = _read_pynwb(pair["nwb"])
    try:
        recorded = list(rec.traces)
        assert sorted(recorded) == ["post", "pre"]
        assert len(f.icephys_electrodes) == len(recorded) * plan.n_repeat
        n = len(recorded) * plan.n_repeat * plan.n_sweeps
        assert len(f.acquisition) == n and len(f.stimulus) == n
        assert "simulated" in f.notes.lower() and "not recorded from an animal" in f.notes
        assert f.protocol == PAIR
        assert f.session_start_time.tzinfo is not None
        n_samples = rec.time.size
        for role_name in recorded:
            role = plan.role(role_name)
            for r in range(plan.n_repeat):
                el = f.icephys_electrodes[f"{role_name}[{r}]"]
                assert el.cell_id == f"{role_name}[{r}]" and el.location == role.cell_class
                assert str(int(role.cell_ids[r])) in el.description
                for s in range(plan.n_sweeps):
                    resp = f.acquisition[f"{role_name}[{r}]_sweep{s}_response"]
                    stim = f.stimulus[f"{role_name}[{r}]_sweep{s}_stimulus"]
                    assert type(resp).__name__ == "CurrentClampSeries" and resp.unit == "volts"
                    assert type(stim).__name__ == "CurrentClampStimulusSeries" and stim.unit == "amperes"
                    assert resp.rate == pytest.approx(1.0 / rec.sample_dt, rel=1e-12)
                    assert resp.starting_time == pytest.approx((r * plan.n_sweeps + s) * plan.interval)
                    assert resp.sweep_number == r * plan.n_sweeps + s
                    assert resp.electrode is el and resp.data.dtype == np.float64
                    data = resp.data[:]
                    # float32 traces of the run folder are widened exactly, and equal the run to float precision
                    np.testing.assert_array_equal(data, stored.traces[role_name][r, s])
                    np.testing.assert_allclose(data, rec.traces[role_name][r, s], rtol=1e-6, atol=0)
                    hold = role.holding_current[r] if role.holding_current is not None else 0.0
                    assert resp.bias_current == pytest.approx(hold, rel=1e-12)
                    np.testing.assert_array_equal(stim.data[:], render(role, s, rec.sample_dt, n_samples))
        assert plan.role("post").holding_current[0] != 0.0   # the bias current check above is not vacuous
        assert np.max(f.stimulus["pre[0]_sweep0_stimulus"].data[:]) == pytest.approx(1.5e-9)

        # icephys grouping tables
        assert len(f.intracellular_recordings) == n
        assert len(f.icephys_simultaneous_recordings) == plan.n_repeat * plan.n_sweeps
        assert len(f.icephys_sequential_recordings) == plan.n_repeat          # one sweep type per repeat
        assert len(f.icephys_repetitions) == plan.n_repeat
        cond = f.icephys_experimental_conditions
        assert len(cond) == 1
        assert cond["calcium_mM"][0] == pytest.approx(2.0) and cond["magnesium_mM"][0] == pytest.approx(1.0)
        # the circuit's default bath temperature, 34 degC, is kept in kelvin by the plan; 0 degC = 273.15 K
        # (SI Brochure, BIPM 2019)
        assert cond["temperature_degC"][0] == pytest.approx(34.0)
        assert cond["blocks"][0] == "GABA_A 100 %"
        electrodes = f.intracellular_recordings.category_tables["electrodes"]
        assert set(["role", "repeat", "cell_id", "cell_class", "x_um", "y_um", "z_um"]) <= set(electrodes.colnames)

        # spikes: one unit per cell and repeat, in session time
        units = f.units
        assert len(units) == len(rec.spikes) * plan.n_repeat
        for i in range(len(units)):
            role_name, r = units["role"][i], int(units["repeat"][i])
            want = np.concatenate([np.asarray(t) + (r * plan.n_sweeps + s) * plan.interval
                                   for s, t in enumerate(rec.spikes[role_name][r])])
            np.testing.assert_allclose(units["spike_times"][i], want, rtol=0, atol=1e-12)
            assert int(units["cell_id"][i]) == int(plan.role(role_name).cell_ids[r])
        assert sum(len(units["spike_times"][i]) for i in range(len(units))) > 0
        pairs = f.processing["protolang"]["protolang_pairs"].to_dataframe()
        assert len(pairs) == len(plan.synapses) * plan.n_repeat
        syn = plan.synapses[0]
        mine = pairs[pairs["synapse"] == syn.name].sort_values("repeat")
        np.testing.assert_array_equal(mine["connected"].to_numpy(bool), syn.connected)
        np.testing.assert_array_equal(mine["n_release_sites"].to_numpy(int), syn.n_sites)
        np.testing.assert_allclose(mine["distance_um"].to_numpy(float), syn.distance * 1e6)
    finally:
        io.close()


@pytest.mark.brian2
@pytest.mark.slow
def test_voltage_clamp_export_reads_back_with_pynwb(clamp):
    # pynwb, the NWB reference API (Ruebel et al. 2022, eLife 11:e78362; from memory), reads the file on its own
    plan, rec = clamp["result"].plan, clamp["result"].recordings
    post = plan.role("post")
    io, f = _read_pynwb(clamp["nwb"])
    try:
        assert list(rec.traces) == ["post"] and len(f.icephys_electrodes) == plan.n_repeat
        assert len(f.acquisition) == plan.n_repeat * plan.n_sweeps
        for r in range(plan.n_repeat):
            el = f.icephys_electrodes[f"post[{r}]"]
            assert el.initial_access_resistance.startswith("1.5e+07 Ohm")
            for s in range(plan.n_sweeps):
                resp = f.acquisition[f"post[{r}]_sweep{s}_response"]
                stim = f.stimulus[f"post[{r}]_sweep{s}_stimulus"]
                assert type(resp).__name__ == "VoltageClampSeries" and resp.unit == "amperes"
                assert type(stim).__name__ == "VoltageClampStimulusSeries" and stim.unit == "volts"
                np.testing.assert_array_equal(resp.data[:], rec.traces["post"][r, s])   # float64 as given
                want = post.holding_potential + render(post, s, rec.sample_dt, rec.time.size)
                np.testing.assert_array_equal(stim.data[:], want)
        # command steps of -5, -10 and -15 mV from the -70 mV holding potential
        lows = [f.stimulus[f"post[0]_sweep{s}_stimulus"].data[:].min() for s in range(3)]
        np.testing.assert_allclose(lows, [-0.075, -0.080, -0.085], atol=1e-12)
        # every sweep has its own command step: one sequential recording per repeat and sweep type
        seq = f.icephys_sequential_recordings
        assert len(seq) == plan.n_repeat * plan.n_sweeps
        types = set(seq["stimulus_type"][:])
        assert len(types) == plan.n_sweeps and any("step -10 mV" in t for t in types)
        assert len(f.icephys_repetitions) == plan.n_repeat
    finally:
        io.close()


# --- read_nwb on protolang's own exports -------------------------------------------------------
@pytest.mark.brian2
@pytest.mark.slow
def test_read_nwb_gives_back_the_recordings(pair, clamp):
    for case in (pair, clamp):
        plan, rec = case["result"].plan, case["result"].recordings
        content = read_nwb(case["nwb"])
        assert len(content.series) == len(rec.traces) * plan.n_repeat * plan.n_sweeps
        starts = [s.starting_time for s in content.series]
        assert starts == sorted(starts)
        for s in content.series:
            info = content.electrodes[s.electrode]
            role, r = info["role"], int(info["repeat"])
            sweep = s.sweep_number - r * plan.n_sweeps
            assert s.starting_time == pytest.approx(s.sweep_number * plan.interval)
            np.testing.assert_allclose(s.data, rec.traces[role][r, sweep], rtol=1e-6, atol=0)
            assert s.unit == rec.meta["trace_units"][role]
            assert s.mode == plan.role(role).mode
            assert s.rate == pytest.approx(1.0 / rec.sample_dt)
            assert s.group == s.sweep_number and s.stimulus is not None and s.stimulus_type
        for name, info in content.electrodes.items():
            role = plan.role(info["role"])
            r = int(info["repeat"])
            assert name == f"{role.name}[{r}]" and info["cell_class"] == role.cell_class
            assert info["circuit_cell_id"] == int(role.cell_ids[r])
            np.testing.assert_allclose([info["x_um"], info["y_um"], info["z_um"]], role.positions[r] * 1e6)
        # spike times per repeat and sweep, after subtracting each sweep's start
        for role, per_repeat in rec.spikes.items():
            for r, sweeps in enumerate(per_repeat):
                got = content.spikes[f"{role}[{r}]"]
                for s, want in enumerate(sweeps):
                    start = (r * plan.n_sweeps + s) * plan.interval
                    inside = got[(got >= start) & (got < start + plan.sweep_length)] - start
                    np.testing.assert_allclose(inside, want, rtol=0, atol=1e-9)
                assert got.size == sum(len(w) for w in sweeps)
        assert len(content.pairs) == len(plan.synapses) * plan.n_repeat
        assert content.session["description"] == plan.title
    content = read_nwb(pair["nwb"])
    assert content.conditions == {"calcium_mM": 2.0, "magnesium_mM": 1.0,
                                  "temperature_degC": pytest.approx(34.0), "blocks": {"GABA_A": 1.0}}
    assert content.session["protocol"] == PAIR


# --- best practice -------------------------------------------------------------------------------
# What nwbinspector may still say about an export, and why each stays:
ACCEPTED = {
    "check_experimenter_exists": "a simulation has no experimenter; protolang does not invent one",
    "check_institution": "not invented either",
    "check_subject_species_exists": "no animal: the subject says it is an in-silico model",
    "check_processing_module_name": "the 'protolang' module holds model facts that fit no schema module",
    "check_single_row": "one run has one bath condition",
    "check_column_binary_capability": "a repeat column of a 2-repeat run holds only 0 and 1",
}


@pytest.mark.brian2
@pytest.mark.slow
def test_nwbinspector_finds_nothing_serious(pair, clamp):
    # nwbinspector: the NWB community's best-practice checker, run before sharing NWB files (common
    # practice, no single source); it also validates the file against the NWB schema with pynwb
    from nwbinspector import Importance, inspect_nwbfile

    for case in (pair, clamp):
        messages = list(inspect_nwbfile(str(case["nwb"])))   # also runs the pynwb schema validation
        serious = [m for m in messages if m.importance in (Importance.ERROR, Importance.PYNWB_VALIDATION,
                                                           Importance.CRITICAL)]
        assert not serious, [(m.check_function_name, m.message) for m in serious]
        others = {m.check_function_name for m in messages} - set(ACCEPTED)
        assert not others, [(m.check_function_name, m.message) for m in messages]


# --- run folders and the command line ----------------------------------------------------------
@pytest.mark.brian2
@pytest.mark.slow
def test_export_run_folder_refuses_a_changed_protocol(pair, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(pair["run"], run)
    (run / "recordings.nwb").unlink()
    proto = pair["protocol"]

    # the command line: protolang nwb RUN_DIR --out FILE
    ap = argparse.ArgumentParser(prog="protolang")
    add_nwb_parser(ap.add_subparsers(dest="command"))
    args = ap.parse_args(["nwb", str(run), "--out", str(tmp_path / "out.nwb")])
    assert args.func(args) == 0 and (tmp_path / "out.nwb").exists()

    try:
        proto.write_text(PAIR.replace("20 Hz", "25 Hz"))
        with pytest.raises(ProtocolError, match="changed since the run") as exc:
            export_run_folder(run)
        assert str(proto) in str(exc.value) and "hint:" in str(exc.value)
    finally:
        proto.write_text(PAIR)
    assert not (run / "recordings.nwb").exists()

    prov = json.loads((run / "provenance.json").read_text())
    prov["plan_sha256"] = hashlib.sha256(b"another plan").hexdigest()
    (run / "provenance.json").write_text(json.dumps(prov))
    with pytest.raises(ProtocolError, match="no longer resolves to the plan"):
        export_run_folder(run)

    prov["protocol_file"] = str(tmp_path / "gone" / "pair.protocol")
    prov.pop("protocol_path", None)
    (run / "provenance.json").write_text(json.dumps(prov))
    with pytest.raises(ProtocolError, match="is gone") as exc:
        export_run_folder(run)
    assert "protocol_file" in str(exc.value)
    assert sorted(p.name for p in run.iterdir()) == sorted(p.name for p in pair["run"].iterdir()
                                                           if p.name != "recordings.nwb")


@pytest.mark.brian2
@pytest.mark.slow
def test_export_run_folder_follows_a_moved_project(pair, tmp_path):
    # the run was made from old/pair.protocol; the project moved, the protocol now lies beside the run folder
    old = tmp_path / "old" / "pair.protocol"
    old.parent.mkdir()
    old.write_text(PAIR)
    run = tmp_path / "run"
    shutil.copytree(pair["run"], run)
    prov = json.loads((run / "provenance.json").read_text())
    prov["protocol_file"] = str(old)
    prov.pop("protocol_path", None)
    prov["plan_sha256"] = hashlib.sha256(protolang.load(old).plan().to_json().encode()).hexdigest()
    (run / "provenance.json").write_text(json.dumps(prov))
    old.rename(tmp_path / "pair.protocol")
    path = export_run_folder(run, tmp_path / "moved.nwb")
    assert read_nwb(path).session["protocol"] == PAIR


def test_export_run_folder_refuses_what_is_not_a_run(tmp_path):
    with pytest.raises(ProtocolError, match="not found"):
        export_run_folder(tmp_path / "nowhere")
    with pytest.raises(ProtocolError, match="provenance.json"):
        export_run_folder(tmp_path)
    (tmp_path / "provenance.json").write_text(json.dumps({"kind": "recordings", "sources": []}))
    with pytest.raises(ProtocolError, match="imported recordings"):
        export_run_folder(tmp_path)


@pytest.mark.brian2
@pytest.mark.slow
def test_write_nwb_leaves_nothing_when_writing_fails(pair, tmp_path, monkeypatch):
    import pynwb

    def broken(self, *args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(pynwb.NWBHDF5IO, "write", broken)
    with pytest.raises(OSError, match="disk full"):
        write_nwb(tmp_path / "x.nwb", pair["result"].plan, pair["result"].recordings)
    assert list(tmp_path.iterdir()) == []


# --- read_nwb on files written with pynwb directly (a lab's recordings) --------------------------
def _lab_file(path, *, tables: bool = True, rates=(20000.0, 20000.0), acquisition_only_timeseries=False):
    """Two cells recorded together: cell A in current clamp (mV numbers, conversion 1e-3), cell B in
    voltage clamp (pA numbers, conversion 1e-12), two sweeps; no protolang columns."""
    from pynwb import NWBHDF5IO, NWBFile, TimeSeries
    from pynwb.icephys import (CurrentClampSeries, CurrentClampStimulusSeries, IZeroClampSeries,
                               VoltageClampSeries, VoltageClampStimulusSeries)

    f = NWBFile(session_description="invented lab recording for a reader test", identifier="lab-test-1",
                session_start_time=dt.datetime(2024, 5, 6, 10, 0, tzinfo=dt.timezone.utc))
    if acquisition_only_timeseries:
        f.add_acquisition(TimeSeries(name="running_speed", data=np.ones(10), unit="m/s", rate=10.0))
        with NWBHDF5IO(str(path), "w") as io:
            io.write(f)
        return path
    dev = f.create_device(name="amplifier")
    ea = f.create_icephys_electrode(name="elec_A", device=dev, description="whole-cell, cell A", location="L5")
    eb = f.create_icephys_electrode(name="elec_B", device=dev, description="whole-cell, cell B", location="L5")
    known = {}
    for sweep in range(2):
        t0 = 10.0 * sweep
        mv = -65.0 + np.arange(200) * 0.01 + sweep          # mV numbers
        pa = -20.0 - np.arange(100) * 0.5 - sweep          # pA numbers
        va = CurrentClampSeries(name=f"A_sweep{sweep}", data=mv, electrode=ea, conversion=1e-3, rate=rates[0],
                                starting_time=t0, sweep_number=sweep, gain=1.0, unit="volts")
        sa = CurrentClampStimulusSeries(name=f"A_stim{sweep}", data=np.full(200, 100.0 * (sweep + 1)),
                                        electrode=ea, conversion=1e-12, rate=rates[0], starting_time=t0,
                                        sweep_number=sweep, gain=1.0, unit="amperes")
        ib = VoltageClampSeries(name=f"B_sweep{sweep}", data=pa, electrode=eb, conversion=1e-12, rate=rates[1],
                                starting_time=t0, sweep_number=sweep, gain=1.0, unit="amperes")
        sb = VoltageClampStimulusSeries(name=f"B_stim{sweep}", data=np.full(100, -70.0), electrode=eb,
                                        conversion=1e-3, rate=rates[1], starting_time=t0, sweep_number=sweep,
                                        gain=1.0, unit="volts")
        known[sweep] = (mv * 1e-3, np.full(200, 100e-12 * (sweep + 1)), pa * 1e-12, np.full(100, -0.070))
        if tables:
            rows = [f.add_intracellular_recording(electrode=ea, stimulus=sa, response=va),
                    f.add_intracellular_recording(electrode=eb, stimulus=sb, response=ib)]
            f.add_icephys_simultaneous_recording(recordings=rows)
        else:
            for ts in (va, ib):
                f.add_acquisition(ts)
            for ts in (sa, sb):
                f.add_stimulus(ts)
    if not tables:
        # a resting-potential record without stimulus, timed by timestamps instead of a rate
        f.add_acquisition(IZeroClampSeries(name="A_rest", data=np.full(50, -66.0), electrode=ea, conversion=1e-3,
                                           timestamps=20.0 + np.arange(50) / 20000.0, gain=1.0, unit="volts"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with NWBHDF5IO(str(path), "w") as io:
            io.write(f)
    return known


@pytest.mark.parametrize("tables", [True, False])
def test_read_nwb_reads_a_lab_file_without_protolang_columns(tmp_path, tables):
    # Data written with pynwb in mV and pA plus conversion factors come back in V and A
    # (NWB: value in the base unit = data * conversion + offset; NWB schema, common practice).
    path = tmp_path / "lab.nwb"
    known = _lab_file(path, tables=tables)
    content = read_nwb(path)
    assert sorted(content.electrodes) == ["elec_A", "elec_B"]
    assert "role" not in content.electrodes["elec_A"] and content.electrodes["elec_A"]["location"] == "L5"
    assert content.spikes == {} and content.pairs is None and content.conditions == {}
    if not tables:
        rest = content.series.pop()
        assert (rest.electrode, rest.mode, rest.unit, rest.stimulus, rest.sweep_number) == \
            ("elec_A", "current clamp", "V", None, None)
        assert rest.starting_time == 20.0 and rest.rate == pytest.approx(20000.0, rel=1e-9)
        np.testing.assert_allclose(rest.data, -0.066, rtol=1e-12)
    assert len(content.series) == 4
    assert [s.starting_time for s in content.series] == [0.0, 0.0, 10.0, 10.0]
    for s in content.series:
        v, i_stim, i, v_stim = known[s.sweep_number]
        if s.electrode == "elec_A":
            assert (s.mode, s.unit) == ("current clamp", "V")
            np.testing.assert_allclose(s.data, v, rtol=1e-12)
            np.testing.assert_allclose(s.stimulus, i_stim, rtol=1e-12)
            assert -0.066 < s.data[0] < -0.063
        else:
            assert (s.mode, s.unit) == ("voltage clamp", "A")
            np.testing.assert_allclose(s.data, i, rtol=1e-12)
            np.testing.assert_allclose(s.stimulus, v_stim, rtol=1e-12)
        assert s.rate == 20000.0 and s.data.dtype == np.float64
        assert s.group == (s.sweep_number if tables else None)
        assert s.stimulus_type is None


def test_read_nwb_refuses_bad_input(tmp_path):
    import h5py

    missing = tmp_path / "missing.nwb"
    with pytest.raises(ProtocolError, match="file not found") as exc:
        read_nwb(missing)
    assert str(missing) in str(exc.value)

    text = tmp_path / "notes.nwb"
    text.write_text("this is a text file, not NWB\n")
    with pytest.raises(ProtocolError, match="not an HDF5 file") as exc:
        read_nwb(text)
    assert str(text) in str(exc.value)

    plain = tmp_path / "plain.nwb"
    with h5py.File(plain, "w") as h:
        h["x"] = np.arange(3)
    with pytest.raises(ProtocolError, match="not an NWB file"):
        read_nwb(plain)

    behaviour = tmp_path / "behaviour.nwb"
    _lab_file(behaviour, acquisition_only_timeseries=True)
    with pytest.raises(ProtocolError, match="no PatchClampSeries in acquisition") as exc:
        read_nwb(behaviour)
    assert str(behaviour) in str(exc.value) and "running_speed" in str(exc.value)

    rates = tmp_path / "rates.nwb"
    _lab_file(rates, rates=(20000.0, 10000.0))
    with pytest.raises(ProtocolError, match="mixes sample rates") as exc:
        read_nwb(rates)
    assert str(rates) in str(exc.value) and "'rate'" in str(exc.value)

    unit = tmp_path / "unit.nwb"
    _lab_file(unit)
    with h5py.File(unit, "r+") as h:
        h["acquisition/A_sweep1/data"].attrs["unit"] = "degrees"
    with pytest.raises(ProtocolError, match="unit 'degrees'") as exc:
        read_nwb(unit)
    assert "A_sweep1" in str(exc.value) and "volts" in str(exc.value)


def test_write_nwb_refuses_recordings_that_do_not_fit(tmp_path):
    from protolang.engine.recordings import Recordings

    proto = tmp_path / "pair.protocol"
    proto.write_text(PAIR)
    plan = protolang.load(proto).plan()
    spikes = {"pre": [[np.zeros(0)] * plan.n_sweeps] * plan.n_repeat}
    nothing = Recordings(sample_dt=plan.sample_dt, time=np.arange(10) * plan.sample_dt, traces={}, spikes=spikes)
    with pytest.raises(ProtocolError, match="no cell of .* has recorded traces"):
        write_nwb(tmp_path / "x.nwb", plan, nothing)
    wrong = Recordings(sample_dt=plan.sample_dt, time=np.arange(10) * plan.sample_dt,
                       traces={"post": np.zeros((plan.n_repeat + 1, plan.n_sweeps, 10))}, spikes=spikes)
    with pytest.raises(ProtocolError, match="3 repeats x 3 sweeps"):
        write_nwb(tmp_path / "x.nwb", plan, wrong)
    with pytest.raises(ProtocolError, match="does not exist"):
        write_nwb(tmp_path / "no" / "x.nwb", plan, wrong)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["pair.protocol"]
