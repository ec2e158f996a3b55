"""Monte Carlo dispersion: many perturbed executions of a verified plan, in parallel and resumable.

Samples are evaluated in chunks of :data:`CHUNK` consecutive indices (one task each) on an
in-process loop, a local process pool or a Dask distributed cluster (the executors of
:mod:`optimizer.executors`, shared with the trade studies).  A sample depends only on the seed and its index
(:func:`optimizer.dispersion.sampling.sample_rng`), so the table is the same on 1 or K workers.
With ``resume_dir`` every finished chunk is saved there (the resume store of
:mod:`optimizer.trade.store`: one JSON file per chunk, written atomically) and skipped by a later
run of the same plan, error model and seed.

One job: running many samples.  May import: numpy, pandas, :mod:`optimizer.constants`,
:mod:`optimizer.timescales`, :mod:`optimizer.models.factory`, :mod:`optimizer.executors`, the resume
store :mod:`optimizer.trade.store` and the wing's ``errors`` and ``sampling``; never the solver or
the transcription.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..constants import GM_EARTH, R_EARTH, R_MOON, SECONDS_PER_DAY
from ..models.factory import build_model
from ..timescales import format_epoch
from ..executors import make_executor
from ..trade.store import ResumeStore, StoreKind
from .errors import ErrorModelError
from .sampling import (DISPERSION_ATOL, DISPERSION_RTOL, NUMERIC, Nominal, _factor, draw, entry_offsets, evaluate,
                       navigation_covariance_icrf, perturbed, sample_rng)

__all__ = ["nominal_of", "dispersion_model", "run_samples", "CHUNK", "perturbation_matrix"]

CHUNK = 25
#: How long past the nominal arrival a dispersed sample is followed (a late or skipping path).
FOLLOW_S = 2.0 * SECONDS_PER_DAY


def nominal_of(plan, problem, model=None) -> Nominal:
    """The :class:`Nominal` of a plan: its start, its non-zero burns, the problem's corridor."""
    arrival = next((e for e in plan.events if e.name in ("entry", "perigee")), None)
    t_end = (arrival.epoch if arrival is not None else problem.latest_epoch()) + FOLLOW_S
    ret = problem.arrival
    corridor = ret.flight_path_deg if ret.target == "entry" else ret.perigee_alt_km
    moon = getattr(model, "moon", None) if model is not None else None
    return Nominal(start_epoch=float(plan.start_epoch), start_state=tuple(float(x) for x in plan.start_state),
                   burns=tuple((float(b.epoch), tuple(float(x) for x in b.dv))
                               for b in sorted(plan.burns, key=lambda b: b.epoch) if any(b.dv)),
                   t_end=float(t_end), entry_radius_km=float(ret.entry_radius_km), target=ret.target,
                   corridor=tuple(float(x) for x in corridor),
                   perilune_range_km=tuple(float(x) for x in problem.lunar.altitude_km),
                   earth_gm=float(model.earth.gm) if model is not None else GM_EARTH,
                   earth_radius_km=float(model.earth.radius) if model is not None else R_EARTH,
                   moon_radius_km=float(moon.radius) if moon is not None else R_MOON)


def dispersion_model(plan, problem):
    """The problem's force model over the plan's span plus the follow-on time."""
    nominal = nominal_of(plan, problem)
    return build_model(problem.model, min(plan.start_epoch, problem.start_epoch), nominal.t_end + 3600.0)


def perturbation_matrix(df: pd.DataFrame, n_burns: int) -> np.ndarray:
    """The sampled perturbations as parameter vectors in the order and units of
    :class:`optimizer.dispersion.lincov.LinearCovariance` (km, km/s, rad, s)."""
    cols = [df[f"nav_{a}_km"] for a in "xyz"] + [df[f"nav_v{a}_mps"] / 1000.0 for a in "xyz"]
    for k in range(1, n_burns + 1):
        cols += [df[f"burn{k}_magnitude_error_mps"] / 1000.0, np.radians(df[f"burn{k}_pointing1_deg"]),
                 np.radians(df[f"burn{k}_pointing2_deg"]), df[f"burn{k}_ignition_error_s"]]
    return np.column_stack(cols) if cols else np.zeros((len(df), 0))


def _row(index, d, res, nominal: Nominal, nominal_entry) -> dict:
    row = {"sample": int(index)}
    for a, v in zip("xyz", d.nav[:3]):
        row[f"nav_{a}_km"] = float(v)
    for a, v in zip("xyz", d.nav[3:]):
        row[f"nav_v{a}_mps"] = 1000.0 * float(v)
    for k in range(len(nominal.burns)):
        row[f"burn{k + 1}_magnitude_error_mps"] = 1000.0 * float(d.magnitude_kms[k])
        row[f"burn{k + 1}_pointing1_deg"] = math.degrees(d.pointing_rad[k, 0])
        row[f"burn{k + 1}_pointing2_deg"] = math.degrees(d.pointing_rad[k, 1])
        row[f"burn{k + 1}_pointing_error_deg"] = math.degrees(math.hypot(*d.pointing_rad[k]))
        row[f"burn{k + 1}_ignition_error_s"] = float(d.ignition_s[k])
    row.update(res)
    te = res["entry_epoch_tdb_s"]
    row["entry_epoch_tdb"] = format_epoch(te, 3) if math.isfinite(te) else ""
    row["entry_epoch_offset_s"] = te - nominal_entry["t"] if math.isfinite(te) and nominal_entry else math.nan
    if math.isfinite(te) and nominal_entry:
        row["entry_downrange_km"], row["entry_crossrange_km"] = entry_offsets(
            nominal_entry["y"], (res["entry_x_km"], res["entry_y_km"], res["entry_z_km"]))
    else:
        row["entry_downrange_km"] = row["entry_crossrange_km"] = math.nan
    return row


