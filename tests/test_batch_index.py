"""Result index and `protolang results`: schema, refusals, row round trips, filters, concurrent writers, combined tables, listing and exports."""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import pickle
import sqlite3
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from protolang.api import __version__
from protolang.batch.index import RUN_COLUMNS, SCHEMA_VERSION, ResultIndex
from protolang.batch.results import add_results_parser, cmd_results, combine_tables
from protolang.language.errors import ProtocolError

KEY_A = "a1" * 32
KEY_B = "b2" * 32
KEY_C = "c3" * 32


def row(key, **fields):
    base = {"key": key, "pre_key": f"pre-{key}", "protocol": "/lib/pair_train.protocol", "title": "pair train",
            "point": 1, "params": {}, "status": "queued", "batch": "batch-1", "started": None, "ended": None,
            "wall_s": None, "error": None, "folder": f"runs/{key}", "target": "numpy"}
    base.update(fields)
    return base


def raw(results: Path, sql: str, params=()):
    """Query the file with a plain sqlite3 connection, independent of ResultIndex."""
    conn = sqlite3.connect(results / "index.sqlite")
    try:
        return conn.execute(sql, params).fetchall()
    finally:
        conn.close()


def assert_user_error(exc: ProtocolError, *parts: str) -> str:
    text = str(exc)
    assert text.startswith("error: "), text
    assert "Traceback" not in text
    for part in parts:
        assert part in text, (part, text)
    return text


# -- schema ---------------------------------------------------------------------------------

def test_schema_created_and_reopened(tmp_path):
    results = tmp_path / "RESULTS"
    with ResultIndex(results) as index:
        index.upsert(row(KEY_A, status="ok"))
    assert (results / "index.sqlite").is_file()
    tables = {r[0] for r in raw(results, "SELECT name FROM sqlite_master WHERE type = 'table'")}
    assert tables == {"meta", "runs", "aliases"}
    indexes = {r[0] for r in raw(results, "SELECT tbl_name FROM sqlite_master WHERE type = 'index' AND sql IS NOT NULL")}
    assert indexes == {"runs"}
    assert sorted(r[0] for r in raw(results, "SELECT name FROM pragma_index_info('runs_status')")) == ["status"]
    assert sorted(r[0] for r in raw(results, "SELECT name FROM pragma_index_info('runs_protocol')")) == ["protocol"]
    assert [r[1] for r in raw(results, "PRAGMA table_info(runs)")] == list(RUN_COLUMNS)
    assert dict(raw(results, "SELECT name, value FROM meta")) == {"schema_version": str(SCHEMA_VERSION),
                                                                  "protolang_version": __version__}
    assert raw(results, "PRAGMA journal_mode")[0][0] == "wal"
    with ResultIndex(results, create=False) as index:
        assert index.get(KEY_A)["status"] == "ok"
    with ResultIndex(results) as index:      # reopening with create=True keeps the rows
        assert len(index.runs()) == 1


def test_refuses_other_schema_version(tmp_path):
    results = tmp_path / "old_results"
    ResultIndex(results).close()
    conn = sqlite3.connect(results / "index.sqlite")
    conn.execute("UPDATE meta SET value = '7' WHERE name = 'schema_version'")
    conn.commit()
    conn.close()
    for create in (True, False):
        with pytest.raises(ProtocolError) as info:
            ResultIndex(results, create=create)
        assert_user_error(info.value, str(results), "schema version 7", f"schema version {SCHEMA_VERSION}",
                          "new results folder")


def test_refuses_a_file_that_is_not_sqlite(tmp_path):
    results = tmp_path / "R"
    results.mkdir()
    (results / "index.sqlite").write_text("run,status\nx,ok\n" * 200)
    for create in (True, False):
        with pytest.raises(ProtocolError) as info:
            ResultIndex(results, create=create)
        assert_user_error(info.value, str(results / "index.sqlite"), "not an SQLite database", "new results folder")


def test_refuses_an_sqlite_file_of_something_else(tmp_path):
    results = tmp_path / "R"
    results.mkdir()
    conn = sqlite3.connect(results / "index.sqlite")
    conn.execute("CREATE TABLE cars (name TEXT)")
    conn.commit()
    conn.close()
    with pytest.raises(ProtocolError) as info:
        ResultIndex(results)
    assert_user_error(info.value, "not a protolang result index", "cars")


