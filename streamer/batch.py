"""Batch mode: live (causal) and offline runs plus comparisons over a folder of recordings.

For every recording in a folder, :func:`process_recording` replays it through the same
path as ``ridgewatch replay --speed max`` (a causal log), runs the offline twin (an
offline log), and, when a reference sits beside it, compares both against it and
writes a report folder. :func:`run_batch` runs recordings in parallel on the local
cores (``concurrent.futures.ProcessPoolExecutor``) and writes a summary table across
recordings.

Running the same batch on a cluster
-----------------------------------
With the ``dask`` extra (``pip install "ridgewatch[dask]"``), ``ridgewatch batch FOLDER
--dask local`` runs the recordings on a ``dask.distributed`` local cluster (one
single-threaded worker process per core, or ``--jobs``), and ``--dask ADDRESS`` on the
workers of the scheduler at ``ADDRESS`` (e.g. ``tcp://scheduler:8786``).
:func:`run_batch` hands the same :func:`process_recording` calls to the cluster's
``concurrent.futures`` executor (:func:`dask_executor`) that it otherwise hands to a
local process pool, and writes the same summary. The recordings and ``out_dir`` must
be on storage every worker can reach, under the same paths.
"""

from __future__ import annotations

import contextlib
import fnmatch
import logging
import math
import os
import re
import string
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field, replace
from pathlib import Path

from streamer.errors import InputError

REFERENCE_SUFFIXES = (("_beats.csv", "hr"), ("_breaths.csv", "rr"), (".atr", "hr"),
                      ("_reference.csv", None))
"""Reference files looked for beside a recording, ``<stem><suffix>``, and the quantity
they hold (None: whatever the file says, e.g. a rate series)."""

RECORDING_PATTERNS = ("*.csv", "*.csv.gz", "*.hea", "*.edf", "*.xdf")


@dataclass(frozen=True)
class BatchOptions:
    """What every recording of a batch is run with."""

    out_dir: str
    profile: str = "wrist"
    channels: tuple = ()
    fs: float | None = None
    reference_suffixes: tuple = REFERENCE_SUFFIXES
    report: bool = True
    overwrite: bool = False
    """Replace the logs of an earlier batch in ``out_dir`` (only ridgewatch logs)."""
    time_column: str | None = None
    time_unit: str | None = None
    """The time column of the CSV recordings, and its unit (other formats state theirs)."""
    reference_patterns: tuple = ()
    """``[hr:|rr:]TEMPLATE`` strings (:func:`parse_reference_pattern`); when given they
    replace ``reference_suffixes`` (see :func:`find_references`)."""
    recording_pattern: str | None = None
    """The glob the recordings were found with; its one ``*`` is ``{id}`` in a template."""
    against_fs: float | None = None
    """Sampling rate (Hz) of sample numbers in the reference files (e.g. BIDMC breaths)."""
    against_column: str | None = None
    """The reference files' column to use (rate column, or sample-number column)."""
    extra: dict = field(default_factory=dict)


def recording_stem(path: Path) -> str:
    name = path.name
    for suffix in (".csv.gz", ".csv", ".hea", ".edf", ".xdf", ".gz"):
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return path.stem


def find_recordings(folder, pattern: str | None = None) -> list[Path]:
    """Recordings in ``folder`` (not its sub-folders), sorted; reference files and
    ridgewatch logs are left out."""
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: not a folder; give a folder of recordings")
    found = set()
    for pat in ([pattern] if pattern else RECORDING_PATTERNS):
        found.update(folder.glob(pat))
    recordings = []
    for p in sorted(found):
        if any(p.name.endswith(s) for s, _ in REFERENCE_SUFFIXES) or p.name.endswith("_truth.csv"):
            continue
        if p.suffix == ".csv" or p.name.endswith(".csv.gz"):
            with open(p, "rb") as fh:
                if fh.read(25).startswith(b"# ridgewatch estimate log"):
                    continue
        recordings.append(p)
    if not recordings:
        raise InputError(f"{folder}: no recordings found (looked for "
                         f"{pattern or ', '.join(RECORDING_PATTERNS)})")
    return recordings


