"""Comparison reports: a Markdown and an HTML summary with figures, and batch tables.

:func:`write_report` takes the result dicts of :func:`streamer.compare.summarize` and the
:class:`streamer.compare.PairedSeries` they came from, and writes into a folder:

* ``summary.md`` - one metrics table and one calibration table per (quantity, source),
  and a phase table when the log has markers (also in ``phases.csv``);
* ``summary.html`` - the same content in one self-contained file (figures embedded);
* per (quantity, source) three PNG figures: rate over time, Bland-Altman plot, and
  ``|error|`` against confidence.

:func:`write_batch_summary` writes one table over many recordings (Markdown and CSV).

matplotlib is imported inside the drawing functions (and only its Agg canvas is used, no
pyplot, no global backend switch), so importing :mod:`streamer` never pulls it in.
"""

from __future__ import annotations

import base64
import csv
import html
import math
import re
from pathlib import Path

import numpy as np

from streamer.errors import InputError

DISCLAIMER = ("ridgewatch is a research tool, not a medical device; it defers to licensed "
              "clinical practice and local regulations.")

BAND_FRACTION = 0.2
"""Half-width of the confidence band in the rate figure, as a fraction of the rate at
confidence 0. The band's half-width is ``(1 - confidence) * BAND_FRACTION * rate``: it
vanishes at confidence 1 and widens as confidence falls. It is a visual cue of the
tracker's confidence, not a statistical confidence interval."""

UNITS = {"hr": "beats/min", "rr": "breaths/min"}

_METRIC_ROWS = (
    # (result key, label, unit-bearing?)
    ("rows", "rows in the log", False),
    ("n", "pairs compared (n)", False),
    ("coverage", "coverage (fraction of rows with an estimate)", False),
    ("reference_coverage", "fraction of rows with a reference", False),
    ("mae", "MAE", True),
    ("rmse", "RMSE", True),
    ("mape_percent", "MAPE (%)", False),
    ("bias", "bias (estimate - reference)", True),
    ("sd", "SD of differences", True),
    ("loa_lower", "95 % limits of agreement, lower", True),
    ("loa_upper", "95 % limits of agreement, upper", True),
    ("pearson_r", "Pearson r", False),
    ("within_tolerance", "fraction within tolerance", False),
    ("lag_s", "best lag (s, positive = estimate lags)", False),
    ("delay_median_s", "delay median (s)", False),
    ("delay_p95_s", "delay 95th percentile (s)", False),
)


def format_value(value) -> str:
    """How numbers appear in every table: integers as is, floats with 3 decimals,
    NaN and None as ``n/a``."""
    if value is None:
        return "n/a"
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return "n/a" if math.isnan(value) else f"{float(value):.3f}"
    return str(value)


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", text).strip("_") or "x"


def _prepare_dir(out_dir) -> Path:
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the report folder {out}: {exc.strerror}") from None
    return out


def _write_text(path: Path, text: str) -> None:
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror}") from None


# ---------------------------------------------------------------------------- figures


def _new_figure(width=8.0, height=4.0):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100)
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path: Path) -> None:
    fig.tight_layout()
    try:
        fig.savefig(path, format="png")
    except OSError as exc:
        raise InputError(f"cannot write the figure {path}: {exc.strerror}") from None


