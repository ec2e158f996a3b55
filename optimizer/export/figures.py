"""Figures of a plan (matplotlib, Agg backend, PNG), in slingback's own plain style.

* ``path-inertial.png``: the path in the Earth-centred inertial x-y plane (ICRF axes);
* ``path-rotating.png``: the path in the Earth-Moon rotating frame (x towards the Moon);
* ``altitude.png``: altitude above Earth (and the Moon) against time, log scale;
* ``burns.png``: Δv of each burn beside its cap;
* ``search.png``: the global search's landscape (screened Δv against burn epoch, solved starts).

Markers: burns are upward triangles, the perilune a diamond, the arrival a square; the path is
drawn from the independent re-propagation.

One job: a plan's figures.  May import: matplotlib, numpy, the package version,
:mod:`optimizer.constants`, :mod:`optimizer.frames` and :mod:`optimizer.timescales`; the sampled
path is passed in.
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .. import __version__  # noqa: E402
from ..constants import CAUTION, SECONDS_PER_DAY  # noqa: E402
from ..frames import inertial_to_rotating  # noqa: E402
from ..timescales import format_epoch  # noqa: E402

__all__ = ["write_figures", "write_search_figure", "PALETTE", "FIGURES"]

#: Neutral palette: ink, path, faint guide lines, bodies, and three marker colours.
PALETTE = {"ink": "#2b2f33", "path": "#3f5f7f", "guide": "#b9c0c7", "earth": "#8ea9bf",
           "moon": "#a7a69d", "burn": "#9c4a3c", "perilune": "#b8862d", "arrival": "#5d7f62",
           "cap": "#d5d9dd"}
FIGURES = {"path-inertial.png": "Path, Earth-centred inertial (ICRF x-y)",
           "path-rotating.png": "Path, Earth-Moon rotating frame",
           "altitude.png": "Altitude over time",
           "burns.png": "Δv per burn",
           "search.png": "Global search: screened Δv against burn epoch, solved starts"}


def _style(ax, title):
    ax.set_title(title, loc="left", fontsize=10, color=PALETTE["ink"])
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(PALETTE["guide"])
    ax.tick_params(colors=PALETTE["ink"], labelsize=8)
    ax.grid(color=PALETTE["guide"], linewidth=0.4, alpha=0.6)


def _legend(ax, size) -> None:
    """A legend when something on the axes has a label (matplotlib warns on an empty one)."""
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=size, frameon=False, loc="best")


def _save(fig, path, plan, model_name):
    status = plan.status.upper() + ("" if plan.verified else " - NOT VERIFIED")
    fig.tight_layout(rect=(0, 0.07, 1, 1))
    fig.text(0.01, 0.005, f"slingback {__version__} | {plan.name} | model {model_name} | {status}\n"
             f"CAUTION: {CAUTION}", fontsize=5.2, color="#6b7177", wrap=True)
    fig.savefig(path, dpi=130, metadata={"Software": f"slingback {__version__}",
                                         "Description": f"{plan.name}, {status}. {CAUTION}"})
    plt.close(fig)


def _markers(ax, xy_of, plan, sampled):
    """Burns, perilune and arrival, placed with ``xy_of(epoch_index)``."""
    for i, b in enumerate(plan.burns, 1):
        k = int(np.searchsorted(sampled.t, b.epoch).clip(0, sampled.t.size - 1))
        x, y = xy_of(k)
        ax.plot(x, y, "^", color=PALETTE["burn"], ms=7, zorder=5, label="burn" if i == 1 else None)
        ax.annotate(f" {i}", (x, y), fontsize=7, color=PALETTE["burn"])
    for name, marker, colour in (("perilune", "D", PALETTE["perilune"]), ("entry", "s", PALETTE["arrival"]),
                                 ("perigee", "s", PALETTE["arrival"])):
        e = sampled.event(name)
        if e is not None:
            k = int(np.searchsorted(sampled.t, e.epoch).clip(0, sampled.t.size - 1))
            x, y = xy_of(k)
            ax.plot(x, y, marker, color=colour, ms=6, zorder=6, label=name)


def write_figures(sampled, plan, problem, out_dir, *, earth_radius_km: float, moon_radius_km: float | None,
                  model_name: str) -> list[str]:
    """Draw the figures into ``out_dir``; returns the file names written."""
    out_dir = Path(out_dir)
    written = []
    r = sampled.y[:, :3] / 1000.0  # thousand km
    ink = PALETTE["ink"]

    fig, ax = plt.subplots(figsize=(6.4, 6.0))
    ax.plot(r[:, 0], r[:, 1], color=PALETTE["path"], lw=1.2, label="path (re-propagated)")
    if sampled.moon_r is not None:
        m = sampled.moon_r / 1000.0
        ax.plot(m[:, 0], m[:, 1], color=PALETTE["guide"], lw=0.8, ls="--", label="Moon's track")
        peri = sampled.event("perilune")
        k = int(np.searchsorted(sampled.t, peri.epoch).clip(0, len(m) - 1)) if peri else -1
        ax.plot(m[k, 0], m[k, 1], "o", color=PALETTE["moon"], ms=9, label="Moon (at perilune)" if peri else "Moon")
    ax.plot(0, 0, "o", color=PALETTE["earth"], ms=10, label="Earth")
    _markers(ax, lambda k: (r[k, 0], r[k, 1]), plan, sampled)
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x, 1000 km (ICRF)", color=ink, fontsize=8)
    ax.set_ylabel("y, 1000 km (ICRF)", color=ink, fontsize=8)
    _style(ax, f"{plan.name}: path, Earth-centred inertial")
    _legend(ax, 7)
    _save(fig, out_dir / "path-inertial.png", plan, model_name)
    written.append("path-inertial.png")

    if sampled.moon_r is not None:
        rr, _ = inertial_to_rotating(sampled.y[:, :3], sampled.y[:, 3:], sampled.moon_r, sampled.moon_v)
        rr = rr / 1000.0
        fig, ax = plt.subplots(figsize=(6.4, 6.0))
        ax.plot(rr[:, 0], rr[:, 1], color=PALETTE["path"], lw=1.2, label="path (re-propagated)")
        ax.plot(0, 0, "o", color=PALETTE["earth"], ms=10, label="Earth")
        d = np.linalg.norm(sampled.moon_r, axis=1) / 1000.0
        ax.plot(d.mean(), 0, "o", color=PALETTE["moon"], ms=9, label="Moon")
        _markers(ax, lambda k: (rr[k, 0], rr[k, 1]), plan, sampled)
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_xlabel("x towards the Moon, 1000 km", color=ink, fontsize=8)
        ax.set_ylabel("y, 1000 km", color=ink, fontsize=8)
        _style(ax, f"{plan.name}: path, Earth-Moon rotating frame")
        _legend(ax, 7)
        _save(fig, out_dir / "path-rotating.png", plan, model_name)
        written.append("path-rotating.png")

    days = (sampled.t - sampled.t[0]) / SECONDS_PER_DAY
    fig, ax = plt.subplots(figsize=(7.0, 4.0))
    alt_e = np.maximum(np.linalg.norm(sampled.y[:, :3], axis=1) - earth_radius_km, 1.0)
    ax.semilogy(days, alt_e, color=PALETTE["path"], lw=1.2, label="above Earth")
    if sampled.moon_r is not None and moon_radius_km is not None:
        alt_m = np.maximum(np.linalg.norm(sampled.y[:, :3] - sampled.moon_r, axis=1) - moon_radius_km, 1.0)
        ax.semilogy(days, alt_m, color=PALETTE["moon"], lw=1.0, label="above the Moon")
    for i, b in enumerate(plan.burns, 1):
        ax.axvline((b.epoch - sampled.t[0]) / SECONDS_PER_DAY, color=PALETTE["burn"], lw=0.8, ls=":",
                   label="burn" if i == 1 else None)
    for e in sampled.events:
        if e.name in ("perilune", "entry", "perigee"):
            colour = PALETTE["perilune"] if e.name == "perilune" else PALETTE["arrival"]
            ax.plot((e.epoch - sampled.t[0]) / SECONDS_PER_DAY, max(e.altitude_km, 1.0),
                    "D" if e.name == "perilune" else "s", color=colour, ms=6, label=f"{e.name} {e.altitude_km:.1f} km")
    ax.set_xlabel(f"days since {format_epoch(sampled.t[0], 0)} TDB", color=ink, fontsize=8)
    ax.set_ylabel("altitude, km", color=ink, fontsize=8)
    _style(ax, f"{plan.name}: altitude")
    _legend(ax, 7)
    _save(fig, out_dir / "altitude.png", plan, model_name)
    written.append("altitude.png")

    fig, ax = plt.subplots(figsize=(6.0, 3.6))
    n = len(plan.burns)
    x = np.arange(1, n + 1)
    caps = [problem.burns[i].max_dv_mps if i < len(problem.burns) else math.nan for i in range(n)]
    ax.bar(x, [b.dv_mps for b in plan.burns], width=0.35, color=PALETTE["burn"], label="Δv")
    for xi, b, cap in zip(x, plan.burns, caps):
        ax.annotate(f"{b.dv_mps:.2f} m/s\n(cap {cap:g})", (xi, b.dv_mps), ha="center", va="bottom",
                    fontsize=7, color=ink)
    if n == 0:
        ax.text(0.5, 0.5, "no burns", transform=ax.transAxes, ha="center", color=ink)
    ax.margins(y=0.25)
    ax.set_xlim(0.4, n + 0.6)
    ax.grid(False, axis="x")
    ax.set_xticks(x, [f"burn {i}" for i in x])
    ax.set_ylabel("Δv, m/s", color=ink, fontsize=8)
    _style(ax, f"{plan.name}: Δv per burn (total {plan.total_dv_mps:.2f} m/s)")
    _save(fig, out_dir / "burns.png", plan, model_name)
    written.append("burns.png")
    return written


def write_search_figure(plan, problem, out_dir, *, model_name: str) -> list[str]:
    """``search.png``: screened Δv against burn epoch for every seed family of the global search,
    the solved starts and the chosen answer, with each burn window's bounds (written only when
    the plan records a search)."""
    search = (plan.solver or {}).get("search")
    if not search or not search.get("seeds"):
        return []
    t0 = plan.start_epoch
    fig, ax = plt.subplots(figsize=(7.0, 4.2))
    families = sorted({s["family"] for s in search["seeds"]})
    shades = ["#3f5f7f", "#8ea9bf", "#b8862d", "#9c4a3c", "#5d7f62", "#6b7177"]
    for k, fam in enumerate(families):
        pts = sorted((s["epoch_tdb_s"], s["burn"], s["screened_dv_mps"]) for s in search["seeds"]
                     if s["family"] == fam and s["screened_dv_mps"] is not None)
        for burn in sorted({p[1] for p in pts}):
            xs = [(p[0] - t0) / 3600.0 for p in pts if p[1] == burn]
            ys = [p[2] for p in pts if p[1] == burn]
            ax.plot(xs, ys, "-o", color=shades[k % len(shades)], ms=3.5, lw=0.8,
                    label=f"screened, burn {burn}, {fam}")
    for i, s in enumerate(search.get("starts", [])):
        dv = s.get("total_dv_mps")
        if dv is None:
            continue
        x = (s["epoch_tdb_s"] - t0) / 3600.0
        chosen = search.get("chosen") == i
        ax.plot(x, dv, "s", ms=8 if chosen else 6, mfc=PALETTE["arrival"] if chosen else "none",
                mec=PALETTE["arrival"], label="solved start (chosen filled)" if i == 0 else None)
    for b in problem.burns:
        for edge in b.window:
            ax.axvline((edge - t0) / 3600.0, color=PALETTE["guide"], lw=0.8, ls=":")
    ax.set_xlabel("burn epoch, hours after the start (TDB)", color=PALETTE["ink"], fontsize=8)
    ax.set_ylabel("Δv, m/s", color=PALETTE["ink"], fontsize=8)
    plotted = [s["screened_dv_mps"] for s in search["seeds"] if s["screened_dv_mps"] is not None]
    plotted += [s["total_dv_mps"] for s in search.get("starts", []) if s.get("total_dv_mps") is not None]
    if plotted and min(plotted) > 0:
        ax.set_yscale("log")
    else:  # a zero Δv (a start already on a free return) has no logarithm: linear near zero
        ax.set_yscale("symlog", linthresh=max(1e-3, min((y for y in plotted if y > 0), default=1e-3)))
        ax.set_ylim(bottom=0.0)
    _style(ax, f"{plan.name}: global search, Δv against burn epoch (dotted: burn windows)")
    _legend(ax, 6)
    _save(fig, Path(out_dir) / "search.png", plan, model_name)
    return ["search.png"]
