"""Burns, trajectory and optimiser nodes as pandas tables, units in the column names.

The CSV files are plain: the header on line 1, one row per record, no comment lines, so
``pandas.read_csv(path)`` and a spreadsheet read them as they are.  What a comment preamble used
to say (software, model, status, caution) and the unit and meaning of every column go to the run
folder's ``manifest.json`` (:data:`COLUMNS`, :mod:`optimizer.export.manifest`).

One job: the tables.  May import: numpy, pandas, :mod:`optimizer.propellant` and
:mod:`optimizer.timescales`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..propellant import finite_burns
from ..timescales import format_epoch

__all__ = ["burns_frame", "trajectory_frame", "nodes_frame", "write_csv", "COLUMNS"]

STATE_COLUMNS = ["x_km", "y_km", "z_km", "vx_kms", "vy_kms", "vz_kms"]
_STATE = {"x_km": ("km", "position x, Earth-centred ICRF axes"),
          "y_km": ("km", "position y, Earth-centred ICRF axes"),
          "z_km": ("km", "position z, Earth-centred ICRF axes"),
          "vx_kms": ("km/s", "velocity x, Earth-centred ICRF axes"),
          "vy_kms": ("km/s", "velocity y, Earth-centred ICRF axes"),
          "vz_kms": ("km/s", "velocity z, Earth-centred ICRF axes")}
_EPOCH = {"epoch_tdb": ("ISO-8601 TDB", "epoch, TDB, to the millisecond"),
          "t_tdb_s": ("s", "epoch, TDB seconds past J2000 (JD 2451545.0 TDB)")}
#: Unit and meaning of every column of every table (what manifest.json lists).
COLUMNS = {
    "burns.csv": {
        "burn": ("", "burn number, in time order, 1-based"),
        "epoch_tdb": ("ISO-8601 TDB", "epoch of the impulse, TDB, to the millisecond"),
        "t_tdb_s": ("s", "epoch of the impulse, TDB seconds past J2000"),
        "dv_mps": ("m/s", "size of the velocity change"),
        "dv_x_mps": ("m/s", "velocity change x, ICRF axes"), "dv_y_mps": ("m/s", "velocity change y, ICRF axes"),
        "dv_z_mps": ("m/s", "velocity change z, ICRF axes"),
        "dv_r_mps": ("m/s", "velocity change, radial (RTN of the pre-burn state)"),
        "dv_t_mps": ("m/s", "velocity change, transverse (RTN of the pre-burn state)"),
        "dv_n_mps": ("m/s", "velocity change, normal (RTN of the pre-burn state)"),
        "window_open_tdb": ("ISO-8601 TDB", "the burn's window opens"),
        "window_close_tdb": ("ISO-8601 TDB", "the burn's window closes"),
        "max_dv_mps": ("m/s", "the burn's cap"),
        "direction": ("", "free, along or against the velocity"),
        "leg": ("", "outbound or return"),
        "mass_before_kg": ("kg", "spacecraft mass at ignition ([spacecraft] table only)"),
        "propellant_kg": ("kg", "propellant by the rocket equation ([spacecraft] table only)"),
        "mass_after_kg": ("kg", "spacecraft mass at cut-off ([spacecraft] table only)"),
        "duration_s": ("s", "burn duration at constant thrust ([spacecraft] table only)"),
        "ignition_epoch_tdb": ("ISO-8601 TDB", "ignition of a burn centred on the impulse, to the millisecond "
                                               "([spacecraft] table only)"),
        "ignition_t_tdb_s": ("s", "ignition, TDB seconds past J2000 ([spacecraft] table only)"),
        "cutoff_epoch_tdb": ("ISO-8601 TDB", "cut-off of the centred burn ([spacecraft] table only)"),
        "cutoff_t_tdb_s": ("s", "cut-off, TDB seconds past J2000 ([spacecraft] table only)"),
    },
    "trajectory.csv": {
        **_EPOCH, "arc": ("", "coast arc: 0 before the first burn, k after burn k"), **_STATE,
        "altitude_earth_km": ("km", "altitude above Earth's mean equatorial radius"),
        "altitude_moon_km": ("km", "altitude above the Moon's mean radius (models with a Moon)"),
    },
    "nodes.csv": {**_EPOCH, **_STATE},
}
FINITE_BURN_COLUMNS = ["mass_before_kg", "propellant_kg", "mass_after_kg", "duration_s", "ignition_epoch_tdb",
                       "ignition_t_tdb_s", "cutoff_epoch_tdb", "cutoff_t_tdb_s"]


def burns_frame(plan, problem) -> pd.DataFrame:
    """One row per burn: epoch, Δv size, ICRF and RTN components (m/s), its window and cap."""
    rows = []
    for i, b in enumerate(plan.burns, 1):
        spec = problem.burns[i - 1] if i <= len(problem.burns) else None
        dv, rtn = 1000.0 * np.asarray(b.dv), 1000.0 * np.asarray(b.dv_rtn)
        rows.append({
            "burn": i, "epoch_tdb": format_epoch(b.epoch, 3), "t_tdb_s": b.epoch, "dv_mps": b.dv_mps,
            "dv_x_mps": dv[0], "dv_y_mps": dv[1], "dv_z_mps": dv[2],
            "dv_r_mps": rtn[0], "dv_t_mps": rtn[1], "dv_n_mps": rtn[2],
            "window_open_tdb": format_epoch(spec.window[0], 3) if spec else "",
            "window_close_tdb": format_epoch(spec.window[1], 3) if spec else "",
            "max_dv_mps": spec.max_dv_mps if spec else np.nan,
            "direction": spec.direction if spec else "", "leg": spec.leg if spec else ""})
    columns = ["burn", "epoch_tdb", "t_tdb_s", "dv_mps", "dv_x_mps", "dv_y_mps", "dv_z_mps", "dv_r_mps",
               "dv_t_mps", "dv_n_mps", "window_open_tdb", "window_close_tdb", "max_dv_mps", "direction", "leg"]
    figures = finite_burns(plan.burns, problem.propulsion)
    if figures is not None:  # without a [spacecraft] table these columns are absent, not zero
        for row, f in zip(rows, figures):
            row.update(mass_before_kg=f.mass_before_kg, propellant_kg=f.propellant_kg,
                       mass_after_kg=f.mass_after_kg, duration_s=f.duration_s,
                       ignition_epoch_tdb=format_epoch(f.ignition_epoch, 3), ignition_t_tdb_s=f.ignition_epoch,
                       cutoff_epoch_tdb=format_epoch(f.cutoff_epoch, 3), cutoff_t_tdb_s=f.cutoff_epoch)
        columns += FINITE_BURN_COLUMNS
    return pd.DataFrame(rows, columns=columns)


def trajectory_frame(sampled, earth_radius_km: float, moon_radius_km: float | None) -> pd.DataFrame:
    """The re-propagated samples: epoch, arc, Earth-centred ICRF state, altitudes."""
    df = pd.DataFrame(sampled.y, columns=STATE_COLUMNS)
    df.insert(0, "arc", sampled.arc)
    df.insert(0, "t_tdb_s", sampled.t)
    df.insert(0, "epoch_tdb", [format_epoch(t, 3) for t in sampled.t])
    df["altitude_earth_km"] = np.linalg.norm(sampled.y[:, :3], axis=1) - earth_radius_km
    if sampled.moon_r is not None and moon_radius_km is not None:
        df["altitude_moon_km"] = np.linalg.norm(sampled.y[:, :3] - sampled.moon_r, axis=1) - moon_radius_km
    return df


def nodes_frame(plan) -> pd.DataFrame:
    """The optimiser's own nodes (what the re-propagation was compared with)."""
    y = np.asarray(plan.trajectory_y, dtype=float).reshape(-1, 6)
    df = pd.DataFrame(y, columns=STATE_COLUMNS)
    t = np.asarray(plan.trajectory_t, dtype=float)
    df.insert(0, "t_tdb_s", t)
    df.insert(0, "epoch_tdb", [format_epoch(x, 3) for x in t])
    return df


def write_csv(df: pd.DataFrame, path) -> None:
    """Write ``df`` as a plain CSV: header on line 1, floats with all their digits."""
    df.to_csv(path, index=False, lineterminator="\n")
