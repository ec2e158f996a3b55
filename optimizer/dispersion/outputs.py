"""A dispersion run end to end, and its folder: samples.csv, summary.json, figures, report.md.

The folder is written into a temporary folder beside the destination and moved into place whole
(:func:`optimizer.export.run.staged_folder`).

May import constants, timescales, the file layer, the solve wing (the margin re-solve), export and the dispersion wing's own modules; pandas and matplotlib.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import CAUTION
from ..timescales import format_epoch
from .lincov import linear_covariance
from .montecarlo import dispersion_model, nominal_of, run_samples
from .sampling import DISPERSION_ATOL, DISPERSION_RTOL

__all__ = ["wilson_interval", "summarise", "required_margin", "run_dispersion", "write_dispersion", "temporary_store",
           "QUANTITIES", "WILSON_SOURCE"]

WILSON_SOURCE = ("E. B. Wilson, 'Probable inference, the law of succession, and statistical inference', "
                 "J. Am. Stat. Assoc. 22 (1927) 209-212 (title and pages from memory)")
#: Summarised quantities: column, unit, what it is.
QUANTITIES = {
    "entry_flight_path_deg": ("deg", "flight-path angle at the entry interface"),
    "perilune_altitude_km": ("km", "perilune altitude (closest approach)"),
    "perigee_altitude_km": ("km", "vacuum perigee altitude of the return"),
    "entry_epoch_offset_s": ("s", "entry epoch minus the nominal entry epoch"),
    "entry_downrange_km": ("km", "entry point downrange of the nominal one (inertial)"),
    "entry_crossrange_km": ("km", "entry point crossrange of the nominal one (inertial)"),
    "entry_speed_kms": ("km/s", "inertial speed at the entry interface"),
}
#: Linear-covariance outputs shown beside the Monte Carlo quantity of the same meaning.
LINEAR = {"entry_flight_path_deg": "entry_flight_path_deg", "perilune_altitude_km": "perilune_altitude_km",
          "entry_epoch_offset_s": "entry_epoch_tdb_s", "entry_downrange_km": "entry_downrange_km",
          "entry_crossrange_km": "entry_crossrange_km"}
Z95 = 1.959963984540054  # two-sided 95 % normal quantile


def wilson_interval(k: int, n: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval of a binomial share ``k / n`` (E. B. Wilson, J. Am. Stat. Assoc. 1927)."""
    if n <= 0:
        return (math.nan, math.nan)
    p = k / n
    den = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / den
    half = z / den * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def summarise(df: pd.DataFrame, nominal_values: dict) -> dict:
    """Mean, sigma (n - 1), 3-sigma, min and max of each quantity over the samples that have it."""
    out = {}
    for col, (unit, text) in QUANTITIES.items():
        x = df[col].to_numpy(dtype=float)
        x = x[np.isfinite(x)]
        s = float(np.std(x, ddof=1)) if x.size > 1 else math.nan
        out[col] = {"unit": unit, "what": text, "samples": int(x.size), "nominal": nominal_values.get(col),
                    "mean": float(np.mean(x)) if x.size else math.nan, "sigma": s, "three_sigma": 3 * s,
                    "min": float(np.min(x)) if x.size else math.nan,
                    "max": float(np.max(x)) if x.size else math.nan}
    return out


def required_margin(stats: dict, corridor, nominal_fpa: float) -> dict:
    """The flight-path margin the measured spread needs: 3-sigma plus the bias of the mean from the
    nominal, rounded up to 0.01 deg; and whether the corridor is wide enough for it at all."""
    s = stats["entry_flight_path_deg"]
    bias = abs(s["mean"] - nominal_fpa) if math.isfinite(s["mean"]) else math.nan
    need = math.ceil((s["three_sigma"] + bias) * 100.0 - 1e-9) / 100.0 if math.isfinite(bias) else math.nan
    lo, hi = corridor
    return {"margin_deg": need, "three_sigma_deg": s["three_sigma"], "bias_deg": bias,
            "corridor_deg": [lo, hi], "fits": bool(math.isfinite(need) and 2 * need < hi - lo),
            "rule": "margin = 3-sigma of the entry angle + |mean - nominal|, rounded up to 0.01 deg "
                    "(common practice: a 3-sigma corridor)"}