def log_paths(path: Path, out_dir) -> tuple[Path, Path]:
    """The live and offline logs :func:`process_recording` writes for ``path``."""
    out = Path(out_dir) / recording_stem(path)
    return out / "live.csv", out / "offline.csv"


PLACEHOLDERS = ("stem", "id")
"""Names a reference template may use: ``{stem}`` is the recording's name without its
format's extension (``bidmc_01_Signals`` of ``bidmc_01_Signals.csv.gz``); ``{id}`` is
the part of its name the one ``*`` of the recording pattern matched (``01`` of it with
``--pattern 'bidmc_*_Signals.csv.gz'``)."""


def parse_reference_pattern(text: str, recording_pattern: str | None = None
                            ) -> tuple[str, str | None]:
    """``[hr:|rr:]TEMPLATE`` -> ``(template, quantity)``, checked.

    The template names a reference file beside each recording through
    :data:`PLACEHOLDERS` and may hold glob wildcards (``*``, ``?``); the prefix says
    which quantity the files hold (without it: whatever the file says).

    Raises
    ------
    InputError
        One line naming the option and what is wrong.

    Examples
    --------
    >>> parse_reference_pattern("rr:bidmc_{id}_Breaths.csv", "bidmc_*_Signals.csv.gz")
    ('bidmc_{id}_Breaths.csv', 'rr')
    """
    quantity = None
    template = text
    for prefix in ("hr:", "rr:"):
        if text.startswith(prefix):
            quantity, template = prefix[:2], text[len(prefix):]
    try:
        names = [name for _, name, _, _ in string.Formatter().parse(template) if name is not None]
    except ValueError as exc:
        raise InputError(f"--reference-pattern '{text}': {exc}; write placeholders as "
                         "{stem} or {id}") from None
    unknown = [n for n in names if n not in PLACEHOLDERS]
    if unknown:
        raise InputError(f"--reference-pattern '{text}': unknown placeholder {{{unknown[0]}}}; "
                         "use {stem} or {id}")
    if not names:
        raise InputError(f"--reference-pattern '{text}' does not name the recording; put "
                         "{stem} or {id} in it (e.g. '{stem}_ref.csv')")
    if "/" in template or os.sep in template:
        raise InputError(f"--reference-pattern '{text}': give a file name, without a folder "
                         "(references sit beside their recording)")
    if "id" in names and (recording_pattern is None or recording_pattern.count("*") != 1):
        raise InputError(f"--reference-pattern '{text}' uses {{id}}, which needs --pattern "
                         "with exactly one '*' (e.g. --pattern 'bidmc_*_Signals.csv.gz')")
    return template, quantity


def recording_id(path: Path, recording_pattern: str | None) -> str | None:
    """What the one ``*`` of ``recording_pattern`` matched in ``path``'s name."""
    if recording_pattern is None or recording_pattern.count("*") != 1:
        return None
    head, tail = recording_pattern.split("*")
    regex = fnmatch.translate(head)[4:-3] + "(.*)" + fnmatch.translate(tail)[4:-3]
    found = re.fullmatch(regex, path.name, flags=re.DOTALL)
    return found.group(1) if found else None


def find_references(path: Path, suffixes, patterns=(), recording_pattern: str | None = None
                    ) -> list[tuple[Path, str | None]]:
    """Every reference beside ``path`` with the quantity it holds.

    With ``patterns`` (``[hr:|rr:]TEMPLATE`` strings, :func:`parse_reference_pattern`):
    the files their templates name, wildcards expanded, sorted; the recording itself
    and estimate logs are never references. Without: ``<stem><suffix>`` for each of
    ``suffixes``.

    Raises
    ------
    InputError
        On a malformed pattern.
    """
    stem = recording_stem(path)
    if not patterns:
        return [(path.with_name(stem + suffix), quantity) for suffix, quantity in suffixes
                if path.with_name(stem + suffix).exists()]
    ident = recording_id(path, recording_pattern)
    found = []
    for text in patterns:
        template, quantity = parse_reference_pattern(text, recording_pattern)
        if "{id}" in template and ident is None:
            continue
        # Placeholders are filled with escaped text, so a '[' in a name stays literal.
        name = template.format(stem=glob_escape(stem), id=glob_escape(ident or ""))
        for match in sorted(path.parent.glob(name)):
            if match != path and match.is_file() and not _is_log(match):
                found.append((match, quantity))
    return found