def plot_rate(series, path: Path, phase_rows: list[dict] | None = None) -> None:
    """Rate over time: the estimate with its confidence band (see :data:`BAND_FRACTION`),
    the reference, the reference's instantaneous rate when it is events, and any extra
    curves of the series; with ``phase_rows``, a labelled vertical line at the start of
    each phase that begins at a marker."""
    fig = _new_figure()
    ax = fig.add_subplot(1, 1, 1)
    t, est = series.time_s, series.estimate
    conf = np.clip(np.nan_to_num(series.confidence, nan=0.0), 0.0, 1.0)
    half = (1.0 - conf) * BAND_FRACTION * est
    ax.fill_between(t, est - half, est + half, color="tab:blue", alpha=0.25, linewidth=0,
                    label="estimate band (wider = less confident)")
    ax.plot(t, est, color="tab:blue", linewidth=1.2, label=f"estimate ({series.source})")
    if series.events_s is not None and series.events_s.size > 1:
        mid = (series.events_s[:-1] + series.events_s[1:]) / 2
        inst = 60.0 / np.diff(series.events_s)
        inside = (mid >= np.nanmin(t)) & (mid <= np.nanmax(t)) if t.size else mid < 0
        ax.plot(mid[inside], inst[inside], ".", color="0.6", markersize=2,
                label="reference, per interval")
    ax.plot(t, series.reference, color="black", linewidth=1.0,
            label=f"reference ({series.reference_label})")
    colors = ("tab:orange", "tab:green", "tab:purple", "tab:brown")
    for i, (label, t_extra, rate_extra) in enumerate(series.extra_curves):
        ax.plot(t_extra, rate_extra, color=colors[i % len(colors)], linewidth=1.0, label=label)
    for row in phase_rows or []:
        if row["phase"] != _first_phase_label() or row.get("marker_source"):
            ax.axvline(row["start_s"], color="0.4", linestyle=":", linewidth=1.0)
            ax.annotate(str(row["phase"]), (row["start_s"], 1.0), xycoords=("data", "axes fraction"),
                        xytext=(2, -2), textcoords="offset points", rotation=90, va="top",
                        fontsize="x-small", color="0.3")
    ax.set_xlabel("time (s)")
    ax.set_ylabel(f"{series.quantity} ({UNITS.get(series.quantity, 'per min')})")
    ax.set_title(f"{series.quantity} / {series.source} over time")
    ax.grid(True, alpha=0.3)
    ax.legend(loc="best", fontsize="small")
    _save(fig, path)


def _first_phase_label() -> str:
    from streamer.compare import FIRST_PHASE

    return FIRST_PHASE


def plot_bland_altman(series, result: dict, path: Path) -> None:
    """Difference against mean of estimate and reference, with bias and 95 % limits of
    agreement (Bland & Altman, Lancet 1986)."""
    fig = _new_figure(6.0, 4.5)
    ax = fig.add_subplot(1, 1, 1)
    both = np.isfinite(series.estimate) & np.isfinite(series.reference)
    est, ref = series.estimate[both], series.reference[both]
    ax.scatter((est + ref) / 2, est - ref, s=8, color="tab:blue", alpha=0.6)
    for key, style, name in (("bias", "-", "bias"), ("loa_lower", "--", "-1.96 SD"),
                             ("loa_upper", "--", "+1.96 SD")):
        value = result.get(key, math.nan)
        if math.isfinite(value):
            ax.axhline(value, color="tab:red", linestyle=style, linewidth=1.0,
                       label=f"{name} = {value:.2f}")
    if not both.any():
        ax.text(0.5, 0.5, "no paired values", transform=ax.transAxes, ha="center")
    unit = UNITS.get(series.quantity, "per min")
    ax.set_xlabel(f"mean of estimate and reference ({unit})")
    ax.set_ylabel(f"estimate - reference ({unit})")
    ax.set_title(f"Bland-Altman: {series.quantity} / {series.source}")
    ax.grid(True, alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize="small")
    _save(fig, path)


def plot_error_vs_confidence(series, result: dict, path: Path) -> None:
    """|error| of each pair against its confidence, with the median per calibration bin."""
    fig = _new_figure(6.0, 4.5)
    ax = fig.add_subplot(1, 1, 1)
    err = np.abs(series.estimate - series.reference)
    keep = np.isfinite(err) & np.isfinite(series.confidence)
    ax.scatter(series.confidence[keep], err[keep], s=8, color="tab:blue", alpha=0.5,
               label="pairs")
    bins = result.get("calibration", [])
    centres = [(b["confidence_low"] + b["confidence_high"]) / 2 for b in bins]
    medians = [b["median_abs_error"] for b in bins]
    if bins:
        ax.plot(centres, medians, "o-", color="tab:red", label="median per bin")
    if not keep.any():
        ax.text(0.5, 0.5, "no paired values", transform=ax.transAxes, ha="center")
    ax.set_xlim(0.0, 1.0)
    ax.set_xlabel("confidence")
    ax.set_ylabel(f"|error| ({UNITS.get(series.quantity, 'per min')})")
    ax.set_title(f"|error| vs confidence: {series.quantity} / {series.source}")
    ax.grid(True, alpha=0.3)
    ax.legend(loc="best", fontsize="small")
    _save(fig, path)