def _margin_solve(problem, margin: dict, plan, progress, errors) -> dict:
    """One extra solve with ``[return].flight_path_margin_deg`` set to the needed margin."""
    m = margin["margin_deg"]
    out = {"margin_deg": m, "nominal_total_dv_mps": plan.total_dv_mps}
    if not margin["fits"]:
        return {**out, "status": "not solved",
                "reason": "the corridor is narrower than twice the needed margin"}, None
    from ..problem_file import problem_to_dict
    from ..solve import SolveError, solve

    tight = replace(problem, arrival=replace(problem.arrival, flight_path_margin_deg=m))
    if progress:
        progress(f"solving again with a {m:.2f} deg flight-path margin")
    tic = time.perf_counter()
    try:
        p2 = solve(tight, problem_table=problem_to_dict)
    except SolveError as exc:
        return {**out, "status": "failed", "reason": str(exc)}, None
    arr = p2.event("entry")
    out.update(status=p2.status, reason=p2.reason, total_dv_mps=p2.total_dv_mps,
               extra_dv_mps=p2.total_dv_mps - plan.total_dv_mps,
               entry_flight_path_deg=None if arr is None else arr.flight_path_deg,
               burns=[{"epoch_tdb": format_epoch(b.epoch, 3), "dv_mps": b.dv_mps} for b in p2.burns],
               wall_s=time.perf_counter() - tic)
    if p2.verified:
        out["linear_estimate"] = _linear_share(p2, problem, errors)
    return out, (p2, tight)


def _linear_share(plan, problem, errors) -> dict:
    """Linear-covariance estimate for a plan: entry-angle sigma and the Gaussian share inside the
    corridor (no Monte Carlo of the new plan; run ``slingback dispersion`` on its folder for that)."""
    try:
        model = dispersion_model(plan, problem)
        lin = linear_covariance(model, nominal_of(plan, problem, model), errors)
    except (ValueError, RuntimeError) as exc:
        return {"error": str(exc)}
    return {"entry_flight_path_sigma_deg": lin.sigma["entry_flight_path_deg"],
            "share_inside": gaussian_share(lin, problem.arrival.flight_path_deg),
            "method": "linear covariance, entry angle taken as Gaussian"}


def gaussian_share(lin, corridor) -> float:
    """Share of a Gaussian entry angle (nominal and sigma of ``lin``) inside ``corridor``."""
    from scipy.stats import norm

    g, sig = lin.nominal["entry_flight_path_deg"], lin.sigma["entry_flight_path_deg"]
    lo, hi = corridor
    return float(norm.cdf((hi - g) / sig) - norm.cdf((lo - g) / sig)) if sig > 0 else float(lo <= g <= hi)