def test_create_false_needs_an_index(tmp_path):
    with pytest.raises(ProtocolError) as info:
        ResultIndex(tmp_path / "nowhere", create=False)
    assert_user_error(info.value, "does not exist")
    assert not (tmp_path / "nowhere").exists()
    with pytest.raises(ProtocolError) as info:
        ResultIndex(tmp_path, create=False)
    assert_user_error(info.value, "is not a results folder", "index.sqlite")
    assert not (tmp_path / "index.sqlite").exists()
    (tmp_path / "afile").write_text("x")
    with pytest.raises(ProtocolError) as info:
        ResultIndex(tmp_path / "afile")
    assert_user_error(info.value, "is a file, not a folder")


# -- rows -----------------------------------------------------------------------------------

def test_upsert_update_get_alias_round_trip(tmp_path):
    with ResultIndex(tmp_path / "R") as index:
        assert index.get(KEY_A) is None
        assert index.alias("pre-x") is None
        first = row(KEY_A, params={"ca": "1.5 mM", "temp": "34 degC"}, point=3)
        index.upsert(first)
        assert index.get(KEY_A) == first
        index.update(KEY_A, status="running", started=1_700_000_000.25)
        index.update(KEY_A, status="ok", ended=1_700_000_012.5, wall_s=12.25)
        got = index.get(KEY_A)
        assert (got["status"], got["started"], got["ended"], got["wall_s"]) == ("ok", 1_700_000_000.25,
                                                                                 1_700_000_012.5, 12.25)
        assert got["params"] == {"ca": "1.5 mM", "temp": "34 degC"}
        # upsert replaces the whole row: columns not given are emptied
        index.upsert({"key": KEY_A, "status": "failed", "error": "boom"})
        got = index.get(KEY_A)
        assert got["status"] == "failed" and got["error"] == "boom" and got["title"] is None and got["params"] == {}
        # params are stored as a JSON object of text values
        index.upsert(row(KEY_B, params={"ca": 2}))
        assert raw(tmp_path / "R", "SELECT params FROM runs WHERE key = ?", (KEY_B,))[0][0] == '{"ca": "2"}'
        index.add_alias("pre-1", KEY_A)
        index.add_alias("pre-1", KEY_B)
        index.add_alias("pre-2", KEY_A)
        assert (index.alias("pre-1"), index.alias("pre-2"), index.alias("pre-3")) == (KEY_B, KEY_A, None)
        with pytest.raises(AssertionError, match="internal error.*colour"):
            index.upsert(dict(row(KEY_C), colour="red"))
        with pytest.raises(AssertionError, match="internal error.*colour"):
            index.update(KEY_A, colour="red")
        with pytest.raises(AssertionError, match="internal error.*status"):
            index.update(KEY_A, status="finished")
        with pytest.raises(AssertionError, match="internal error.*key"):
            index.upsert({"status": "ok"})
        with pytest.raises(KeyError):
            index.update("no-such-key", status="ok")
        assert index.get(KEY_C) is None


def test_pickled_index_reopens(tmp_path):
    index = ResultIndex(tmp_path / "R")
    index.upsert(row(KEY_A))
    copy = pickle.loads(pickle.dumps(index))
    assert copy.get(KEY_A)["key"] == KEY_A
    copy.update(KEY_A, status="ok")
    assert index.get(KEY_A)["status"] == "ok"
    copy.close()
    index.close()


def test_filters(tmp_path):
    with ResultIndex(tmp_path / "R") as index:
        index.upsert(row("k1", protocol="/lib/Calcium_scan.protocol", title="Release vs calcium", status="ok",
                         batch="b1", point=2))
        index.upsert(row("k2", protocol="/lib/Calcium_scan.protocol", title="Release vs calcium", status="failed",
                         batch="b1", point=1))
        index.upsert(row("k3", protocol="/lib/steps.protocol", title="Ströme 100% steps", status="ok", batch="b2"))
        index.upsert(row("k4", protocol="/lib/steps_x.protocol", title="other", status="queued", batch="b2"))
        all_runs = index.runs()
        assert list(all_runs.columns) == list(RUN_COLUMNS)
        assert list(all_runs["key"]) == ["k2", "k1", "k3", "k4"]      # by protocol, then point
        assert list(index.runs(status="ok")["key"]) == ["k1", "k3"]
        assert list(index.runs(status=["ok", "queued"])["key"]) == ["k1", "k3", "k4"]
        assert list(index.runs(protocol="CALCIUM")["key"]) == ["k2", "k1"]          # path and title
        assert list(index.runs(protocol="vs calc")["key"]) == ["k2", "k1"]          # title only
        assert list(index.runs(protocol="STRÖME")["key"]) == ["k3"]                 # beyond ASCII
        assert list(index.runs(protocol="100%")["key"]) == ["k3"]                   # % is plain text
        assert list(index.runs(protocol="s_x")["key"]) == ["k4"]                    # _ is plain text
        assert list(index.runs(batch="b2", status="ok")["key"]) == ["k3"]
        assert index.runs(batch="b3").empty
        assert list(index.runs(batch="b3").columns) == list(RUN_COLUMNS)