def glob_escape(text: str) -> str:
    """``text`` with glob wildcards made literal (``[*]``), as :func:`glob.escape`."""
    return re.sub(r"([*?[])", r"[\1]", text)


def _is_log(path: Path) -> bool:
    try:
        with open(path, "rb") as fh:
            return fh.read(25).startswith(b"# ridgewatch estimate log")
    except OSError:
        return False


def process_recording(path, options: BatchOptions) -> list[dict]:
    """Live and offline logs for one recording, compared with its reference if any.

    Returns one summary row per (run, quantity, source) compared; a row with an
    ``error`` key when the recording cannot be processed (so one bad file does not stop
    a batch).
    """
    from estimators.config import get_profile
    from estimators.errors import ParameterError
    from estimators.monitor import offline_estimates, record_gaps
    from streamer.runner import gap_event
    from streamer.channels import select
    from streamer.runner import Runner
    from streamer.sinks.estimate_log import EstimateLog, read_log, write_offline_rows
    from streamer.sources.files import read_recording, recording_files
    from streamer.sources.replay import RecordingSource

    path = Path(path)
    stem = recording_stem(path)
    live_path, offline_path = log_paths(path, options.out_dir)
    out = live_path.parent
    out.mkdir(parents=True, exist_ok=True)
    try:
        is_csv = path.name.lower().endswith((".csv", ".csv.gz", ".tsv", ".tsv.gz"))
        recording = read_recording(path, fs=options.fs,
                                   time_column=options.time_column if is_csv else None,
                                   time_unit=options.time_unit if is_csv else None)
        selected = select(recording.info, list(options.channels) or None)
        profile = get_profile(options.profile)
        mapping = {s.name: s.kind for s in selected}
        config = {"profile": profile.to_dict(), "fs": recording.info.fs}
        if_exists = "overwrite" if options.overwrite else "refuse"
        inputs = recording_files(path)
        try:
            runner = Runner(RecordingSource(recording, chunk_s=1.0), selected, profile)
        except ParameterError as exc:
            raise InputError(f"{path}: {exc}") from None
        runner.log = EstimateLog(live_path, "replay", str(path), mapping,
                                 dict(config, mode="replay"), if_exists=if_exists,
                                 inputs=inputs)
        runner.run()
        estimates = offline_estimates(recording.samples[:, [s.index for s in selected]],
                                      recording.timestamps,
                                      [(s.name, s.kind) for s in selected],
                                      recording.info.fs, profile)
        with EstimateLog(offline_path, "offline", str(path), mapping,
                         dict(config, mode="offline"), if_exists=if_exists,
                         inputs=inputs) as off:
            write_offline_rows(off, estimates, recording.markers, math.nan,
                               [gap_event(recording.info.name, gap) for gap in
                                record_gaps(recording.timestamps, recording.info.fs)])
        references = find_references(path, options.reference_suffixes,
                                     options.reference_patterns, options.recording_pattern)
        if not references:
            return [{"recording": stem, "note": "no reference found"}]
        live, offline = read_log(live_path), read_log(offline_path)
        rows = []
        for reference, quantity in references:
            rows.extend(_compare_runs(stem, out, reference, quantity, live, offline,
                                      options))
        return rows
    except InputError as exc:
        return [{"recording": stem, "error": str(exc)}]