def run_dispersion(plan, problem, errors, *, samples=1000, seed=0, workers=None, scheduler=None,
                   resume_dir=None, progress=None, sample_progress=None, margin_solve=True) -> dict:
    """Monte Carlo and linear covariance of a verified plan, the corridor share and the margin.

    Returns a dict with ``samples`` (DataFrame), ``summary`` (JSON-ready dict) and ``linear``
    (:class:`LinearCovariance` or None with ``summary['linear_covariance']['error']``).
    """
    model = dispersion_model(plan, problem)
    nominal = nominal_of(plan, problem, model)
    lin, lin_error = None, None
    try:
        lin = linear_covariance(model, nominal, errors)
    except (ValueError, RuntimeError) as exc:
        lin_error = str(exc)
    if progress:
        progress(f"dispersing {plan.name}: {samples} samples, seed {seed}")
    tic = time.perf_counter()
    df = run_samples(model, nominal, errors, samples, seed, workers=workers, scheduler=scheduler,
                     resume_dir=resume_dir, progress=sample_progress)
    wall = time.perf_counter() - tic
    arrival = next((e for e in plan.events if e.name in ("entry", "perigee")), None)
    peri = plan.event("perilune")
    nominal_values = {"entry_flight_path_deg": getattr(arrival, "flight_path_deg", None),
                      "perilune_altitude_km": getattr(peri, "altitude_km", None), "entry_epoch_offset_s": 0.0,
                      "entry_downrange_km": 0.0, "entry_crossrange_km": 0.0,
                      "entry_speed_kms": getattr(arrival, "speed_kms", None)}
    stats = summarise(df, nominal_values)
    k, n = int(df["inside"].sum()), int(len(df))
    lo, hi = wilson_interval(k, n)
    ret = problem.arrival
    corridor = list(ret.flight_path_deg if ret.target == "entry" else ret.perigee_alt_km)
    linear = {"error": lin_error}
    if lin is not None:
        rows = {}
        for col, lname in LINEAR.items():
            mc = stats[col]["sigma"]
            rows[col] = {"sigma_linear": lin.sigma[lname], "sigma_monte_carlo": mc,
                         "ratio": mc / lin.sigma[lname] if lin.sigma[lname] > 0 else None}
        linear = {"seconds": lin.seconds, "sigma": rows,
                  "share_inside": gaussian_share(lin, ret.flight_path_deg) if ret.target == "entry" else None,
                  "method": "variational equations (DOP853 rtol 1e-10), "
                  "gravity gradient by central differences; events moved to first order"}
    margin, margin_plan = None, None
    if ret.target == "entry" and nominal_values["entry_flight_path_deg"] is not None:
        margin = required_margin(stats, ret.flight_path_deg, nominal_values["entry_flight_path_deg"])
        margin["solve"] = {"status": "not solved", "reason": "skipped (--no-margin-solve)"}
        if margin_solve:
            margin["solve"], margin_plan = _margin_solve(problem, margin, plan, progress, errors)
    reasons = df["verdict"].value_counts().to_dict()
    summary = {
        "format": "slingback-dispersion", "format_version": 1, "software": f"slingback {__version__}",
        "caution": CAUTION, "plan": plan.name, "plan_status": plan.status, "time_scale": "TDB",
        "frame": "Earth-centred inertial, ICRF axes (navigation errors as given in error_model.frame)",
        "model": model.describe(), "propagator": {"method": "scipy solve_ivp DOP853", "rtol": DISPERSION_RTOL,
                                                  "atol": DISPERSION_ATOL},
        "samples": n, "seed": seed, "wall_s": wall,
        "error_model": {**errors.to_table(), "sources": errors.sources, "note": errors.note},
        "corridor": {"target": ret.target, "bounds": corridor,
                     "unit": "deg" if ret.target == "entry" else "km",
                     "margin_in_problem_deg": getattr(ret, "flight_path_margin_deg", 0.0)},
        "inside": {"count": k, "share": k / n, "wilson_95": [lo, hi], "z": Z95, "source": WILSON_SOURCE},
        "outcomes": {str(a): int(b) for a, b in reasons.items()},
        "perilune_outside_range": int((~df["perilune_in_range"].astype(bool)).sum()),
        "statistics": stats, "linear_covariance": linear, "margin": margin,
        "limitations": LIMITATIONS,
    }
    return {"samples": df, "summary": summary, "linear": lin, "nominal": nominal, "margin_plan": margin_plan}


LIMITATIONS = [
    "Open loop: the burns are flown as planned from the true state; no re-targeting after tracking.",
    "Errors are zero-mean Gaussian and independent of one another (beyond the navigation covariance).",
    "The perigee altitude at entry is the osculating two-body (vacuum) perigee; no atmosphere is modelled.",
    "Downrange and crossrange are measured on the inertial entry sphere (Earth's rotation between the "
    "entry epochs is not removed).",
]


def temporary_store(resume_dir, name: str) -> tuple[Path, bool]:
    """Where a run saves its finished samples: ``(folder, kept)``.

    ``resume_dir`` when given (kept: the user's); otherwise a new folder in the system's temporary
    folder (not kept: removed once the output folder is written, kept and named if that fails, so
    the samples are not lost).
    """
    import tempfile

    if resume_dir is not None:
        return Path(resume_dir), True
    return Path(tempfile.mkdtemp(prefix=f"slingback-{name}-dispersion-", suffix=".resume")), False


# ------------------------------------------------------------------------------------------------
FILES = {"samples.csv": "one row per sample: perturbations, perilune, entry, perigee, verdict",
         "summary.json": "statistics, corridor share with its Wilson interval, linear covariance, margin",
         "error_model.toml": "the error model used, with the source of each value",
         "fpa-histogram.png": "entry flight-path angle histogram with the corridor",
         "entry-points.png": "entry points downrange and crossrange of the nominal entry",
         "perilune-spread.png": "perilune altitude histogram with its allowed range",
         "margin-plan.json": "the plan solved with the needed flight-path margin (when verified)",
         "report.md": "this report"}


def write_dispersion(result: dict, plan, problem, out_dir, *, force: bool = False) -> Path:
    """Write the dispersion folder atomically (whole or absent)."""
    from ..export.run import staged_folder

    out = Path(out_dir)
    with staged_folder(out, force) as tmp:
        _write(result, plan, problem, tmp)
    return out