def test_mark_unfinished(tmp_path):
    with ResultIndex(tmp_path / "R") as index:
        for k, (status, batch) in enumerate([("queued", "b1"), ("running", "b1"), ("ok", "b1"), ("failed", "b1"),
                                             ("running", "b2"), ("queued", "b2")]):
            index.upsert(row(f"k{k}", status=status, batch=batch))
        assert index.mark_unfinished(batch="b2") == 2
        assert index.mark_unfinished("crashed") == 2
        assert index.mark_unfinished() == 0
        statuses = dict(raw(tmp_path / "R", "SELECT key, status FROM runs"))
        assert statuses == {"k0": "crashed", "k1": "crashed", "k2": "ok", "k3": "failed",
                            "k4": "interrupted", "k5": "interrupted"}
        with pytest.raises(AssertionError, match="internal error"):
            index.mark_unfinished("running")


# -- concurrent writers ---------------------------------------------------------------------

N_WORKERS, N_OWN, N_SHARED = 4, 100, 20


def _writer(results_dir: str, worker: int, barrier) -> None:
    barrier.wait(timeout=120)
    # All workers open the brand-new folder at the same moment, then write row by row.
    with ResultIndex(results_dir) as index:
        for i in range(N_OWN):
            key = f"w{worker}-{i:03d}"
            index.upsert(row(key, protocol=f"/lib/p{worker}.protocol", title=f"protocol {worker}", point=i + 1,
                             params={"i": str(i)}, batch=f"b{worker}"))
            index.add_alias(f"pre-{key}", key)
            index.update(key, status="running", started=time.time())
            index.update(key, status="ok", ended=time.time(), wall_s=float(i))
            if i < N_SHARED:
                shared = f"shared-{i:02d}"
                index.upsert(row(shared, title=f"protocol {worker}", batch=f"b{worker}", status="running"))
                index.update(shared, status="ok", wall_s=float(worker))