def _compare_runs(stem, out, reference, quantity, live, offline, options) -> list[dict]:
    from streamer.compare import add_overlay, load_other, pair_up, phases_of, summarize

    report = options.report
    try:
        other = load_other(reference, fs=options.against_fs, column=options.against_column)
    except InputError as exc:
        return [{"recording": stem, "reference": Path(reference).name, "error": str(exc)}]
    rows = []
    for run, table in (("live", live), ("offline", offline)):
        windows = {q: float(table.header["config"]["profile"][q]["window_s"]) for q in ("hr", "rr")}
        try:
            series = pair_up(table, other, quantity=quantity, window_s=windows)
        except InputError as exc:
            rows.append({"recording": stem, "run": run, "error": str(exc)})
            continue
        results = [summarize(s) for s in series]
        if report and run == "live":
            from streamer.report import write_report
            add_overlay(series, "offline", offline)
            # Named after the reference file when patterns may find several per quantity.
            folder = (f"report-{Path(reference).name.split('.')[0]}"
                      if options.reference_patterns else f"report-{quantity or 'rate'}")
            write_report(results, series, out / folder,
                         f"{stem}: live vs {Path(reference).name}", phases_of(series, table))
        for r in results:
            row = {"recording": stem, "run": run, "quantity": r["quantity"],
                   "source": r["source"], "reference": Path(reference).name,
                   "n": r["n"], "mae": r["mae"], "rmse": r["rmse"], "bias": r["bias"],
                   "within_tolerance": r["within_tolerance"], "coverage": r["coverage"]}
            if run == "live":
                # An offline run sees the whole record at once: its delay means nothing.
                row["delay_median_s"] = r["delay_median_s"]
            rows.append(row)
    return rows


DASK_CONNECT_TIMEOUT_S = 10.0
"""How long ``--dask ADDRESS`` waits for the scheduler to answer (seconds). Dask's own
default connect timeout is 30 s (from memory); a scheduler on a reachable network
answers within milliseconds, and a typing error in the address should not cost half a
minute. Our own choice."""

DASK_MISSING = "--dask needs the dask extra: pip install 'ridgewatch[dask]'"


@contextlib.contextmanager
def dask_executor(dask, workers: int | None = None, timeout_s: float | None = None):
    """A ``concurrent.futures`` executor on a Dask cluster, closed on exit.

    ``dask`` is ``"local"`` (a ``dask.distributed.LocalCluster`` of ``workers`` worker
    processes, default one per core, one thread each: a recording's run is one Python
    thread, and numba kernels and the report's figures are not shared between
    threads), a scheduler address, or a ``dask.distributed.Client`` the caller owns
    (left open).

    Raises
    ------
    InputError
        dask is not installed (:data:`DASK_MISSING`), or the scheduler does not answer
        within ``timeout_s`` (default :data:`DASK_CONNECT_TIMEOUT_S`).
    """
    timeout_s = DASK_CONNECT_TIMEOUT_S if timeout_s is None else timeout_s
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise InputError(DASK_MISSING) from None
    if isinstance(dask, Client):
        yield dask.get_executor()
        return
    # dask.distributed logs its cluster's life at INFO on its own loggers, which would
    # reach ridgewatch's stderr line by line: only its warnings and errors do.
    quiet = [logging.getLogger(name) for name in
             ["distributed", *logging.root.manager.loggerDict]
             if name.split(".")[0] == "distributed"]
    levels = [logger.level for logger in quiet]
    for logger in quiet:
        logger.setLevel(max(logger.getEffectiveLevel(), logging.WARNING))
    try:
        with _dask_client(dask, workers, timeout_s, Client, LocalCluster) as client:
            yield client.get_executor()
    finally:
        for logger, level in zip(quiet, levels):
            logger.setLevel(level)


@contextlib.contextmanager
def _dask_client(dask, workers, timeout_s, Client, LocalCluster):
    """A client of a new local cluster or of the scheduler at ``dask`` (see
    :func:`dask_executor`), closed on exit with its cluster."""
    cluster = None
    if dask == "local":
        cluster = LocalCluster(n_workers=workers or os.cpu_count() or 1, threads_per_worker=1,
                               processes=True, dashboard_address=None)
        client = Client(cluster)
    else:
        try:
            client = Client(dask, timeout=timeout_s)
        except ValueError as exc:  # dask's own words on what is wrong with it
            raise InputError(f"--dask {dask}: not a scheduler address "
                             f"({' '.join(str(exc).split())}); give local or an address "
                             "such as tcp://HOST:8786") from None
        except (OSError, TimeoutError) as exc:
            reason = " ".join(str(exc).split()) or type(exc).__name__
            raise InputError(f"--dask {dask}: no Dask scheduler answered within "
                             f"{timeout_s:g} s ({reason}); check the address (e.g. "
                             "tcp://HOST:8786) and that the scheduler is running") from None
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _map_recordings(pool, recordings: list[Path], options: BatchOptions, progress
                    ) -> list[dict]:
    """:func:`process_recording` of every recording on ``pool`` (an executor); rows in
    the order they finish."""
    rows = []
    futures = {pool.submit(process_recording, p, options): p for p in recordings}
    for done, future in enumerate(as_completed(futures), start=1):
        rows.extend(future.result())
        if progress:
            progress(done, len(recordings), futures[future])
    return rows