# ---------------------------------------------------------------------------- tables


def _metric_table(result: dict) -> tuple[list[str], list[list[str]]]:
    unit = UNITS.get(result.get("quantity"), "per min")
    rows = []
    for key, label, with_unit in _METRIC_ROWS:
        if key in result:
            rows.append([f"{label} ({unit})" if with_unit else label, format_value(result[key])])
    tol = (f"max({result.get('tolerance_abs', math.nan):g} {unit}, "
           f"{100 * result.get('tolerance_rel', math.nan):g} % of reference)")
    rows.append(["tolerance", tol])
    return ["metric", "value"], rows


def _calibration_table(result: dict) -> tuple[list[str], list[list[str]]]:
    rows = [[f"{format_value(b['confidence_low'])}-{format_value(b['confidence_high'])}",
             format_value(b["count"]), format_value(b["median_abs_error"]),
             format_value(b["fraction_within"])]
            for b in result.get("calibration", [])]
    return ["confidence", "count", "median abs error", "fraction within tolerance"], rows


_PHASE_COLUMNS = (
    # (row key, heading, unit-bearing?, short heading for the terminal)
    ("phase", "phase", False, "phase"),
    ("start_s", "start (s)", False, "start s"),
    ("duration_s", "duration (s)", False, "length s"),
    ("estimates", "estimates", False, "rows"),
    ("mean_rate", "mean rate", True, "mean"),
    ("reference_mean", "reference mean", True, "ref mean"),
    ("n", "pairs", False, "pairs"),
    ("mae", "MAE", True, "MAE"),
    ("bias", "bias", True, "bias"),
    ("loa_lower", "LoA lower", True, "LoA low"),
    ("loa_upper", "LoA upper", True, "LoA high"),
    ("within_tolerance", "within tolerance", False, "within"),
    ("time_to_steady_s", "time to steady (s)", False, "steady after s"),
)
"""Columns of a phase table, in order; a column no row has (the agreement columns
without a reference) is left out."""


def phase_table(rows: list[dict], short: bool = False) -> tuple[list[str], list[list[str]]]:
    """Heading and cells of the phase table of one (quantity, source)
    (rows of :func:`streamer.compare.phase_rows`); ``short`` headings without units
    for the terminal."""
    if not rows:
        return [], []
    unit = UNITS.get(rows[0].get("quantity"), "per min")
    columns = [c for c in _PHASE_COLUMNS if any(c[0] in r for r in rows)]
    head = [brief if short else f"{label} ({unit})" if with_unit else label
            for _, label, with_unit, brief in columns]
    cells = [[format_value(r.get(key)) if key != "phase" else str(r["phase"])
              for key, _, _, _ in columns] for r in rows]
    return head, cells


def steady_note(quantity: str) -> str:
    """One sentence defining the time to steady for ``quantity``."""
    from streamer.compare import STEADY

    band, hold_s = STEADY.get(quantity, STEADY["hr"])
    unit = UNITS.get(quantity, "per min")
    return (f"Time to steady: from the phase's start to the first estimate from which the "
            f"rate stays within +-{band:g} {unit} of its own median over the rest of the "
            f"phase, and the rest lasts at least {hold_s:g} s; n/a when it never settles.")


def format_phase_table(rows: list[dict]) -> str:
    """A phase table as aligned plain-text lines for the terminal: a title line naming
    the quantity, source and unit, then the table."""
    head, cells = phase_table(rows, short=True)
    if not head:
        return ""
    quantity, source = rows[0]["quantity"], rows[0]["source"]
    title = f"{quantity} {source} by phase ({UNITS.get(quantity, 'per min')}):"
    widths = [max(len(h), *(len(r[j]) for r in cells)) for j, h in enumerate(head)]

    def line(items):
        return "  ".join(x.ljust(w) if j == 0 else x.rjust(w)
                         for j, (x, w) in enumerate(zip(items, widths))).rstrip()

    return "\n".join([title, line(head)] + [line(r) for r in cells])