def _nominal_entry(model, nominal):
    """Epoch and state of the unperturbed entry (the origin of the downrange and crossrange axes),
    or None when the nominal path has no entry after its perilune."""
    res = evaluate(model, nominal, np.asarray(nominal.start_state), [(t, np.asarray(dv)) for t, dv in nominal.burns])
    if not math.isfinite(res["entry_epoch_tdb_s"]):
        return None
    y = np.array([res[k] for k in ("entry_x_km", "entry_y_km", "entry_z_km", "entry_vx_kms", "entry_vy_kms",
                                   "entry_vz_kms")])
    return {"t": res["entry_epoch_tdb_s"], "y": y}


def _chunk_task(model, nominal: Nominal, errors, seed: int, start: int, stop: int, nominal_entry) -> list:
    """Evaluate samples ``start .. stop-1``; returns their rows."""
    factor = _factor(navigation_covariance_icrf(errors, nominal.start_state))
    rows = []
    for i in range(start, stop):
        d = draw(sample_rng(seed, i), errors, nominal, factor)
        y0, burns = perturbed(nominal, d)
        try:
            res = evaluate(model, nominal, y0, burns)
        except (RuntimeError, ValueError) as exc:  # e.g. a burn pushed outside the span
            res = {k: math.nan for k in NUMERIC}
            res.update(inside=False, reason=f"propagation failed: {exc}", verdict="propagation failed",
                       perilune_in_range=False)
        rows.append(_row(i, d, res, nominal, nominal_entry))
    return rows


# ------------------------------------------------------------------------------------------------
def _executor(workers, scheduler):
    return make_executor(workers, scheduler, ErrorModelError, name="--workers")


#: The resume folder of a dispersion run: ``dispersion.json`` names the run, ``chunks/<first>-<end>.json``
#: holds the rows of one chunk of samples (the package's one resume store, :mod:`optimizer.trade.store`).
STORE_KIND = StoreKind(head="dispersion.json", items="chunks", head_format="slingback-dispersion-resume",
                       item_format="slingback-dispersion-chunk", option="--resume", what="dispersion run",
                       changed="plan, error model or seed changed")


def _chunk_name(start: int, stop: int) -> str:
    return f"{start:07d}-{stop:07d}"


def run_samples(model, nominal: Nominal, errors, samples: int, seed: int, *, workers=None, scheduler=None,
                resume_dir=None, progress=None, chunk: int = CHUNK) -> pd.DataFrame:
    """Evaluate ``samples`` dispersed executions; one row per sample, in sample order.

    Parameters
    ----------
    model : ForceModel
    nominal : Nominal
    errors : ErrorModel
    samples, seed : int
    workers : int, optional
        Local processes (default: every core; 1 runs in this process).
    scheduler : str or distributed.Client, optional
        A Dask scheduler address (or client); overrides ``workers``.
    resume_dir : path, optional
        Save finished chunks here; skip chunks already saved for the same run.
    progress : callable(done, total), optional
        Called after each chunk.
    chunk : int
        Samples per task.
    """
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 1:
        raise ErrorModelError(f"--samples: expected a whole number of at least 1, got {samples!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ErrorModelError(f"--seed: expected a whole number of at least 0, got {seed!r}")
    nominal_entry = _nominal_entry(model, nominal)
    definition = {"nominal": repr(nominal), "errors": errors.to_table(), "seed": seed, "chunk": chunk,
                  "rtol": DISPERSION_RTOL, "atol": DISPERSION_ATOL, "model": model.describe()}
    store = ResumeStore(resume_dir, definition, STORE_KIND, ErrorModelError)
    chunks = [(a, min(a + chunk, samples)) for a in range(0, samples, chunk)]
    results, todo = {}, []
    for c in chunks:
        saved = store.load(_chunk_name(*c))
        if saved is not None:
            results[c] = saved["rows"]
        else:
            todo.append(c)
    done = sum(b - a for a, b in results)
    if progress:
        progress(done, samples)
    if todo:
        ex = _executor(workers, scheduler)
        try:
            pending = {}
            for c in todo:
                pending[ex.submit(_chunk_task, model, nominal, errors, seed, c[0], c[1], nominal_entry)] = c
            while pending:
                for fut, rows in ex.wait_one(pending):
                    c = pending.pop(fut)
                    results[c] = rows
                    store.save(_chunk_name(*c), {"rows": rows})
                    done += c[1] - c[0]
                    if progress:
                        progress(done, samples)
        finally:
            ex.close()
    rows = [r for c in chunks for r in results[c]]
    return pd.DataFrame(rows)