def _write(result, plan, problem, folder: Path):
    s = result["summary"]
    df = result["samples"]
    header = [f"slingback {__version__} dispersion of plan {plan.name!r} ({plan.status})",
              f"model {s['model'].get('name')}, DOP853 rtol {DISPERSION_RTOL:g} atol {DISPERSION_ATOL:g}; "
              f"{s['samples']} samples, seed {s['seed']}",
              "epochs TDB; positions km and velocities km/s Earth-centred ICRF; nav_* is the true minus "
              "the planned start state (ICRF)", CAUTION]
    with open(folder / "samples.csv", "w") as f:
        for line in header:
            f.write(f"# {line}\n")
        df.to_csv(f, index=False, float_format="%.10g")
    (folder / "summary.json").write_text(json.dumps(_plain(s), indent=1) + "\n")
    (folder / "error_model.toml").write_text(_error_toml(s["error_model"]))
    if result.get("margin_plan") is not None and result["margin_plan"][0].verified:
        from ..export.run import plan_json

        (folder / "margin-plan.json").write_text(json.dumps(plan_json(*result["margin_plan"]), indent=1) + "\n")
    figures = _figures(result, plan, problem, folder)
    (folder / "report.md").write_text(report_section(s, figures, plan))


def _plain(x):
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _error_toml(em: dict) -> str:
    from ..problem_file import dumps_toml

    lines = [f"# Error model of a slingback {__version__} dispersion run (1-sigma values).", f"# {CAUTION}",
             "# Where each value comes from:"]
    lines += [f"#   {k}: {v}" for k, v in em["sources"].items()]
    table = {"dispersion": {"burn": em["burn"], "navigation": em["navigation"]}}
    if em.get("note"):
        table["dispersion"] = {"source": em["note"], **table["dispersion"]}
    return "\n".join(lines) + "\n\n" + dumps_toml(table)