def _md_table(head: list[str], rows: list[list[str]]) -> str:
    def line(cells):
        return "| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |"
    return "\n".join([line(head), line(["---"] * len(head))] + [line(r) for r in rows])


def _html_table(head: list[str], rows: list[list[str]]) -> str:
    out = ["<table>", "<tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head) + "</tr>"]
    for r in rows:
        out.append("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in r) + "</tr>")
    out.append("</table>")
    return "\n".join(out)


def _heading(result: dict) -> str:
    text = f"{result['quantity']} / {result['source']} vs {result['reference']}"
    window = result.get("window_s", math.nan)
    if result.get("reference_kind") == "events" and isinstance(window, float) \
            and math.isfinite(window):
        text += f" (reference averaged over {window:g} s windows)"
    return text


_HTML_STYLE = ("body{font-family:sans-serif;max-width:60em;margin:2em auto;}"
               "table{border-collapse:collapse;margin:0.5em 0 1em;}"
               "td,th{border:1px solid #999;padding:2px 8px;text-align:left;}"
               "img{max-width:100%;}")


def write_report(results: list[dict], series, out_dir, title: str,
                 phases: dict | None = None) -> dict:
    """Write ``summary.md``, ``summary.html`` and the figures for a comparison.

    Parameters
    ----------
    results : list of dict
        From :func:`streamer.compare.summarize` (or :func:`streamer.compare.compare`).
    series : list of PairedSeries or dict
        The paired series the results came from (matched by quantity and source).
    out_dir : str or Path
        Folder to write into (created if needed; files in it are overwritten).
    title : str
        Heading of the summary.
    phases : dict, optional
        Phase rows per (quantity, source) (:func:`streamer.compare.phases_of`): each
        section then has a phase table, and ``phases.csv`` holds them all. Empty or
        None (a log without markers): no phase tables, no ``phases.csv``.

    Returns
    -------
    dict
        ``{"markdown": Path, "html": Path, "figures": [Path, ...]}``, plus
        ``"phases": Path`` when phase tables were written.

    Raises
    ------
    InputError
        When the folder or a file cannot be written.
    """
    out = _prepare_dir(out_dir)
    items = series.values() if isinstance(series, dict) else series
    by_key = {(s.quantity, s.source): s for s in items}
    md = [f"# {title}", "", DISCLAIMER, ""]
    body_html = [f"<h1>{html.escape(title)}</h1>", f"<p><em>{html.escape(DISCLAIMER)}</em></p>"]
    figures: list[Path] = []
    used: set[str] = set()
    for result in results:
        key = (result["quantity"], result["source"])
        heading = _heading(result)
        md += [f"## {heading}", ""]
        body_html.append(f"<h2>{html.escape(heading)}</h2>")
        head, rows = _metric_table(result)
        md += [_md_table(head, rows), ""]
        body_html.append(_html_table(head, rows))
        phase_rows = (phases or {}).get(key)
        if phase_rows:
            head, rows = phase_table(phase_rows)
            intro = f"Phases (cut at the log's markers). {steady_note(key[0])}"
            md += [intro, "", _md_table(head, rows), ""]
            body_html += [f"<p>{html.escape(intro)}</p>", _html_table(head, rows)]
        head, rows = _calibration_table(result)
        if rows:
            md += ["Calibration (error per confidence bin):", "", _md_table(head, rows), ""]
            body_html += ["<p>Calibration (error per confidence bin):</p>",
                          _html_table(head, rows)]
        paired = by_key.get(key)
        if paired is None:
            continue
        stem = f"{_safe(key[0])}_{_safe(key[1])}"
        while stem in used:
            stem += "_"
        used.add(stem)
        drawn = []
        for name, caption, draw in (
            ("rate", "rate over time (band: wider = less confident"
                     + ("; dotted lines: markers)" if phase_rows else ")"),
             lambda p: plot_rate(paired, p, phase_rows)),
            ("bland_altman", "Bland-Altman plot", lambda p: plot_bland_altman(paired, result, p)),
            ("error_vs_confidence", "|error| vs confidence",
             lambda p: plot_error_vs_confidence(paired, result, p)),
        ):
            path = out / f"{name}_{stem}.png"
            draw(path)
            figures.append(path)
            drawn.append((path, caption))
        for path, caption in drawn:
            md += [f"![{caption}]({path.name})", ""]
            data = base64.b64encode(path.read_bytes()).decode("ascii")
            body_html.append(f'<figure><img alt="{html.escape(caption)}" '
                             f'src="data:image/png;base64,{data}">'
                             f"<figcaption>{html.escape(caption)}</figcaption></figure>")
    md_path, html_path = out / "summary.md", out / "summary.html"
    _write_text(md_path, "\n".join(md).rstrip() + "\n")
    page = ("<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\">"
            f"<title>{html.escape(title)}</title><style>{_HTML_STYLE}</style></head>"
            "<body>\n" + "\n".join(body_html) + "\n</body></html>\n")
    _write_text(html_path, page)
    written = {"markdown": md_path, "html": html_path, "figures": figures}
    all_phase_rows = [row for result in results
                      for row in (phases or {}).get((result["quantity"], result["source"]), [])]
    if all_phase_rows:
        written["phases"] = write_csv(all_phase_rows, out / "phases.csv")
    return written


def write_csv(rows: list[dict], path) -> Path:
    """Rows as a CSV at full precision (columns: the union of keys in order of first
    appearance; a key a row lacks, or NaN, is an empty cell)."""
    path = Path(path)
    columns: list[str] = []
    for row in rows:
        for key, value in row.items():
            if key not in columns and not isinstance(value, (list, tuple, dict)):
                columns.append(key)
    try:
        with open(path, "w", encoding="utf-8", newline="") as fh:
            writer = csv.writer(fh)
            writer.writerow(columns)
            for row in rows:
                # Full precision: the CSV is for further analysis, not for reading.
                writer.writerow(["" if _is_missing(row.get(c)) else row.get(c) for c in columns])
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror}") from None
    return path


def write_batch_summary(rows: list[dict], out_dir, name: str = "batch_summary",
                        notes: list[str] | None = None) -> dict:
    """One table over many recordings, as Markdown and CSV.

    Parameters
    ----------
    rows : list of dict
        One dict per recording (and quantity/source), e.g. a result of
        :func:`streamer.compare.summarize` plus a ``recording`` key. Columns are the
        union of the keys in order of first appearance; values that are lists or dicts
        (such as ``calibration``) are left out.
    out_dir : str or Path
        Folder to write into (created if needed).
    name : str
        File stem of ``<name>.md`` and ``<name>.csv``.
    notes : list of str, optional
        Lines written below the Markdown table (e.g. recordings without a reference).

    Returns
    -------
    dict
        ``{"markdown": Path, "csv": Path}``.

    Raises
    ------
    InputError
        When the folder or a file cannot be written.
    """
    out = _prepare_dir(out_dir)
    columns: list[str] = []
    for row in rows:
        for key, value in row.items():
            if key not in columns and not isinstance(value, (list, tuple, dict)):
                columns.append(key)
    # A key a row lacks is a figure that means nothing for it (e.g. the delay of an
    # offline run): an empty cell, unlike n/a (a figure that could not be computed).
    table = [[format_value(row[c]) if c in row else "" for c in columns] for row in rows]
    md_path, csv_path = out / f"{name}.md", out / f"{name}.csv"
    md = [f"# Batch summary ({len(rows)} rows)", "", DISCLAIMER, "",
          _md_table(columns, table) if columns else "(no results)"]
    if notes:
        md += ["", *notes]
    _write_text(md_path, "\n".join(md) + "\n")
    write_csv(rows, csv_path)
    return {"markdown": md_path, "csv": csv_path}


def _is_missing(value) -> bool:
    return value is None or (isinstance(value, (float, np.floating)) and math.isnan(value))
