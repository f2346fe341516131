"""``ridgewatch batch --dask``: the same summary on a Dask cluster as on the local
process pool, and one-line errors when dask is missing or the scheduler cannot be
reached.

The folder is two copies of the first 60 s of the synthetic demo session with its exact
beat and breath times as references (``replay_files/``)."""

from __future__ import annotations

import csv
import gzip
import shutil
import socket
import sys
from pathlib import Path

import numpy as np
import pytest

from streamer import batch, cli
from streamer.batch import BatchOptions, run_batch
from streamer.sources.files import read_recording

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "replay_files" / "cycling_trial.csv.gz"
CUT_S = 60.0


def demo_folder(folder: Path) -> Path:
    """Two 60 s recordings (PPG and RESP) with beat and breath references."""
    folder.mkdir()
    recording = read_recording(DEMO)
    n = int(CUT_S * recording.info.fs)
    names = recording.info.channel_names
    data = np.column_stack([recording.timestamps[:n]]
                           + [recording.samples[:n, names.index(c)] for c in ("PPG", "RESP")])
    text = "time_s,PPG,RESP\n" + "\n".join(",".join(f"{x:.5f}" for x in row)
                                           for row in data) + "\n"
    for stem in ("first", "second"):
        with gzip.open(folder / f"{stem}.csv.gz", "wt") as fh:
            fh.write(text)
        for kind in ("beats", "breaths"):
            times = np.loadtxt(DEMO.with_name(f"cycling_trial_{kind}.csv"), skiprows=1)
            (folder / f"{stem}_{kind}.csv").write_text(
                "time_s\n" + "\n".join(f"{t:.4f}" for t in times[times < CUT_S]) + "\n")
    return folder


def summary(out: Path) -> list[dict]:
    with open(out / "batch_summary.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def test_dask_local_cluster_gives_the_local_pool_summary(tmp_path):
    distributed = pytest.importorskip(
        "dask.distributed", reason="dask is not installed (pip install 'ridgewatch[dask]')")
    folder = demo_folder(tmp_path / "recordings")
    options = dict(profile="wrist", report=False)
    pool_rows, pool_written = run_batch(folder, BatchOptions(out_dir=str(tmp_path / "pool"),
                                                             **options), jobs=2)
    # In-process workers (processes=False) start in a fraction of a second; one thread
    # each, as the real local cluster runs them.
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        dask_rows, dask_written = run_batch(folder, BatchOptions(
            out_dir=str(tmp_path / "dask"), **options), dask=client)
        assert client.status == "running"  # a caller's client is left open
    assert dask_rows == pool_rows
    assert {r["recording"] for r in pool_rows} == {"first", "second"}
    assert {(r["run"], r["quantity"]) for r in pool_rows} == {
        ("live", "hr"), ("offline", "hr"), ("live", "rr"), ("offline", "rr")}
    assert summary(tmp_path / "dask") == summary(tmp_path / "pool")
    assert dask_written["markdown"].read_text() == pool_written["markdown"].read_text()
    for stem in ("first", "second"):  # the logs are written where the pool writes them
        assert (tmp_path / "dask" / stem / "offline.csv").is_file()


def test_dask_missing_is_one_line(tmp_path, monkeypatch, capfd):
    # A None entry in sys.modules makes the import fail as an absent package does.
    monkeypatch.setitem(sys.modules, "dask", None)
    monkeypatch.setitem(sys.modules, "dask.distributed", None)
    folder = demo_folder(tmp_path / "recordings")
    code = cli.main(["batch", str(folder), "--out", str(tmp_path / "out"), "--dask", "local",
                     "-q"])
    err = capfd.readouterr().err
    assert code == 2
    assert err == ("ridgewatch: error: --dask needs the dask extra: pip install "
                   "'ridgewatch[dask]'\n")
    assert not (tmp_path / "out").exists()  # refused before any work


def test_unreachable_scheduler_is_one_line_after_the_timeout(tmp_path, monkeypatch, capfd):
    pytest.importorskip("dask.distributed",
                        reason="dask is not installed (pip install 'ridgewatch[dask]')")
    monkeypatch.setattr(batch, "DASK_CONNECT_TIMEOUT_S", 0.5)
    with socket.socket() as s:  # a port nothing listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    folder = demo_folder(tmp_path / "recordings")
    address = f"tcp://127.0.0.1:{port}"
    code = cli.main(["batch", str(folder), "--out", str(tmp_path / "out"), "--dask", address,
                     "-q"])
    err = capfd.readouterr().err
    assert code == 2
    assert err == (f"ridgewatch: error: --dask {address}: no Dask scheduler answered within "
                   f"0.5 s (Timed out trying to connect to {address} after 0.5 s); check the "
                   "address (e.g. tcp://HOST:8786) and that the scheduler is running\n")
    code = cli.main(["batch", str(folder), "--out", str(tmp_path / "out"), "--dask",
                     "nonsense", "-q"])
    err = capfd.readouterr().err
    assert code == 2
    assert err == ("ridgewatch: error: --dask nonsense: not a scheduler address (missing port "
                   "number in address 'nonsense'); give local or an address such as "
                   "tcp://HOST:8786\n")


def test_jobs_with_a_scheduler_address_is_refused(tmp_path, capfd):
    folder = demo_folder(tmp_path / "recordings")
    code = cli.main(["batch", str(folder), "--out", str(tmp_path / "out"), "--dask",
                     "tcp://127.0.0.1:8786", "--jobs", "2", "-q"])
    assert code == 2
    assert capfd.readouterr().err == (
        "ridgewatch: error: --jobs applies to local processes (and --dask local); the "
        "scheduler at tcp://127.0.0.1:8786 runs on its own workers: drop --jobs\n")
