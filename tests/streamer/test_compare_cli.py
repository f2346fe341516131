"""``ridgewatch compare`` from the command line: a wearable's PPG against a chest ECG
reference (--source / --against-source), and its one-line errors.

The recording is the first 40 s of the synthetic demo session (``short_csv`` of
test_cli): PPG, ECG, RESP and ACC_X from one simulated subject, so the PPG heart rate of
the live (causal) run and the ECG heart rate of the offline run describe one heart.
"""

from __future__ import annotations

import pytest

from streamer import cli
from streamer.sinks.estimate_log import read_log
from tests.streamer.test_cli import full_replay, short_csv  # noqa: F401  (shared fixtures)


def main_lines(argv, capfd):
    try:
        code = cli.main([str(a) for a in argv])
    except SystemExit as exc:
        code = exc.code
    out, err = capfd.readouterr()
    return code, out.splitlines(), err.splitlines()


@pytest.fixture(scope="module")
def offline_log(short_csv, tmp_path_factory):  # noqa: F811
    path = tmp_path_factory.mktemp("offline") / "offline.csv"
    assert cli.main(["offline", str(short_csv), "--log", str(path), "-q"]) == 0
    return path


def test_live_ppg_against_offline_ecg(full_replay, offline_log, tmp_path, capfd):  # noqa: F811
    assert {"PPG", "ECG"} <= {s for _, s in read_log(full_replay).pairs()}
    code, out, err = main_lines(["compare", full_replay, "--against", offline_log,
                                 "--source", "PPG", "--against-source", "ECG", "--quantity",
                                 "hr", "--report", tmp_path / "report"], capfd)
    assert code == 0, err
    assert len(out) == 1 and out[0].startswith("hr PPG vs offline.csv (hr/ECG): n=")
    fields = out[0].split()
    mae = float(fields[fields.index("MAE") + 1])
    within = float(fields[fields.index("tolerance") + 1])
    # The simulated PPG and ECG share one heart: the live PPG rate is within the
    # EC13-style tolerance (max(5 bpm, 10 %), ANSI/AAMI EC13 cited from memory) of the
    # offline ECG rate nearly everywhere; 2 bpm MAE is a loose bound on a clean
    # synthetic session (the demo's own figures are below 1 bpm against the truth).
    assert 0.0 < mae < 2.0 and within >= 95.0
    md = (tmp_path / "report" / "summary.md").read_text()
    assert "## hr / PPG vs offline.csv (hr/ECG)" in md
    written = float(md.split("| MAE (beats/min) | ")[1].split(" |")[0])
    assert abs(written - mae) <= 0.005 + 1e-12  # printed to 2, written to 3 decimals


def test_source_errors_are_one_line(full_replay, offline_log, capfd):  # noqa: F811
    sources = ", ".join(dict.fromkeys(s for _, s in read_log(full_replay).pairs()))
    offline_sources = ", ".join(dict.fromkeys(s for _, s in read_log(offline_log).pairs()))
    cases = [
        (["--source", "SpO2"],
         f"ridgewatch: error: {full_replay}: no source 'SpO2' (--source); its sources are "
         f"{sources}"),
        (["--source", "PPG", "--against-source", "chest"],
         f"ridgewatch: error: {offline_log}: no source 'chest' (--against-source); its "
         f"sources are {offline_sources}"),
        (["--source", "ACC_X"],
         f"ridgewatch: error: {full_replay}: no source 'ACC_X' (--source); its sources are "
         f"{sources}"),
    ]
    for extra, expected in cases:
        code, out, err = main_lines(["compare", full_replay, "--against", offline_log, *extra],
                                    capfd)
        assert (code, out, err) == (2, [], [expected])


def test_against_source_needs_a_log(full_replay, tmp_path, capfd):  # noqa: F811
    beats = tmp_path / "beats.csv"
    beats.write_text("beat_time_s\n1.0\n2.0\n3.0\n")
    code, out, err = main_lines(["compare", full_replay, "--against", beats, "--quantity", "hr",
                                 "--against-source", "ECG"], capfd)
    assert (code, out) == (2, [])
    assert err == [f"ridgewatch: error: --against-source ECG needs an estimate log as the "
                   f"reference; {beats} was read as events"]