def test_concurrent_writers(tmp_path):
    results = tmp_path / "R"
    ctx = mp.get_context("spawn")
    barrier = ctx.Barrier(N_WORKERS)
    procs = [ctx.Process(target=_writer, args=(str(results), w, barrier)) for w in range(N_WORKERS)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(timeout=300)
    assert [p.exitcode for p in procs] == [0] * N_WORKERS
    assert raw(results, "PRAGMA integrity_check") == [("ok",)]
    assert raw(results, "SELECT COUNT(*) FROM runs")[0][0] == N_WORKERS * N_OWN + N_SHARED
    assert raw(results, "SELECT COUNT(*) FROM aliases")[0][0] == N_WORKERS * N_OWN
    assert raw(results, "SELECT COUNT(*) FROM meta")[0][0] == 2
    with ResultIndex(results, create=False) as index:
        runs = index.runs().set_index("key")
        for w in range(N_WORKERS):
            own = runs[runs["batch"] == f"b{w}"].loc[[f"w{w}-{i:03d}" for i in range(N_OWN)]]
            assert (own["status"] == "ok").all()
            assert list(own["wall_s"]) == [float(i) for i in range(N_OWN)]
            assert list(own["point"]) == list(range(1, N_OWN + 1))
            assert (own["started"] <= own["ended"]).all()
            assert [json.loads(p) for p in own["params"]] == [{"i": str(i)} for i in range(N_OWN)]
            assert index.alias(f"pre-w{w}-042") == f"w{w}-042"
        shared = runs.loc[[f"shared-{i:02d}" for i in range(N_SHARED)]]
        assert (shared["status"] == "ok").all()
        assert set(shared["batch"]) <= {f"b{w}" for w in range(N_WORKERS)}
        assert set(shared["wall_s"]) <= {float(w) for w in range(N_WORKERS)}


# -- combined tables ------------------------------------------------------------------------

def write_run(results: Path, key: str, tables: dict[str, pd.DataFrame]) -> None:
    folder = results / "runs" / key / "tables"
    folder.mkdir(parents=True)
    for name, df in tables.items():
        df.to_parquet(folder / f"{name}.parquet", index=False)


def make_library(results: Path) -> None:
    """Two successful runs of a calcium scan (one also scanned over magnesium), a failed run with
    tables on disk, and a successful run whose folder is gone."""
    with ResultIndex(results) as index:
        index.upsert(row(KEY_A, protocol="/lib/ca_scan.protocol", title="calcium scan", point=1,
                         params={"ca": "1.5 mM"}, status="ok", wall_s=2.5))
        index.upsert(row(KEY_B, protocol="/lib/ca_scan.protocol", title="calcium scan", point=2,
                         params={"ca": "2.5 mM", "mg": "1 mM"}, status="ok", wall_s=3.0))
        index.upsert(row(KEY_C, protocol="/lib/broken.protocol", title="broken", status="failed",
                         error="engine failed\nsecond line"))
        index.upsert(row("d4" * 32, protocol="/lib/gone.protocol", title="gone", status="ok"))
    write_run(results, KEY_A, {
        "responses": pd.DataFrame({"pair": [0, 1], "amplitude_mV": [0.5, 0.75], "connected": [True, False]}),
        "spikes": pd.DataFrame({"cell": ["pre"], "rate_Hz": [4.0]}),
        "bursts": pd.DataFrame({"start_ms": [12.0], "cells": [3]}),
    })
    write_run(results, KEY_B, {
        # pair as text and connected missing: types clash with run A
        "responses": pd.DataFrame({"pair": ["p0"], "amplitude_mV": [1.25], "latency_ms": [2.0]}),
        "bursts": pd.DataFrame({"start_ms": pd.Series([], dtype=float), "cells": pd.Series([], dtype="int64"),
                                "size": pd.Series([], dtype=float)}),
        # a whole scan in one folder numbers its own points
        "scanned": pd.DataFrame({"point": [1, 2], "value": [0.1, 0.2]}),
    })
    write_run(results, KEY_C, {"responses": pd.DataFrame({"pair": [9], "amplitude_mV": [99.0]})})


def test_combine_tables(tmp_path):
    results = tmp_path / "R"
    make_library(results)
    paths = combine_tables(results)
    assert sorted(paths) == ["bursts", "responses", "scanned", "spikes"]
    assert all(p == results / "tables" / f"{n}.parquet" and p.is_file() for n, p in paths.items())
    responses = pd.read_parquet(paths["responses"])
    assert list(responses.columns) == ["run_key", "protocol", "title", "point", "param_ca", "param_mg",
                                       "pair", "amplitude_mV", "connected", "latency_ms"]
    assert list(responses["run_key"]) == [KEY_A, KEY_A, KEY_B]          # the failed run is left out
    assert list(responses["point"]) == [1, 1, 2]
    assert list(responses["param_ca"]) == ["1.5 mM", "1.5 mM", "2.5 mM"]
    assert responses["param_mg"].isna().tolist() == [True, True, False] and responses["param_mg"].iloc[2] == "1 mM"
    assert list(responses["pair"]) == ["0", "1", "p0"]                   # int and text: stored as text
    assert list(responses["amplitude_mV"]) == [0.5, 0.75, 1.25]
    assert responses["connected"].tolist()[:2] == [True, False] and pd.isna(responses["connected"].iloc[2])
    assert responses["latency_ms"].isna().tolist() == [True, True, False]
    spikes = pd.read_parquet(paths["spikes"])
    assert list(spikes["run_key"]) == [KEY_A] and list(spikes["title"]) == ["calcium scan"]
    bursts = pd.read_parquet(paths["bursts"])    # run B's table is empty: run A's rows and dtypes stay
    assert list(bursts["run_key"]) == [KEY_A] and bursts["cells"].dtype == np.int64 and "size" in bursts.columns
    scanned = pd.read_parquet(paths["scanned"])
    assert list(scanned["point"]) == [1, 2] and list(scanned.columns[:4]) == ["run_key", "protocol", "title", "point"]
    manifest = json.loads((results / "tables" / "combined.json").read_text())
    assert manifest["missing_folders"] == ["d4" * 32]
    # a table no successful run has any more disappears on the next combine
    with ResultIndex(results) as index:
        index.update(KEY_B, status="failed")
    assert sorted(combine_tables(results)) == ["bursts", "responses", "spikes"]
    assert not (results / "tables" / "scanned.parquet").exists()


def test_combine_tables_with_no_successful_run(tmp_path):
    results = tmp_path / "R"
    with ResultIndex(results) as index:
        index.upsert(row(KEY_A, status="failed"))
    assert combine_tables(results) == {}


# -- the results command --------------------------------------------------------------------

def results_cmd(*argv: str) -> int:
    ap = argparse.ArgumentParser(prog="protolang")
    sub = ap.add_subparsers(dest="command", required=True)
    add_results_parser(sub)
    args = ap.parse_args(["results", *argv])
    assert args.func is cmd_results
    return args.func(args)


def records(df: pd.DataFrame) -> list[dict]:
    """Rows as plain Python values, missing values as None (to compare exports read back)."""
    out = []
    for values in df.itertuples(index=False, name=None):
        rec = {}
        for col, v in zip(df.columns, values):
            if v is None or (np.isscalar(v) and pd.isna(v)) or v is pd.NA:
                v = None
            elif isinstance(v, np.generic):
                v = v.item()
            rec[col] = v
        out.append(rec)
    return out


def test_results_listing(tmp_path, capsys):
    results = tmp_path / "R"
    make_library(results)
    assert results_cmd(str(results)) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split() == ["key", "title", "point", "params", "status", "wall_s", "error"]
    body = lines[1:-1]
    assert [ln[:12] for ln in body] == [KEY_C[:12], KEY_A[:12], KEY_B[:12], ("d4" * 32)[:12]]
    starts = {lines[0].index(h) for h in ("title", "params", "status")}
    for ln in body:        # left-aligned columns start where their header starts
        assert all(ln[s - 2:s] == "  " and ln[s] != " " for s in starts), ln
    assert "engine failed" in body[0] and "second line" not in body[0]
    assert "ca=2.5 mM, mg=1 mM" in body[2] and "3.0" in body[2]
    assert lines[-1] == "4 runs: 3 ok, 1 failed"
    assert results_cmd(str(results), "--status", "failed", "ok", "--protocol", "CA_SCAN") == 0
    lines = capsys.readouterr().out.splitlines()
    assert [ln[:12] for ln in lines[1:-1]] == [KEY_A[:12], KEY_B[:12]]
    assert results_cmd(str(results), "--batch", "nope") == 0
    assert "match the filters" in capsys.readouterr().out


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".json"])
def test_results_export_run_list(tmp_path, suffix, capsys):
    results = tmp_path / "R"
    make_library(results)
    with ResultIndex(results) as index:
        index.update(KEY_A, started=1_717_171_717.123456, ended=1_717_171_719.623456)
        expected = index.runs(status="ok")
    out = tmp_path / f"runs{suffix}"
    assert results_cmd(str(results), "--status", "ok", "--export", str(out)) == 0
    assert f"3 runs written to {out}" in capsys.readouterr().out
    if suffix == ".csv":
        back = pd.read_csv(out, float_precision="round_trip")
    elif suffix == ".parquet":
        back = pd.read_parquet(out)
    else:
        back = pd.DataFrame(json.loads(out.read_text()))
    assert list(back.columns) == list(RUN_COLUMNS)
    assert records(back) == records(expected)


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".json"])
def test_results_export_table(tmp_path, suffix, capsys):
    results = tmp_path / "R"
    make_library(results)
    out = tmp_path / f"responses{suffix}"
    assert not (results / "tables").exists()
    assert results_cmd(str(results), "--table", "responses", "--export", str(out)) == 0   # builds the tables
    assert "table responses: 3 rows from 2 runs" in capsys.readouterr().out
    combined = pd.read_parquet(results / "tables" / "responses.parquet")
    if suffix == ".csv":
        back = pd.read_csv(out, dtype={"pair": str, "param_ca": str, "param_mg": str})
    elif suffix == ".parquet":
        back = pd.read_parquet(out)
    else:
        back = pd.DataFrame(json.loads(out.read_text()))
    assert records(back) == records(combined)
    # filters pick rows by their run
    assert results_cmd(str(results), "--table", "responses", "--protocol", "no such", "--export", str(out)) == 0
    capsys.readouterr()
    # a run that finished since the tables were combined is picked up
    key_e = "e5" * 32
    with ResultIndex(results) as index:
        index.upsert(row(key_e, protocol="/lib/late.protocol", title="late", status="ok"))
    write_run(results, key_e, {"responses": pd.DataFrame({"pair": [7], "amplitude_mV": [0.1]})})
    assert results_cmd(str(results), "--table", "responses", "--export", str(out)) == 0
    assert "table responses: 4 rows from 3 runs" in capsys.readouterr().out


