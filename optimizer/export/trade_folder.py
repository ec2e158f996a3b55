"""The trade folder of a sweep: ``trade.csv`` (and ``trade.parquet`` with pyarrow), ``pareto.csv``,
three figures, ``trade-report.md`` and ``manifest.json``, written whole or not at all; and
:func:`run_sweep_file`, what ``slingback sweep FILE`` does (read, check the output, sweep, write).

One job: the trade folder.  May import: numpy, pandas, matplotlib (inside the figure function),
pyarrow (optional), the package version, :mod:`optimizer.constants`, :mod:`optimizer.problem`,
:mod:`optimizer.timescales`, the export layer's folder and manifest helpers, the file layer (to
read a sweep file) and the trade wing (:mod:`optimizer.trade`), which never imports this.
"""

from __future__ import annotations

import dataclasses
import json
import math
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import CAUTION, SECONDS_PER_DAY
from ..problem import Problem
from ..timescales import format_epoch
from ..trade.front import pareto
from .manifest import write_folder_manifest
from .run import OutputPathError, refuse_existing, staged_folder

__all__ = ["write_trade_folder", "run_sweep_file", "TradeFolderError", "FIGURES"]


class TradeFolderError(OutputPathError):
    """The trade folder could not be written after the sweep; the message says where, and where
    the solved cells are kept (:attr:`kept`, the resume folder to rerun with)."""

    def __init__(self, message: str, kept: Path | None):
        super().__init__(message)
        self.kept = kept


def run_sweep_file(path, out_dir, *, workers=None, scheduler=None, resume_dir=None, progress=None,
                   force: bool = False) -> tuple[pd.DataFrame, Path]:
    """What ``slingback sweep FILE`` does: read the file, check the output folder, run its sweep,
    write the trade folder.

    Returns the table and the folder.  Bad input raises a ``ProblemError`` (the file and key) and an
    output folder that exists (without ``force``), lies under a file or cannot be written raises
    ``FileExistsError`` or :class:`~optimizer.export.run.OutputPathError`, all before anything is
    solved.  Every solved cell is kept in a resume store as it finishes: ``resume_dir``, or a
    temporary folder removed once the trade folder is written (or when the sweep stops on an
    error or Ctrl-C: nothing is left behind then).  If the trade folder cannot be
    written at the end, :class:`TradeFolderError` names the folder and where the cells are kept
    (rerun with that resume folder to write it without solving again); nothing is left half-written.
    """
    from ..problem_file import load_sweep_file
    from ..trade.schedule import sweep

    problem, s = load_sweep_file(path)
    out = Path(out_dir)
    refuse_existing(out, force)  # exists, is a file, lies under a file or cannot be written: before solving
    own = resume_dir is None
    store = Path(tempfile.mkdtemp(prefix=f"slingback-{problem.name}-sweep-")) if own else Path(resume_dir)
    try:
        df = sweep(problem, s.burn_epochs, s.arrival_epochs, return_durations_days=s.return_durations_days,
                   arrival_tolerance_s=s.arrival_tolerance_s, burn_index=s.burn_index, max_iter=s.max_iter,
                   retry=s.retry, workers=workers, scheduler=scheduler, resume_dir=store, progress=progress)
    except BaseException:  # interrupted or refused: a temporary store goes (the user's own stays)
        if own:
            shutil.rmtree(store, ignore_errors=True)
        raise
    try:
        folder = write_trade_folder(df, out, problem=problem, force=force)
    except (OSError, OutputPathError) as exc:
        why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise TradeFolderError(f"the trade folder {out} could not be written ({why}); nothing was left there. "
                               f"The {len(df)} solved cells are kept in the resume folder {store}: run again "
                               f"with --resume {store} (resume_dir) to write the folder without solving again",
                               store) from None
    if own:
        shutil.rmtree(store, ignore_errors=True)
    return df, folder