def test_the_same_source_missing_names_the_option(full_replay, tmp_path, capfd):  # noqa: F811
    """A log of ECG only as the reference of a PPG log: the message says how to choose."""
    from estimators.estimate import Estimate
    from streamer.sinks.estimate_log import EstimateLog

    ecg_only = tmp_path / "chest.csv"
    with EstimateLog(ecg_only, "offline", "chest strap", {"ECG": "ecg"}, {}) as log:
        for t in range(5, 35):
            log.write(Estimate("hr", "ECG", float(t), 40.0, 70.0, 0.9, 0.9), 1.0)
    code, out, err = main_lines(["compare", full_replay, "--against", ecg_only, "--source", "PPG",
                                 "--quantity", "hr"], capfd)
    assert (code, out) == (2, [])
    assert err == [f"ridgewatch: error: {ecg_only} has none of hr/PPG to compare with; it "
                   "holds hr/ECG; choose its source with --against-source (one of ECG)"]


def test_use_now_scores_the_rate_now_at_its_newest_sample(tmp_path, capfd):
    """A synthetic PPG whose rate ramps at 1.5 bpm/s, replayed as live, compared with its
    exact truth (a rate series): ``--use now`` aligns the rate now at emitted_s and
    ``--use centre`` the centre rate at time_s, both within 1 bpm MAE (the forecast and
    the honest time_s); the centre rate read at emitted_s, what a user would get taking
    it as the current rate, is 2-3 bpm off."""
    import numpy as np

    from streamer.compare import load_other, pair_up, summarize, with_rate
    from streamer.simulation import pulse_train

    fs = 125.0
    t = np.arange(int(90 * fs)) / fs
    rate = 80.0 + 1.5 * np.clip(t - 30.0, 0.0, 40.0)
    rec = tmp_path / "ramp.csv"
    np.savetxt(rec, np.column_stack((t, pulse_train(fs, rate, seed=3))), fmt="%.5f",
               delimiter=",", header="time_s,PPG", comments="")
    truth = tmp_path / "truth.csv"
    np.savetxt(truth, np.column_stack((t[::12], rate[::12])), fmt="%.4f", delimiter=",",
               header="time_s,rate_per_min", comments="")
    log = tmp_path / "live.csv"
    assert cli.main(["replay", str(rec), "--speed", "max", "--display", "none", "-q",
                     "--log", str(log)]) == 0
    table = read_log(log)
    other = load_other(str(truth))

    def mae(use):
        [hr] = [summarize(s) for s in pair_up(with_rate(table, use, str(log)), other, "hr",
                                               "PPG")]
        return hr["mae"]

    cols = table.select("hr", "PPG").columns
    naive = np.nanmean(np.abs(cols["rate_per_min"] - np.interp(cols["emitted_s"], t, rate)))
    assert mae("now") <= 1.0 and mae("centre") <= 1.0
    assert naive >= 2.0
    capfd.readouterr()
    assert cli.main(["compare", str(log), "--against", str(truth), "--use", "now",
                     "--quantity", "hr"]) == 0
    out = capfd.readouterr().out
    assert f"MAE {mae('now'):.2f}" in out and "delay median 0.00 s" in out


def test_use_now_on_a_log_without_the_column_is_one_line(tmp_path, capfd):
    from streamer.sinks.estimate_log import COLUMNS_BEFORE_NOW

    old = tmp_path / "old.csv"
    old.write_text("# ridgewatch estimate log\n# mode: replay\n" + ",".join(COLUMNS_BEFORE_NOW)
                   + "\n4.0000,0.0000,hr,PPG,72.000,0.9000,0.8000,4.0000,,show\n")
    ref = tmp_path / "ref.csv"
    ref.write_text("time_s,rate_per_min\n0,72\n10,72\n")
    code = cli.main(["compare", str(old), "--against", str(ref), "--use", "now"])
    err = capfd.readouterr().err
    assert code == 2
    assert err.strip() == (f"ridgewatch: error: {old} has no rate-now column (written before "
                           "ridgewatch logged it); compare its window-centre rate with --use "
                           "centre")