def test_results_errors(tmp_path):
    results = tmp_path / "R"
    make_library(results)
    with pytest.raises(ProtocolError) as info:
        results_cmd(str(results), "--export", str(tmp_path / "runs.xlsx"))
    assert_user_error(info.value, "'.xlsx'", ".csv, .parquet, .json")
    assert not (tmp_path / "runs.xlsx").exists()
    with pytest.raises(ProtocolError) as info:
        results_cmd(str(results), "--export", str(tmp_path / "missing" / "runs.csv"))
    assert_user_error(info.value, "does not exist")
    with pytest.raises(ProtocolError) as info:
        results_cmd(str(results), "--table", "respones", "--export", str(tmp_path / "t.csv"))
    assert_user_error(info.value, "no combined table 'respones'", "bursts, responses, scanned, spikes",
                      "did you mean 'responses'?")
    with pytest.raises(ProtocolError) as info:
        results_cmd(str(results), "--table", "responses")
    assert_user_error(info.value, "needs --export")
    with pytest.raises(ProtocolError) as info:
        results_cmd(str(tmp_path))
    assert_user_error(info.value, "is not a results folder")
    with pytest.raises(ProtocolError) as info:
        results_cmd(str(tmp_path / "nowhere"))
    assert_user_error(info.value, "does not exist")
    with pytest.raises(SystemExit):      # argparse rejects an unknown status with its usage message
        results_cmd(str(results), "--status", "finished")