def write_trade_folder(df: pd.DataFrame, out_dir, *, problem: Problem | None = None, force: bool = False,
                meta: dict | None = None) -> Path:
    """Write a trade folder: ``trade.csv``, ``trade.parquet`` (when pyarrow is installed),
    ``pareto.csv``, ``trade-map.png``, ``trade-abort.png``, ``trade-pareto.png``, ``trade-report.md``.

    Written into a temporary folder beside ``out_dir`` and moved into place when complete; an
    existing ``out_dir`` is replaced only with ``force=True``.
    """
    meta = dict(meta or df.attrs.get("sweep", {}))
    out = Path(out_dir)
    with staged_folder(out, force) as tmp:
        front = pareto(df)
        _csv(df, tmp / "trade.csv")
        _csv(front, tmp / "pareto.csv")
        wrote_parquet = _parquet(df, tmp / "trade.parquet", meta)
        figures = _figures(df, front, tmp, meta)
        (tmp / "trade-report.md").write_text(_report(df, front, meta, figures, wrote_parquet, problem))
        files = {"trade.csv": "one row per cell of the grid",
                 "pareto.csv": "verified cells not beaten on both Δv and return duration"}
        if wrote_parquet:
            files["trade.parquet"] = "the same table as trade.csv (metadata key `slingback`)"
        files.update(figures)
        files["trade-report.md"] = "the trade report"
        write_folder_manifest(tmp, _manifest_head(meta, problem), files)
    return out


def _model_name(meta) -> str:
    return (meta.get("model") or {}).get("name", "unknown")


def _manifest_head(meta, problem) -> dict:
    """What the trade folder's manifest.json says besides its files (the CSV files are plain)."""
    name = meta.get("problem") or (problem.name if problem is not None else "unknown")
    tol = meta.get("tolerances") or (dataclasses.asdict(problem.tolerances) if problem is not None else {})
    return {"format": "slingback-trade-manifest", "format_version": 1,
            "software": {"name": "slingback", "version": __version__}, "case": name,
            "model": _model_name(meta), "verification_tolerances": tol, "time_scale": "TDB",
            "frame": "Earth-centred inertial, ICRF axes",
            "units": "in the column names; return duration from the start epoch",
            "csv_dialect": "comma-separated, header on line 1, no comment lines, UTF-8", "caution": CAUTION}


def _csv(df, path):
    """A plain CSV: header on line 1, no comment lines (metadata in manifest.json)."""
    df.to_csv(path, index=False, lineterminator="\n")


def _parquet(df, path, meta) -> bool:
    # the one import guard in the package: pyarrow is the optional `parquet` extra of
    # pyproject.toml, so without it the trade table is written as CSV only
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        return False
    table = pa.Table.from_pandas(df, preserve_index=False)
    extra = {b"slingback": json.dumps({"software": f"slingback {__version__}", "caution": CAUTION,
                                       "sweep": meta}, default=str).encode()}
    table = table.replace_schema_metadata({**(table.schema.metadata or {}), **extra})
    pq.write_table(table, path)
    return True


def _fmt_epoch(t) -> str:
    return f"{format_epoch(t, 0)} TDB" if t is not None and math.isfinite(t) else "-"


