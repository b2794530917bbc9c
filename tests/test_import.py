"""Import of recordings: CSV traces with a recording map through the model's collectors, bad input, compare.

The synthetic "recordings" are built from closed forms (a difference-of-exponentials PSP of known
amplitude and time constants after each presynaptic spike, plus Gaussian noise), so what the
collectors must recover is known exactly.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq

from protolang.cli import main
from protolang.language.errors import ProtocolError
from protolang.measure.compare import compare, recorded_references
from protolang.report.importer import detect_spikes, import_recordings

REPO = Path(__file__).resolve().parents[1]
CIRCUIT = REPO / "protolang" / "demo" / "slab.circuit.yaml"
MV, MS = 1e-3, 1e-3
RATE = 10_000.0           # Hz
DT = 1.0 / RATE
SWEEP = 0.4               # s of data per sweep
ONSETS = (0.100, 0.150)   # s: the protocol's two train pulses
SPIKE_DELAY = 1.0 * MS    # stimulus onset to the start of the synthetic action potential
SPIKE_RISE = 0.5 * MS     # linear rise from -65 mV to +30 mV
SYN_DELAY = 1.0 * MS      # presynaptic threshold crossing to PSP onset
T1, T2 = 1.0 * MS, 20.0 * MS
NOISE = 0.02 * MV
AMPS = (0.5 * MV, 1.0 * MV, 1.5 * MV)   # connected pairs' first-response amplitudes
PPR = 0.8
N_SWEEPS = 12

PROTOCOL = f"""# Invented test protocol: two pulses at 20 Hz, responses measured
protocol "synthetic pairs for import"
circuit "{CIRCUIT}" seed 3

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 2

sweeps {N_SWEEPS} every 1 s

record pre: current clamp
record post: current clamp, holding -70 mV

stimulate pre:
    train 2 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms

measure post:
    responses to pre
"""


def doe(t, t1, t2):
    t = np.asarray(t, dtype=float)
    return np.where(t > 0, np.exp(-np.clip(t, 0, None) / t2) - np.exp(-np.clip(t, 0, None) / t1), 0.0)


def doe_peak_time(t1, t2):
    # Closed form of the difference of exponentials' peak (REFERENCES.md A2)
    return t1 * t2 / (t2 - t1) * math.log(t2 / t1)


def unit_psp(t):
    return doe(t, T1, T2) / float(doe(doe_peak_time(T1, T2), T1, T2))


def crossing_time(onset, threshold=-20 * MV):
    """Exact time the synthetic spike's linear rise crosses ``threshold``."""
    return onset + SPIKE_DELAY + SPIKE_RISE * (threshold - (-65 * MV)) / (95 * MV)