def run_batch(folder, options: BatchOptions, pattern: str | None = None, jobs: int | None = None,
              progress=None, dask=None) -> tuple[list[dict], dict]:
    """Process every recording of ``folder`` on ``jobs`` local processes (default: the
    number of cores), or on a Dask cluster (``dask``: ``"local"``, a scheduler address
    or a ``Client``; see :func:`dask_executor`); write the summary table. Returns
    (rows, written paths)."""
    if dask is not None:  # one line before any work when the extra is missing
        try:
            from dask import distributed  # noqa: F401  (binds no name 'dask')
        except ImportError:
            raise InputError(DASK_MISSING) from None
    from streamer.report import write_batch_summary

    recordings = find_recordings(folder, pattern)
    if options.reference_patterns:
        options = replace(options, recording_pattern=pattern)
        for text in options.reference_patterns:  # one line for a bad pattern, before any work
            parse_reference_pattern(text, pattern)
    # A file that is the reference of another recording is not a recording itself.
    references = {ref for p in recordings
                  for ref, _ in find_references(p, options.reference_suffixes,
                                                options.reference_patterns,
                                                options.recording_pattern)}
    recordings = [p for p in recordings if p not in references]
    if not recordings:
        raise InputError(f"{folder}: no recordings found, only reference files; choose the "
                         "recordings with --pattern")
    out_dir = Path(options.out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"--out {out_dir}: is a file, not a folder; give a folder for the "
                         "logs and reports")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"--out {out_dir}: cannot create the folder ({exc.strerror})") from None
    earlier = [path for p in recordings for path in log_paths(p, options.out_dir)
               if os.path.lexists(path)]
    if earlier and not options.overwrite:
        more = f" and {len(earlier) - 1} more" if len(earlier) > 1 else ""
        raise InputError(f"{options.out_dir}: holds the logs of an earlier batch ({earlier[0]}"
                         f"{more}); give another --out folder, or add --overwrite to replace "
                         "them")
    rows: list[dict] = []
    if dask is not None:
        workers = min(jobs, len(recordings)) if jobs else None
        with dask_executor(dask, workers) as pool:
            rows.extend(_map_recordings(pool, recordings, options, progress))
    elif (jobs := max(1, min(jobs or os.cpu_count() or 1, len(recordings)))) == 1:
        for i, path in enumerate(recordings):
            rows.extend(process_recording(path, options))
            if progress:
                progress(i + 1, len(recordings), path)
    else:
        with ProcessPoolExecutor(max_workers=jobs) as pool:
            rows.extend(_map_recordings(pool, recordings, options, progress))
    order = {recording_stem(p): i for i, p in enumerate(recordings)}
    rows.sort(key=lambda r: (order.get(r["recording"], 0), r.get("run", ""),
                             r.get("quantity", ""), r.get("source", "")))
    # A recording without a reference has no figures: it is named below the table
    # rather than given a row of blanks.
    unreferenced = [r["recording"] for r in rows if r.get("note") == "no reference found"]
    looked_for = (", ".join(options.reference_patterns) if options.reference_patterns else
                  ", ".join("<name>" + s for s, _ in options.reference_suffixes))
    notes = ([f"No reference found (looked for {looked_for}) for: {', '.join(unreferenced)}."]
             if unreferenced else [])
    table = [r for r in rows if r.get("note") != "no reference found"]
    written = write_batch_summary(table, options.out_dir, notes=notes)
    return rows, written