def _hold_lock(results, batch_id, ready, stop):
    from protolang.batch.index import BatchLock

    with BatchLock(results, batch_id):
        ready.set()
        stop.wait(60)


def test_a_new_batch_leaves_a_running_batch_alone(tmp_path):
    # Liveness through flock: the OS drops a dead process's lock (POSIX flock semantics, from memory),
    # so a batch still running keeps its queued/running rows while a dead batch's become interrupted.
    from protolang.batch.index import batch_alive
    from protolang.batch.runner import batch

    results = tmp_path / "R"
    ctx = mp.get_context("spawn")
    ready, stop = ctx.Event(), ctx.Event()
    holder = ctx.Process(target=_hold_lock, args=(str(results), "live", ready, stop))
    holder.start()
    try:
        assert ready.wait(60)
        with ResultIndex(results) as index:
            index.upsert(row("a", status="running", batch="live"))
            index.upsert(row("b", status="queued", batch="live"))
            index.upsert(row("c", status="running", batch="dead"))
            assert index.unfinished_batches() == ["dead", "live"]
        assert batch_alive(results, "live") and not batch_alive(results, "dead")
        lib = tmp_path / "lib"
        lib.mkdir()
        (lib / "broken.protocol").write_text("protocol \"x\"\nnonsense here\n")
        summary = batch([str(lib)], results, jobs=1, quiet=True)
        assert summary.invalid == 1
        statuses = dict(raw(results, "SELECT key, status FROM runs WHERE key IN ('a', 'b', 'c')"))
        assert statuses == {"a": "running", "b": "queued", "c": "interrupted"}
        assert not (results / "batches" / f"{summary.batch}.lock").exists()   # released and removed
    finally:
        holder.kill()          # dies without cleaning up: its lock file stays, its lock does not
        holder.join(30)
    assert (results / "batches" / "live.lock").exists()
    assert not batch_alive(results, "live")
    # so the next batch marks its runs interrupted
    batch([str(lib)], results, jobs=1, quiet=True)
    statuses = dict(raw(results, "SELECT key, status FROM runs WHERE key IN ('a', 'b')"))
    assert statuses == {"a": "interrupted", "b": "interrupted"}