def _report(df, front, meta, figures, wrote_parquet, problem) -> str:
    n = len(df)
    counts = df["status"].value_counts().to_dict()
    ok = df[df["verified"]]
    lines = [f"# Trade study: {meta.get('problem', problem.name if problem else 'unknown')}", "",
             f"> **Caution.** {CAUTION}", ""]
    if meta.get("summary"):
        lines += [meta["summary"], ""]
    axis = meta.get("axis", "arrival_epochs")
    ax_text = ("arrival epoch" + (f" (within ±{meta.get('arrival_tolerance_s', 0) / 3600:g} h)"
                                  if meta.get("arrival_tolerance_s") else " (exact)")
               if axis == "arrival_epochs" else "longest return duration from the start epoch")
    n_rows, n_cols = df["row"].nunique(), df["col"].nunique()
    lines += ["## Set-up", "",
              f"- Grid: {n_rows} burn epochs x {n_cols} values of {ax_text}; {n} cells, each a minimum-Δv "
              "solve with the burn epoch fixed, checked by independent re-propagation.",
              f"- Burn epochs {_fmt_epoch(df['burn_epoch_tdb_s'].min())} to "
              f"{_fmt_epoch(df['burn_epoch_tdb_s'].max())}.",
              f"- Model: {_model_name(meta)}; start epoch {_fmt_epoch(meta.get('start_epoch_tdb_s'))}; "
              "frame Earth-centred inertial (ICRF axes); epochs TDB.",
              f"- Verification tolerances: {json.dumps(meta.get('tolerances', {}))}.",
              f"- IPOPT per cell: iteration cap {meta.get('max_iter', '-')}, options "
              f"{json.dumps(meta.get('cell_ipopt_options', {}))} (constraint tolerances as in a single solve); "
              f"failed cells retried from a verified neighbour: {'yes' if meta.get('retry', True) else 'no'}.",
              f"- Software: slingback {__version__}; sweep wall time {meta.get('wall_s', math.nan):.1f} s.", ""]
    ref = meta.get("reference") or {}
    if ref:
        lines += ["## Reference (the problem's own minimum-Δv optimum)", "",
                  f"- Status {ref.get('status')}; total Δv {_num(ref.get('total_dv_mps'))} m/s; arrival "
                  f"{_fmt_epoch(ref.get('arrival_epoch_tdb_s'))} "
                  f"({_num(ref.get('return_duration_days'), 3)} d after start).",
                  "- No cell can be cheaper: every cell narrows this problem.", ""]
    lines += ["## Cells", "", "| status | cells |", "|---|---|"]
    lines += [f"| {k} | {v} |" for k, v in sorted(counts.items())]
    lines += [""]
    if not ok.empty:
        cheap = ok.loc[ok["total_dv_mps"].idxmin()]
        fast = ok.loc[ok["return_duration_days"].idxmin()]
        lines += [f"- Cheapest verified cell {cheap['cell']}: {cheap['total_dv_mps']:.3f} m/s, burn "
                  f"{_fmt_epoch(cheap['burn_epoch_tdb_s'])}, arrival {_fmt_epoch(cheap['arrival_epoch_tdb_s'])}.",
                  f"- Fastest verified cell {fast['cell']}: {fast['return_duration_days']:.3f} d after start, "
                  f"{fast['total_dv_mps']:.3f} m/s, burn {_fmt_epoch(fast['burn_epoch_tdb_s'])}.", ""]
    bad = df[~df["verified"]]
    if not bad.empty:
        lines += ["Cells without a verified answer (kept in `trade.csv` with status and reason):", ""]
        for _, r in bad.head(20).iterrows():
            lines.append(f"- {r['cell']} ({r['status']}): {str(r['reason'])[:160]}")
        if len(bad) > 20:
            lines.append(f"- ... and {len(bad) - 20} more")
        lines.append("")
    lines += ["## Pareto set (total Δv against return duration)", ""]
    if front.empty:
        lines += ["No verified cell.", ""]
    else:
        lines += ["| cell | burn epoch (TDB) | arrival epoch (TDB) | return duration (d) | total Δv (m/s) |",
                  "|---|---|---|---|---|"]
        for _, r in front.iterrows():
            lines.append(f"| {r['cell']} | {_fmt_epoch(r['burn_epoch_tdb_s'])} | "
                         f"{_fmt_epoch(r['arrival_epoch_tdb_s'])} | {r['return_duration_days']:.3f} | "
                         f"{r['total_dv_mps']:.3f} |")
        lines.append("")
    lines += ["## Files", "", "- `trade.csv`: every cell (reads as it is with `pandas.read_csv(path)`).",
              "- `manifest.json`: every file with its role; columns and units of the CSV files."]
    if wrote_parquet:
        lines.append("- `trade.parquet`: the same table (metadata key `slingback`).")
    lines.append("- `pareto.csv`: the Pareto set.")
    lines += [f"- `{name}`: {what}" for name, what in figures.items()]
    lines += ["", f"*{CAUTION}*", ""]
    return "\n".join(lines)


def _num(x, digits=3) -> str:
    return f"{x:.{digits}f}" if isinstance(x, (int, float)) and math.isfinite(x) else "-"


