"""Burns, trajectory and optimiser nodes as pandas tables, units in the column names.

The CSV files start with ``#`` comment lines naming the software, model, status and the caution;
read them with ``pandas.read_csv(path, comment="#")``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import __version__
from ..constants import CAUTION
from ..timescales import format_epoch

__all__ = ["burns_frame", "trajectory_frame", "nodes_frame", "write_csv"]

STATE_COLUMNS = ["x_km", "y_km", "z_km", "vx_kms", "vy_kms", "vz_kms"]


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


def write_csv(df: pd.DataFrame, path, what: str, plan, model_name: str) -> None:
    """Write ``df`` with a comment header (software, content, model, status, caution)."""
    status = plan.status.upper() + ("" if plan.verified else " - NOT VERIFIED")
    header = [f"slingback {__version__}: {what}", f"scenario {plan.name}; model {model_name}; "
              f"plan status {status}; epochs TDB; Earth-centred ICRF axes", f"CAUTION: {CAUTION}"]
    with open(path, "w", newline="") as f:
        f.write("".join(f"# {line}\n" for line in header))
        df.to_csv(f, index=False, float_format="%.15g")