def _figures(result, plan, problem, folder: Path) -> list:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from ..export.figures import PALETTE, _style

    s, df = result["summary"], result["samples"]
    foot = (f"slingback {__version__} | {plan.name} | {s['samples']} samples, seed {s['seed']} | "
            f"model {s['model'].get('name')} | design studies only, not flight-certified")

    def save(fig, name):
        fig.tight_layout(rect=(0, 0.03, 1, 1))
        fig.text(0.01, 0.005, foot, fontsize=6, color="#6b7177")
        fig.savefig(folder / name, dpi=130, metadata={"Software": f"slingback {__version__}",
                                                      "Description": CAUTION})
        plt.close(fig)

    names = []
    g = df["entry_flight_path_deg"].to_numpy(float)
    g = g[np.isfinite(g)]
    if problem.arrival.target == "entry" and g.size:
        fig, ax = plt.subplots(figsize=(6.4, 3.8))
        lo, hi = problem.arrival.flight_path_deg
        ax.axvspan(lo, hi, color=PALETTE["arrival"], alpha=0.15, label=f"corridor [{lo:g}, {hi:g}] deg")
        ax.hist(g, bins=min(60, max(10, g.size // 20)), color=PALETTE["path"])
        nom = s["statistics"]["entry_flight_path_deg"]["nominal"]
        if nom is not None:
            ax.axvline(nom, color=PALETTE["burn"], linewidth=1, label=f"nominal {nom:.3f} deg")
        ax.set_xlabel("entry flight-path angle, deg")
        ax.set_ylabel("samples")
        ax.legend(fontsize=7, frameon=False)
        share = s["inside"]
        _style(ax, f"Entry flight-path angle: {share['share']:.1%} inside "
                   f"(95 % Wilson {share['wilson_95'][0]:.1%} to {share['wilson_95'][1]:.1%})")
        save(fig, "fpa-histogram.png")
        names.append("fpa-histogram.png")
    d = df[["entry_downrange_km", "entry_crossrange_km", "inside"]].dropna()
    if len(d):
        fig, ax = plt.subplots(figsize=(6.4, 4.2))
        ins = d["inside"].astype(bool)
        ax.scatter(d.loc[ins, "entry_downrange_km"], d.loc[ins, "entry_crossrange_km"], s=5,
                   color=PALETTE["path"], label="inside the corridor")
        ax.scatter(d.loc[~ins, "entry_downrange_km"], d.loc[~ins, "entry_crossrange_km"], s=7, marker="x",
                   color=PALETTE["burn"], label="outside")
        ax.plot([0], [0], marker="s", color=PALETTE["arrival"], linestyle="none", label="nominal entry")
        ax.set_xlabel("downrange of the nominal entry, km")
        ax.set_ylabel("crossrange, km")
        ax.legend(fontsize=7, frameon=False)
        _style(ax, "Entry points (inertial, on the entry-interface sphere)")
        save(fig, "entry-points.png")
        names.append("entry-points.png")
    a = df["perilune_altitude_km"].to_numpy(float)
    a = a[np.isfinite(a)]
    if a.size:
        fig, ax = plt.subplots(figsize=(6.4, 3.8))
        plo, phi = problem.lunar.altitude_km
        ax.hist(a, bins=min(60, max(10, a.size // 20)), color=PALETTE["path"])
        for b in (plo, phi):
            if a.min() - 0.2 * np.ptp(a) <= b <= a.max() + 0.2 * np.ptp(a):
                ax.axvline(b, color=PALETTE["burn"], linestyle="--", linewidth=1, label=f"bound {b:g} km")
        nom = s["statistics"]["perilune_altitude_km"]["nominal"]
        if nom is not None:
            ax.axvline(nom, color=PALETTE["perilune"], linewidth=1, label=f"nominal {nom:.1f} km")
        ax.set_xlabel("perilune altitude, km")
        ax.set_ylabel("samples")
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7, frameon=False)
        _style(ax, f"Perilune altitude (allowed {plo:g} to {phi:g} km)")
        save(fig, "perilune-spread.png")
        names.append("perilune-spread.png")
    return names


def _f(x, digits=4):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    return f"{x:.{digits}g}"


def report_section(s: dict, figures: list, plan) -> str:
    """The report section of a dispersion run (Markdown)."""
    ins = s["inside"]
    lines = [f"# Dispersion of {plan.name}", "", f"> {CAUTION}", "",
             f"slingback {__version__}; plan status **{plan.status}**; model {s['model'].get('name')}; "
             f"{s['samples']} samples, seed {s['seed']}; independent propagator DOP853 "
             f"(rtol {s['propagator']['rtol']:g}, atol {s['propagator']['atol']:g}); epochs TDB.", "",
             "## Arrival inside the corridor", "",
             f"{ins['count']} of {s['samples']} samples ({ins['share']:.2%}) arrive inside the "
             f"{s['corridor']['target']} corridor {s['corridor']['bounds']} {s['corridor']['unit']}; "
             f"95 % Wilson score interval {ins['wilson_95'][0]:.2%} to {ins['wilson_95'][1]:.2%} "
             f"({ins['source']}).", "", "| outcome | samples |", "|---|---|"]
    lines += [f"| {k} | {v} |" for k, v in s["outcomes"].items()]
    lines += ["", f"Samples whose perilune leaves its allowed range: {s['perilune_outside_range']}.", "",
              "## Spread (Monte Carlo) beside linear covariance", "",
              "| quantity | unit | nominal | mean | sigma | 3-sigma | min | max | sigma, linear | MC / linear |",
              "|---|---|---|---|---|---|---|---|---|---|"]
    lin = (s["linear_covariance"] or {}).get("sigma", {})
    for col, st in s["statistics"].items():
        lc = lin.get(col, {})
        lines.append(f"| {col} | {st['unit']} | {_f(st['nominal'], 7)} | {_f(st['mean'], 7)} | {_f(st['sigma'])} | "
                     f"{_f(st['three_sigma'])} | {_f(st['min'], 7)} | {_f(st['max'], 7)} | "
                     f"{_f(lc.get('sigma_linear'))} | {_f(lc.get('ratio'), 3)} |")
    if s["linear_covariance"].get("error"):
        lines += ["", f"Linear covariance not available: {s['linear_covariance']['error']}."]
    else:
        lc = s["linear_covariance"]
        lines += ["", f"Linear covariance: {lc['method']}; {lc['seconds']:.2f} s."
                  + (f" Its estimate of the share inside the corridor (entry angle taken as Gaussian): "
                     f"{lc['share_inside']:.2%}." if lc.get("share_inside") is not None else "")]
    m = s.get("margin")
    if m:
        lines += ["", "## Buying margin", "",
                  f"The measured 3-sigma spread of the entry angle is {_f(m['three_sigma_deg'])} deg and the "
                  f"mean sits {_f(m['bias_deg'])} deg from the nominal: a flight-path margin of "
                  f"**{m['margin_deg']:.2f} deg** on both sides (`[return].flight_path_margin_deg`) keeps the "
                  f"3-sigma spread inside {m['corridor_deg']} deg ({m['rule']})."]
        sv = m.get("solve") or {}
        if sv.get("total_dv_mps") is not None:
            lines += ["", "| plan | margin, deg | total Δv, m/s | entry angle, deg | status |", "|---|---|---|---|---|",
                      f"| as given | {s['corridor']['margin_in_problem_deg']:g} | {sv['nominal_total_dv_mps']:.3f} | "
                      f"{_f(s['statistics']['entry_flight_path_deg']['nominal'], 6)} | {plan.status} |",
                      f"| with the margin | {m['margin_deg']:.2f} | {sv['total_dv_mps']:.3f} | "
                      f"{_f(sv.get('entry_flight_path_deg'), 6)} | {sv['status']} |", "",
                      f"The margin costs {sv['extra_dv_mps']:+.3f} m/s."
                      + (" The plan with the margin is in `margin-plan.json` (`slingback check` and "
                         "`slingback dispersion` read it)." if sv["status"] == "verified" else ""), ""]
            est = sv.get("linear_estimate") or {}
            if "share_inside" in est:
                lines.append(f"Linear estimate for the plan with the margin: entry-angle sigma "
                             f"{est['entry_flight_path_sigma_deg']:.4f} deg, {est['share_inside']:.2%} inside the "
                             f"corridor ({est['method']}; `slingback dispersion margin-plan.json` measures it).")
            if sv["status"] != "verified":
                lines.append(f"The solve with the margin is **not verified** ({sv.get('reason')}); its Δv is not "
                             "an optimum to rely on.")
        else:
            lines += ["", f"Solve with the margin: {sv.get('status')} ({sv.get('reason')})."]
    lines += ["", "## Error model (1-sigma)", "", "| key | value | source |", "|---|---|---|"]
    em = s["error_model"]
    for key, value in em["burn"].items():
        lines.append(f"| burn.{key} | {value:g} | {em['sources'].get('burn.' + key, '')} |")
    nav = np.array(em["navigation"]["covariance_km_kms"], float)
    sig = np.sqrt(np.clip(np.diag(nav), 0, None))
    lines.append(f"| navigation.frame | {em['navigation']['frame']} | {em['sources'].get('navigation.frame', '')} |")
    lines.append(f"| navigation position sigma, km | {', '.join(f'{x:g}' for x in sig[:3])} | "
                 f"{em['sources'].get('navigation.position_sigma_km', '')} |")
    lines.append(f"| navigation velocity sigma, m/s | {', '.join(f'{1000 * x:g}' for x in sig[3:])} | "
                 f"{em['sources'].get('navigation.velocity_sigma_mps', '')} |")
    if em.get("note"):
        lines += ["", f"Table note: {em['note']}"]
    lines += ["", "## Limitations", ""] + [f"- {x}" for x in s["limitations"]]
    if figures:
        lines += ["", "## Figures", ""] + [f"![{FILES[f]}]({f})" for f in figures]
    have_margin_plan = ((s.get("margin") or {}).get("solve") or {}).get("status") == "verified"
    lines += ["", "## Files", ""] + [f"- `{f}`: {t}" for f, t in FILES.items()
                                     if (f in figures or not f.endswith(".png"))
                                     and (f != "margin-plan.json" or have_margin_plan)]
    lines += ["", f"> {CAUTION}", ""]
    return "\n".join(lines)


def read_verified_plan(path):
    """(plan, problem, plan file) from a ``plan.json`` or a run folder holding one.

    Raises :class:`~optimizer.export.PlanFileError` for an unreadable plan; the caller checks
    ``plan.verified`` (a dispersion of an unverified plan means nothing).
    """
    from ..export import plan_problem, read_plan

    p = Path(path)
    if p.is_dir():
        p = p / "plan.json"
    plan = read_plan(p)
    return plan, plan_problem(plan, str(p)), p


def progress_bar(total: int, quiet: bool):
    """A tqdm progress bar on stderr (None when quiet); returns (callback(done, total), close)."""
    if quiet:
        return None, lambda: None
    from tqdm import tqdm

    bar = tqdm(total=total, unit="sample", desc="dispersion", leave=False, dynamic_ncols=True)

    def update(done, _total):
        bar.update(done - bar.n)

    return update, bar.close