# ------------------------------------------------------------------------------------------------
# Figures (matplotlib, Agg backend, PNG)
# ------------------------------------------------------------------------------------------------
#: Neutral ink and marker colours; the Δv map uses matplotlib's perceptually uniform "cividis".
_INK, _GUIDE, _NOGO, _FRONT, _CHEAP, _FAST = "#2b2f33", "#b9c0c7", "#7a7f85", "#9c4a3c", "#3f5f7f", "#b8862d"
_SHADE = "#e4e6e9"


def _edges(v) -> np.ndarray:
    """Cell edges around grid values (midpoints; half a step beyond the ends)."""
    v = np.asarray(v, dtype=float)
    if v.size == 1:
        return np.array([v[0] - 0.5, v[0] + 0.5])
    mid = 0.5 * (v[1:] + v[:-1])
    return np.r_[v[0] - (mid[0] - v[0]), mid, v[-1] + (v[-1] - mid[-1])]


FIGURES = {"trade-map.png": "total Δv over burn epoch x arrival, cells without a verified answer "
                            "shaded and crossed, the Pareto set circled",
           "trade-abort.png": "Δv and return duration against burn epoch, cheapest and fastest verified return",
           "trade-pareto.png": "total Δv against return duration, every verified cell and the Pareto set"}