def synthetic_pair(amplitude: float, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Columns of one pair's CSV: time, pre_1..N, post_1..N (mV)."""
    t = np.arange(int(round(SWEEP / DT))) * DT
    cols = {"time_s": t}
    for s in range(1, N_SWEEPS + 1):
        pre = np.full(t.shape, -65 * MV)
        post = np.full(t.shape, -70 * MV) + rng.normal(0.0, NOISE, t.shape)
        for k, onset in enumerate(ONSETS):
            start = onset + SPIKE_DELAY
            rising = (t >= start) & (t < start + SPIKE_RISE)
            pre[rising] = -65 * MV + 95 * MV * (t[rising] - start) / SPIKE_RISE
            top = (t >= start + SPIKE_RISE) & (t < start + SPIKE_RISE + 0.5 * MS)
            pre[top] = 30 * MV
            amp = amplitude * (PPR if k == 1 else 1.0)
            post += amp * unit_psp(t - crossing_time(onset) - SYN_DELAY)
        cols[f"pre_{s}"] = pre / MV
        cols[f"post_{s}"] = post / MV
    return cols


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    """Protocol, four CSV files (three connected pairs, one not) and their recording map."""
    folder = tmp_path_factory.mktemp("synthetic")
    (folder / "pairs.protocol").write_text(PROTOCOL)
    rng = np.random.default_rng(11)
    entries = []
    for k, amp in enumerate(AMPS + (0.0,)):
        pd.DataFrame(synthetic_pair(amp, rng)).to_csv(folder / f"pair{k + 1}.csv", index=False)
        entries.append(f"  - file: pair{k + 1}.csv\n    connected: {'yes' if amp else 'no'}\n    distance: {60 + 10 * k} um\n")
    (folder / "map.yaml").write_text(
        "# invented synthetic recordings\n"
        "time_column: time_s\n"
        "sample_rate: 10 kHz\n"
        "cells:\n"
        "  pre: {column: 'pre_{sweep}', unit: mV}\n"
        "  post: {column: 'post_{sweep}', unit: mV}\n"
        "repeats:\n" + "".join(entries))
    return folder


@pytest.fixture(scope="module")
def imported(dataset):
    return import_recordings(dataset / "pairs.protocol", dataset / "set", map_path=str(dataset / "map.yaml"))


def test_spike_detection_is_the_interpolated_crossing():
    # Linear rise: the crossing of -20 mV is at a known fraction of the rise (closed form);
    # linear interpolation between samples recovers it exactly (common practice, no single source).
    t = np.arange(int(0.2 / DT)) * DT
    v = np.full(t.shape, -65 * MV)
    start = 0.1 + 0.37 * DT
    rising = (t >= start) & (t < start + SPIKE_RISE)
    v[rising] = -65 * MV + 95 * MV * (t[rising] - start) / SPIKE_RISE
    v[(t >= start + SPIKE_RISE) & (t < start + 1.5 * MS)] = 30 * MV
    found = detect_spikes(v, DT, -20 * MV)
    assert found.size == 1
    assert found[0] == pytest.approx(start + SPIKE_RISE * 45 / 95, abs=1e-9)


def test_collectors_recover_the_known_synthetic_responses(imported):
    conn = imported.tables["connections"].sort_values("repeat").reset_index(drop=True)
    assert list(conn["connected"]) == [True, True, True, False]
    assert list(conn["n_sweeps"]) == [N_SWEEPS] * 4
    assert conn["distance_um"].tolist() == pytest.approx([60, 70, 80, 90])
    linked = conn[conn["connected"]]
    # Amplitude: peak of the closed-form PSP above baseline; noise of 0.02 mV biases a peak
    # search upward by at most ~2 SD, hence 0.04 mV + 1 % (stated tolerance of this check).
    for amp, got in zip(AMPS, linked["amplitude_mean_mV"]):
        assert got == pytest.approx(amp / MV, abs=0.04 + 0.01 * amp / MV)
    # Decay: the late phase of a difference of exponentials decays with t2 (REFERENCES.md A2);
    # the fit starts at the peak where the fast term is still ~5 %, plus noise: 5 %.
    assert linked["decay_tau_ms"].to_numpy() == pytest.approx([T2 / MS] * 3, rel=0.05)
    # Paired-pulse ratio of the means: the synthetic second response is 0.8 x the first. The
    # collectors measure it from its local baseline, with no extrapolation of the first response's
    # decay (docs/measures.md), so the still-falling tail reads it ~3 % low here: tolerance 0.05.
    assert linked["ppr"].to_numpy() == pytest.approx([PPR] * 3, abs=0.05)
    # Latency: presynaptic crossing to 10 % of the peak = synaptic delay + t10 of the closed form.
    t10 = brentq(lambda x: float(unit_psp(x)) - 0.1, 1e-12, doe_peak_time(T1, T2))
    assert linked["latency_ms"].to_numpy() == pytest.approx([(SYN_DELAY + t10) / MS] * 3, abs=0.1)
    # Rise: 20-80 % of the closed-form PSP (brentq on REFERENCES.md A2). Noise of 4 % of the smallest
    # peak moves each level crossing by ~0.07 ms on this slope: 0.15 ms (1.5 samples) is the stated tolerance.
    t20, t80 = (brentq(lambda x, f=f: float(unit_psp(x)) - f, 1e-12, doe_peak_time(T1, T2)) for f in (0.2, 0.8))
    assert linked["rise_20_80_ms"].to_numpy() == pytest.approx([(t80 - t20) / MS] * 3, abs=0.15)
    assert (linked["failure_rate"] == 0).all()
    assert linked["pre_spikes_missing"].sum() == 0
    # the model-only facts are empty, not invented
    assert (conn["pre_id"] == -1).all()
    assert conn["n_release_sites"].isna().all()
    path = imported.tables["pathways"]
    assert int(path["n_pairs_tested"].iloc[0]) == 4 and int(path["n_pairs"].iloc[0]) == 3


def test_recording_set_folder_and_provenance(imported, dataset):
    out = imported.out_dir
    for rel in ("tables/connections.csv", "tables/responses.parquet", "plan.json", "provenance.json",
                "recordings.npz"):
        assert (out / rel).exists(), rel
    prov = __import__("json").loads((out / "provenance.json").read_text())
    assert prov["kind"] == "recordings"
    assert len(prov["sources"]) == 4 and all(len(s["sha256"]) == 64 for s in prov["sources"])
    assert prov["map_sha256"] and prov["protocol_sha256"]


def test_compare_model_tables_against_recorded(imported):
    # A "model" whose amplitudes are the recordings' shifted by exactly 1 recorded SD:
    # within 2 SD it agrees, within 0.5 SD it does not (the rule's arithmetic, hand-computed).
    rec = imported.tables
    refs = recorded_references(rec, within=2.0, source="synthetic")
    amp_ref = next(r for r in refs if r["measure"] == "amplitude")
    values = rec["connections"].query("connected")["amplitude_mean_mV"].to_numpy()
    assert amp_ref["value"] == pytest.approx(values.mean())
    assert amp_ref["sd"] == pytest.approx(values.std(ddof=1))
    assert amp_ref["n"] == 3
    shifted = {k: v.copy() for k, v in rec.items()}
    shifted["connections"]["amplitude_mean_mV"] += amp_ref["sd"]
    table = compare(refs, shifted).set_index("measure")
    assert table.loc["amplitude", "agreement"] == "yes"
    assert table.loc["amplitude", "difference_in_sd"] == pytest.approx(1.0)
    strict = compare(recorded_references(rec, within=0.5, source="synthetic"), shifted).set_index("measure")
    assert strict.loc["amplitude", "agreement"] == "no"
    # probability: 3 of 4 tested pairs connected
    assert table.loc["probability", "reference_mean"] == pytest.approx(0.75)


# --- bad input: errors name the file and field; nothing is written -------------------------------
def _run_import(dataset, tmp_path, map_text: str, files: dict[str, pd.DataFrame] | None = None):
    for name, frame in (files or {}).items():
        frame.to_csv(tmp_path / name, index=False)
    (tmp_path / "map.yaml").write_text(map_text)
    out = tmp_path / "out"
    with pytest.raises(ProtocolError) as info:
        import_recordings(dataset / "pairs.protocol", out, map_path=str(tmp_path / "map.yaml"))
    assert not out.exists()
    assert not list(tmp_path.glob(".out.partial-*"))
    return str(info.value)


def _pair_frame(dataset) -> pd.DataFrame:
    return pd.read_csv(dataset / "pair1.csv")


MAP_HEAD = ("time_column: time_s\n"
            "cells:\n  pre: {column: 'pre_{sweep}', unit: mV}\n  post: {column: 'post_{sweep}', unit: mV}\n")


def test_missing_column_names_file_and_column(dataset, tmp_path):
    frame = _pair_frame(dataset).drop(columns=["post_3"])
    msg = _run_import(dataset, tmp_path, MAP_HEAD + "repeats:\n  - file: a.csv\n    connected: yes\n",
                      {"a.csv": frame})
    assert "a.csv" in msg and "'post_3'" in msg and "map.yaml:" in msg


def test_mismatched_sample_rates_between_files(dataset, tmp_path):
    frame = _pair_frame(dataset)
    slow = frame.copy()
    slow["time_s"] = slow["time_s"] * 2
    msg = _run_import(dataset, tmp_path, MAP_HEAD + "repeats:\n  - file: a.csv\n    connected: yes\n"
                      "  - file: b.csv\n    connected: yes\n", {"a.csv": frame, "b.csv": slow})
    assert "b.csv" in msg and "5000 Hz" in msg and "10000 Hz" in msg


def test_time_column_against_stated_rate(dataset, tmp_path):
    msg = _run_import(dataset, tmp_path, "sample_rate: 20 kHz\n" + MAP_HEAD
                      + "repeats:\n  - file: a.csv\n    connected: yes\n", {"a.csv": _pair_frame(dataset)})
    assert "10000 Hz" in msg and "20000 Hz" in msg and "map.yaml:1:" in msg


def test_unit_that_does_not_fit_the_clamp_mode(dataset, tmp_path):
    text = ("time_column: time_s\ncells:\n  pre: {column: 'pre_{sweep}', unit: mV}\n"
            "  post: {column: 'post_{sweep}', unit: pA}\nrepeats:\n  - file: a.csv\n    connected: yes\n")
    msg = _run_import(dataset, tmp_path, text, {"a.csv": _pair_frame(dataset)})
    assert "map.yaml:4:" in msg and "current clamp" in msg and "mV" in msg


def test_unknown_key_and_missing_connected(dataset, tmp_path):
    msg = _run_import(dataset, tmp_path, MAP_HEAD + "repeats:\n  - file: a.csv\n    conected: yes\n",
                      {"a.csv": _pair_frame(dataset)})
    assert "map.yaml:7:" in msg and "did you mean 'connected'" in msg
    msg = _run_import(dataset, tmp_path, MAP_HEAD + "repeats:\n  - file: a.csv\n", {"a.csv": _pair_frame(dataset)})
    assert "connected" in msg and "map.yaml:6:" in msg


def test_gap_in_the_data_names_the_row(dataset, tmp_path):
    frame = _pair_frame(dataset)
    frame.loc[41, "post_2"] = np.nan
    msg = _run_import(dataset, tmp_path, MAP_HEAD + "repeats:\n  - file: a.csv\n    connected: yes\n",
                      {"a.csv": frame})
    assert "a.csv:43:1" in msg and "'post_2'" in msg


def test_cli_import_and_missing_map(dataset, tmp_path, capsys):
    assert main(["import", str(dataset / "pairs.protocol"), "--out", str(tmp_path / "x")]) == 1
    assert "recording map" in capsys.readouterr().err
    assert main(["import", str(dataset / "pairs.protocol"), "--map", str(dataset / "map.yaml"),
                 "--out", str(tmp_path / "y"), "--quiet"]) == 0
    assert "imported 4 repeat(s) x 12 sweep(s) at 10000 Hz" in capsys.readouterr().out


# --- the same synthetic pairs as a lab's NWB file (written with pynwb, no protolang columns) ------
def _lab_nwb(dataset, path):
    """Every synthetic pair as two electrodes, one CurrentClampSeries per cell and sweep (mV numbers,
    conversion 1e-3), grouped as simultaneous recordings, as a lab's acquisition software might."""
    import datetime as dt
    import warnings

    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries

    f = NWBFile(session_description="invented synthetic pairs", identifier="synthetic-pairs",
                session_start_time=dt.datetime(2026, 1, 5, 9, 0, tzinfo=dt.timezone.utc))
    dev = f.create_device(name="amplifier")
    start = 0.0
    for k in range(4):
        frame = pd.read_csv(dataset / f"pair{k + 1}.csv")
        el = {c: f.create_icephys_electrode(name=f"pair{k + 1}_{c}", device=dev, description=f"cell {c}",
                                            location="deep layer") for c in ("a", "b")}
        for s in range(1, N_SWEEPS + 1):
            rows = []
            for c, column in (("a", f"pre_{s}"), ("b", f"post_{s}")):
                resp = CurrentClampSeries(name=f"p{k}_{c}_{s}", data=frame[column].to_numpy(), electrode=el[c],
                                          conversion=1e-3, rate=RATE, starting_time=start, sweep_number=s,
                                          gain=1.0, unit="volts")
                stim = CurrentClampStimulusSeries(name=f"p{k}_{c}_{s}_stim", data=np.zeros(len(frame)),
                                                  electrode=el[c], rate=RATE, starting_time=start, sweep_number=s,
                                                  gain=1.0, unit="amperes")
                rows.append(f.add_intracellular_recording(electrode=el[c], stimulus=stim, response=resp))
            f.add_icephys_simultaneous_recording(recordings=rows)
            start += 1.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with NWBHDF5IO(str(path), "w") as io:
            io.write(f)
    return path


def test_lab_nwb_with_a_map_gives_the_csv_tables(dataset, imported, tmp_path):
    nwb = _lab_nwb(dataset, tmp_path / "lab.nwb")
    entries = "".join(f"  - electrodes: {{pre: pair{k + 1}_a, post: pair{k + 1}_b}}\n"
                      f"    connected: {'yes' if k < 3 else 'no'}\n    distance: {60 + 10 * k} um\n" for k in range(4))
    (tmp_path / "map.yaml").write_text("cells:\n  pre: {unit: mV}\n  post: {unit: mV}\nrepeats:\n" + entries)
    back = import_recordings(dataset / "pairs.protocol", tmp_path / "set", nwb=str(nwb),
                             map_path=str(tmp_path / "map.yaml"))
    # the same numbers through two containers give the same tables (to float precision)
    a, b = imported.tables["connections"], back.tables["connections"]
    for col in ("amplitude_mean_mV", "decay_tau_ms", "ppr", "latency_ms", "cv", "failure_rate", "distance_um"):
        np.testing.assert_allclose(a[col].to_numpy(float), b[col].to_numpy(float), rtol=1e-9, equal_nan=True,
                                   err_msg=col)
    # an electrode the file does not have is named, with the file's electrodes as the choice
    (tmp_path / "bad.yaml").write_text("cells:\n  pre: {unit: mV}\n  post: {unit: mV}\nrepeats:\n"
                                       "  - electrodes: {pre: pair1_c, post: pair1_b}\n    connected: yes\n")
    with pytest.raises(ProtocolError) as info:
        import_recordings(dataset / "pairs.protocol", tmp_path / "bad", nwb=str(nwb), map_path=str(tmp_path / "bad.yaml"))
    assert "pair1_c" in str(info.value) and "bad.yaml:5:" in str(info.value) and "pair1_a" in str(info.value)
    assert not (tmp_path / "bad").exists()


def test_lab_nwb_without_a_map_is_refused(dataset, tmp_path):
    nwb = _lab_nwb(dataset, tmp_path / "lab.nwb")
    with pytest.raises(ProtocolError) as info:
        import_recordings(dataset / "pairs.protocol", tmp_path / "set", nwb=str(nwb))
    assert "lab.nwb" in str(info.value) and "--map" in str(info.value)


def test_features_do_not_depend_on_the_last_digits_of_the_sample_interval(dataset):
    # A sample interval read from a printed time column differs from 1e-4 s in its last digits;
    # every feature must be the same (a window of n + 1/2 samples must not flip; common practice,
    # no single source: measurements do not depend on float rounding).
    from protolang.measure import features as F

    frame = pd.read_csv(dataset / "pair2.csv")
    trace = frame["post_1"].to_numpy() * MV
    event = crossing_time(ONSETS[0])
    exact = F.response_features(trace, DT, event, event + 0.040)
    off = F.response_features(trace, DT * (1 - 1.1e-13), event, event + 0.040)
    for name in ("amplitude", "baseline", "latency", "rise_20_80", "decay_tau"):
        assert getattr(off, name) == pytest.approx(getattr(exact, name), rel=1e-9), name


def test_stimulus_times_from_the_map_replace_the_protocol_times(dataset, tmp_path):
    # The rig stimulated 30 ms later than the protocol says: the protocol's times find no
    # presynaptic spike within 10 ms; the map's stimulus_times find every one.
    rng = np.random.default_rng(5)
    cols = synthetic_pair(AMPS[1], rng)
    shift = round(0.030 / DT)
    late = {k: (v if k == "time_s" else np.concatenate([np.full(shift, v[0]), v[:-shift]])) for k, v in cols.items()}
    pd.DataFrame(late).to_csv(tmp_path / "late.csv", index=False)
    head = MAP_HEAD + "repeats:\n  - file: late.csv\n    connected: yes\n"
    (tmp_path / "plain.yaml").write_text(head)
    plain = import_recordings(dataset / "pairs.protocol", None, map_path=str(tmp_path / "plain.yaml"))
    assert int(plain.tables["connections"]["pre_spikes_missing"].iloc[0]) == 2 * N_SWEEPS
    (tmp_path / "timed.yaml").write_text("stimulus_times: [130 ms, 180 ms]\n" + head)
    timed = import_recordings(dataset / "pairs.protocol", None, map_path=str(tmp_path / "timed.yaml"))
    conn = timed.tables["connections"].iloc[0]
    assert int(conn["pre_spikes_missing"]) == 0
    assert conn["amplitude_mean_mV"] == pytest.approx(AMPS[1] / MV, abs=0.04 + 0.01 * AMPS[1] / MV)
    (tmp_path / "short.yaml").write_text("stimulus_times: [130 ms]\n" + head)
    with pytest.raises(ProtocolError) as info:
        import_recordings(dataset / "pairs.protocol", None, map_path=str(tmp_path / "short.yaml"))
    assert "short.yaml:1:" in str(info.value) and "2 times" in str(info.value)


def test_voltage_clamp_csv_in_pA(dataset, tmp_path):
    # An EPSC of known peak (difference of exponentials, inward = negative) in pA columns: the
    # collectors report it in pA columns with the known size (closed form, REFERENCES.md A2).
    text = (dataset / "pairs.protocol").read_text().replace(
        "record post: current clamp, holding -70 mV", "record post: voltage clamp, holding -70 mV")
    (tmp_path / "vc.protocol").write_text(text)
    rng = np.random.default_rng(8)
    cols = synthetic_pair(AMPS[1], rng)
    for s in range(1, N_SWEEPS + 1):   # the PSP shape as a current: -40 pA per mV of the synthetic PSP
        cols[f"post_{s}"] = -40.0 * (cols[f"post_{s}"] + 70.0)
    pd.DataFrame(cols).to_csv(tmp_path / "vc.csv", index=False)
    (tmp_path / "map.yaml").write_text("time_column: time_s\ncells:\n  pre: {column: 'pre_{sweep}', unit: mV}\n"
                                       "  post: {column: 'post_{sweep}', unit: pA}\n"
                                       "repeats:\n  - file: vc.csv\n    connected: yes\n")
    got = import_recordings(tmp_path / "vc.protocol", None, map_path=str(tmp_path / "map.yaml"))
    conn = got.tables["connections"].iloc[0]
    assert "amplitude_mean_pA" in got.tables["connections"].columns
    # noise is 40 x 0.02 mV = 0.8 pA: tolerance 1.6 pA + 1 % (as in current clamp, scaled)
    assert abs(conn["amplitude_mean_pA"]) == pytest.approx(40.0 * AMPS[1] / MV, abs=1.6 + 0.4)
    assert conn["decay_tau_ms"] == pytest.approx(T2 / MS, rel=0.05)
    # a mV column for the voltage-clamped cell is refused, naming the line of the map
    (tmp_path / "bad.yaml").write_text((tmp_path / "map.yaml").read_text().replace("unit: pA", "unit: mV"))
    with pytest.raises(ProtocolError) as info:
        import_recordings(tmp_path / "vc.protocol", None, map_path=str(tmp_path / "bad.yaml"))
    assert "bad.yaml:4:" in str(info.value) and "voltage clamp" in str(info.value)


def test_empty_or_short_sweeps_are_refused(dataset, tmp_path):
    frame = _pair_frame(dataset)
    msg = _run_import(dataset, tmp_path, MAP_HEAD + "repeats:\n  - file: a.csv\n    connected: yes\n",
                      {"a.csv": frame.iloc[:0]})
    assert "a.csv has 0 data row(s)" in msg and "map.yaml:6:" in msg
    # 120 ms of data cannot hold the protocol's second event at 150 ms
    msg = _run_import(dataset, tmp_path, MAP_HEAD + "repeats:\n  - file: a.csv\n    connected: yes\n",
                      {"a.csv": frame.iloc[:1200]})
    assert "last 120 ms" in msg and "150 ms" in msg and "a.csv" in msg


def test_the_map_may_name_its_nwb_file(dataset, tmp_path):
    nwb = _lab_nwb(dataset, tmp_path / "lab.nwb")
    entries = "".join(f"  - electrodes: {{pre: pair{k + 1}_a, post: pair{k + 1}_b}}\n    connected: yes\n"
                      for k in range(3))
    (tmp_path / "map.yaml").write_text(f"file: {nwb.name}\ncells:\n  pre: {{unit: mV}}\n  post: {{unit: mV}}\n"
                                       "repeats:\n" + entries)
    got = import_recordings(dataset / "pairs.protocol", None, map_path=str(tmp_path / "map.yaml"))
    assert len(got.tables["connections"]) == 3 and got.provenance["sources"][0]["file"].endswith("lab.nwb")
    assert got.provenance["simulated"] is False
    (tmp_path / "csv.yaml").write_text("file: pair1.csv\n" + MAP_HEAD + "repeats:\n  - file: a.csv\n")
    with pytest.raises(ProtocolError, match="not an NWB file") as info:
        import_recordings(dataset / "pairs.protocol", None, map_path=str(tmp_path / "csv.yaml"))
    assert "csv.yaml:1:7" in str(info.value)