def _figures(df, front, out: Path, meta) -> dict:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    t_start = meta.get("start_epoch_tdb_s")
    if t_start is None or not math.isfinite(t_start):
        t_start = float(df["burn_epoch_tdb_s"].min())
    start_text = f"{format_epoch(t_start, 0)} TDB"
    axis = meta.get("axis", "arrival_epochs" if df["arrival_grid_epoch_tdb_s"].notna().any() else "durations")
    rows = np.sort(df["row"].unique())
    cols = np.sort(df["col"].unique())
    burn_h = (df.groupby("row")["burn_epoch_tdb_s"].first().reindex(rows).to_numpy() - t_start) / 3600.0
    if axis == "arrival_epochs":
        arrival = df.groupby("col")["arrival_grid_epoch_tdb_s"].first().reindex(cols).to_numpy()
        col_val = (arrival - t_start) / SECONDS_PER_DAY
        ylabel = f"arrival epoch, days after {start_text}"
    else:
        col_val = df.groupby("col")["max_return_duration_days"].first().reindex(cols).to_numpy()
        ylabel = f"longest return duration, days after {start_text}"
    xlabel = f"burn epoch, hours after {start_text}"
    dv = np.full((len(cols), len(rows)), np.nan)
    for r, c, v, ok in df[["row", "col", "total_dv_mps", "verified"]].itertuples(index=False):
        if ok:
            dv[c, r] = v

    def style(ax, title):
        ax.set_title(title, loc="left", fontsize=10, color=_INK)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        for side in ("left", "bottom"):
            ax.spines[side].set_color(_GUIDE)
        ax.tick_params(colors=_INK, labelsize=8)
        ax.grid(color=_GUIDE, linewidth=0.4, alpha=0.6)

    def save(fig, name):
        fig.text(0.01, 0.008, f"slingback {__version__} | {meta.get('problem', '')} | model {_model_name(meta)} | "
                 f"epochs TDB | CAUTION: {CAUTION}", fontsize=5.2, color="#6b7177", wrap=True)
        what = f"{meta.get('problem', '')}: {FIGURES[name]}. {CAUTION}"
        fig.savefig(out / name, dpi=130, metadata={"Software": f"slingback {__version__}", "Description": what})
        plt.close(fig)

    # 1. the map
    fig, ax = plt.subplots(figsize=(8.0, 5.6))
    fig.subplots_adjust(bottom=0.16)
    style(ax, "Minimum total Δv of each cell (m/s)")
    finite = np.isfinite(dv)
    if len(rows) >= 2 and len(cols) >= 2 and finite.sum() >= 4 and np.nanmax(dv) > np.nanmin(dv):
        levels = np.linspace(np.nanmin(dv), np.nanmax(dv), 13)
        cs = ax.contourf(burn_h, col_val, np.ma.masked_invalid(dv), levels=levels, cmap="cividis")
        ax.contour(burn_h, col_val, np.ma.masked_invalid(dv), levels=levels, colors="white", linewidths=0.3,
                   alpha=0.6)
    else:
        bx, by = np.meshgrid(burn_h, col_val)
        cs = ax.scatter(bx[finite], by[finite], c=dv[finite], cmap="cividis", s=60, marker="s")
    fig.colorbar(cs, ax=ax, label="total Δv (m/s)")
    xe, ye = _edges(burn_h), _edges(col_val)
    if (~finite).any():  # the cells without a verified answer, shaded
        from matplotlib.colors import ListedColormap

        ax.pcolormesh(xe, ye, np.ma.masked_where(finite, np.ones_like(dv)), cmap=ListedColormap([_SHADE]),
                      shading="flat", zorder=0)
    ax.set_xlim(xe[0], xe[-1])
    ax.set_ylim(ye[0], ye[-1])
    bx, by = np.meshgrid(burn_h, col_val)
    ax.scatter(bx[finite], by[finite], s=4, color=_INK, alpha=0.5, label="verified cell")
    if (~finite).any():
        ax.scatter(bx[~finite], by[~finite], marker="x", s=36, color=_NOGO, linewidths=1.2,
                   label="no verified answer (infeasible or failed), shaded")
    if not front.empty:
        ax.scatter(burn_h[front["row"].to_numpy()], col_val[front["col"].to_numpy()], s=90, facecolors="none",
                   edgecolors=_FRONT, linewidths=1.4, label="Pareto set (Δv vs return duration)")
    ax.set_xlabel(xlabel, fontsize=8, color=_INK)
    ax.set_ylabel(ylabel, fontsize=8, color=_INK)
    ax.legend(fontsize=7, loc="upper right", framealpha=0.85)
    save(fig, "trade-map.png")

    # 2. against burn (abort) time: cheapest and fastest verified return per burn epoch
    ok = df[df["verified"]]
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(8.0, 6.0), sharex=True)
    fig.subplots_adjust(bottom=0.14, hspace=0.25)
    style(a1, "Total Δv against burn epoch")
    style(a2, "Return duration against burn epoch")
    if not ok.empty:
        cheap = ok.loc[ok.groupby("row")["total_dv_mps"].idxmin()]
        fast = ok.loc[ok.sort_values(["return_duration_days", "total_dv_mps"]).groupby("row").head(1).index]
        fast = fast.sort_values("row")
        for sel, colour, name, mark in ((cheap, _CHEAP, "cheapest return", "o"), (fast, _FAST, "fastest return", "s")):
            h = (sel["burn_epoch_tdb_s"].to_numpy() - t_start) / 3600.0
            a1.plot(h, sel["total_dv_mps"], marker=mark, ms=4, color=colour, label=name)
            a2.plot(h, sel["return_duration_days"], marker=mark, ms=4, color=colour, label=name)
        a1.legend(fontsize=7)
    a1.set_ylabel("total Δv (m/s)", fontsize=8, color=_INK)
    a2.set_ylabel(f"days from {start_text} to arrival", fontsize=8, color=_INK)
    a2.set_xlabel(xlabel, fontsize=8, color=_INK)
    save(fig, "trade-abort.png")

    # 3. Pareto set
    fig, ax = plt.subplots(figsize=(8.0, 5.0))
    fig.subplots_adjust(bottom=0.16)
    style(ax, "Total Δv against return duration (verified cells)")
    if not ok.empty:
        ax.scatter(ok["return_duration_days"], ok["total_dv_mps"], s=10, color=_GUIDE, label="verified cell")
    if not front.empty:
        ax.step(front["return_duration_days"], front["total_dv_mps"], where="post", color=_FRONT, linewidth=1.0)
        ax.scatter(front["return_duration_days"], front["total_dv_mps"], s=22, color=_FRONT, label="Pareto set")
        ax.legend(fontsize=7)
    ax.set_xlabel(f"return duration, days from {start_text} to arrival", fontsize=8, color=_INK)
    ax.set_ylabel("total Δv (m/s)", fontsize=8, color=_INK)
    save(fig, "trade-pareto.png")
    return dict(FIGURES)
