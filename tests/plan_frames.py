"""A small made-up estate plan in the current names (docs/architecture.md, outputs).

Test data only: stands of a generated forest, a harvests table in which several stands are
cut twice, and the schedule, periods, strata, openings and run facts that go with it, all
built here with plain pandas/numpy so the review outputs can be checked against them.
Volumes and values follow made-up linear rules; nothing here is a forest fact.
"""

from __future__ import annotations

from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import pandas as pd

from spatialplan import outputs
from spatialplan.settings import Settings
from spatialplan.synthetic import voronoi_forest

P = 10
L = 5.0
START = 2025
MIN_AGE = 25.0
DELAY = 1.0
R = 0.04
VOL_PER_HA_PER_YR = 4.0  # made-up yield: 4 m3/ha per year of age
PRICE = 30.0
COST = 20.0


@dataclass
class EstatePlan:
    schedule: gpd.GeoDataFrame
    harvests: pd.DataFrame
    periods: pd.DataFrame
    strata: pd.DataFrame
    openings: gpd.GeoDataFrame
    run_info: dict[str, str]
    settings: Settings
    edges: np.ndarray


def estate_settings(**over: object) -> Settings:
    base: dict[str, object] = {
        "horizon.periods": P,
        "horizon.period_length_yr": L,
        "horizon.start_year": START,
        "rules.min_age_yr": MIN_AGE,
        "rules.flow_tolerance": 0.15,
        "rules.max_harvests": 2,
        "rules.old_forest_age_yr": 80.0,
        "rules.old_forest_min_share": 0.05,
        "rules.max_opening_ha": 40.0,
        "regeneration.delay_yr": DELAY,
    }
    base.update(over)
    return Settings().with_overrides(base)


def estate_plan(seed: int = 3, n: int = 70, settings: Settings | None = None) -> EstatePlan:
    s = settings or estate_settings()
    g = voronoi_forest(n, seed=seed, reserve_share=0.1)
    rng = np.random.default_rng(seed)
    n = len(g)
    g["area_ha"] = g.area / 10_000.0
    g["net_area_ha"] = g["area_ha"] * np.where(rng.random(n) < 0.3, 0.85, 1.0)
    age0 = g["age"].to_numpy(float)
    reserve = g["reserve"].to_numpy() == 1
    inoperable = np.zeros(n, dtype=bool)
    inoperable[rng.choice(np.flatnonzero(~reserve), 4, replace=False)] = True
    g["slope_pct_mean"] = np.where(inoperable, 95.0, rng.uniform(5, 60, n))
    g["steep_share"] = np.where(inoperable, 0.9, rng.uniform(0, 0.4, n))
    g["harvest_system"] = np.where(
        inoperable, "inoperable", np.where(g["slope_pct_mean"] > 35, "cable", "ground")
    )
    g["operable"] = (~inoperable).astype(int)

    # Harvest events: first cut at or above the minimum age, a second one once regrown.
    gap = int(np.ceil((MIN_AGE + DELAY) / L))  # (q2 - q1) L - delay >= min age
    rows = []
    for i in np.flatnonzero(~reserve & ~inoperable):
        q_ok = [q for q in range(1, P + 1) if age0[i] + (q - 0.5) * L >= MIN_AGE]
        if not q_ok or rng.random() < 0.25:
            continue
        q1 = int(rng.choice(q_ok))
        rows.append((i, q1, age0[i] + (q1 - 0.5) * L))
        if q1 + gap <= P and rng.random() < 0.7:
            q2 = int(rng.integers(q1 + gap, P + 1))
            rows.append((i, q2, (q2 - q1) * L - DELAY))
    ev = pd.DataFrame(rows, columns=["pos", "period", "age_at_harvest_yr"])
    assert (ev.groupby("pos").size() == 2).sum() >= 3, "fixture needs stands cut twice"
    net = g["net_area_ha"].to_numpy()
    t = (ev["period"].to_numpy() - 0.5) * L
    ev["volume_m3"] = VOL_PER_HA_PER_YR * ev["age_at_harvest_yr"] * net[ev["pos"]]
    ev["gross_value"] = PRICE * ev["volume_m3"]
    ev["npv"] = (ev["gross_value"] - COST * ev["volume_m3"] - 500.0 * net[ev["pos"]]) * (
        1 + R
    ) ** -t
    ev["harvest"] = ev.groupby("pos").cumcount() + 1
    ids = g["stand_id"].to_numpy()
    harvests = pd.DataFrame(
        {
            "stand_id": ids[ev["pos"]],
            "harvest": ev["harvest"].to_numpy(),
            "period": ev["period"].to_numpy(),
            "harvest_mid_year": START + t,
            "age_at_harvest_yr": ev["age_at_harvest_yr"].to_numpy(),
            "stratum": g["stratum"].to_numpy()[ev["pos"]],
            "volume_m3": ev["volume_m3"].to_numpy(),
            "gross_value": ev["gross_value"].to_numpy(),
            "npv": ev["npv"].to_numpy(),
        }
    )

    first = ev[ev["harvest"] == 1].set_index("pos")
    per = np.zeros(n, dtype=int)
    per[first.index] = first["period"]
    count = np.bincount(ev["pos"], minlength=n)
    ending = 80.0 * net * (1 + R) ** -(P * L)
    sched = g.copy()
    sched["period"] = pd.array(np.where(per > 0, per, 0), dtype="Int64")
    sched.loc[per == 0, "period"] = pd.NA
    sched["harvest_count"] = count
    sched["harvest_periods"] = [
        ";".join(str(int(q)) for q in ev.loc[ev["pos"] == i, "period"]) for i in range(n)
    ]
    sched["harvest_mid_year"] = np.where(per > 0, START + (per - 0.5) * L, np.nan)
    sched["age_at_harvest_yr"] = np.nan
    sched.loc[first.index, "age_at_harvest_yr"] = first["age_at_harvest_yr"].to_numpy()
    sched["volume_m3"] = np.bincount(ev["pos"], weights=ev["volume_m3"], minlength=n)
    sched["gross_value"] = np.bincount(ev["pos"], weights=ev["gross_value"], minlength=n)
    sched["ending_value_npv"] = ending
    sched["npv"] = np.bincount(ev["pos"], weights=ev["npv"], minlength=n) + ending
    sched["green_up_periods"] = 2

    left, right = g.sindex.query(g.geometry, predicate="touches")
    e = np.c_[left, right]
    edges = e[e[:, 0] < e[:, 1]]
    init = age0[:, None] + (np.arange(1, P + 1) - 0.5) * L < 2 * L
    op, sid = outputs.opening_table(
        g.assign(period=per), edges, P, 2, init, 40.0, g["area_ha"].to_numpy()
    )
    sched["opening_id"] = sid
    openings = op.rename(
        columns={"area_ha": "gross_area_ha", "new_harvest_ha": "new_harvest_gross_ha"}
    )

    periods = _periods(ev, net, g["area_ha"].to_numpy(), age0, openings, s)
    strata = _strata(ev, g, net)
    npv = float(sched["npv"].sum())
    run = {
        "software": "spatialplan 0.1.0",
        "settings_json": s.to_json(),
        "solver_status": "FEASIBLE",
        "npv": f"{npv:.2f}",
        "best_bound": f"{npv * 1.02:.2f}",
        "best_bound_method": "aspatial LP (HiGHS)",
        "gap": f"{1 - 1 / 1.02:.6f}",
        "bound_aspatial_lp": f"{npv * 1.02:.2f}",
        "bound_cpsat": f"{npv * 1.05:.2f}",
        "ending_value_npv": f"{ending.sum():.2f}",
        "ltsy_mai_m3_yr": f"{net[~reserve & ~inoperable].sum() * 5.0:.2f}",
        "ltsy_rotation_m3_yr": f"{net[~reserve & ~inoperable].sum() * 4.5:.2f}",
        "verify_verdict": "passed: all rules hold for the test plan",
        "stands_path": "Šumava/stands.gpkg",
    }
    return EstatePlan(sched, harvests, periods, strata, openings, run, s, edges)


def _ages_at(age0: np.ndarray, ev: pd.DataFrame, time: float) -> np.ndarray:
    """Age at ``time``: age0 + time, or time since the last mid-period cut minus the delay."""
    out = age0 + time
    for i, q in ev[["pos", "period"]].itertuples(index=False):
        t_cut = (q - 0.5) * L
        if t_cut <= time:
            out[i] = max(time - t_cut - DELAY, 0.0)  # rows are sorted by stand then period
    return out


def _periods(ev, net, gross, age0, openings, s: Settings) -> pd.DataFrame:
    p = np.arange(1, P + 1)
    by = ev.assign(a=net[ev["pos"]]).groupby("period")
    area = by["a"].sum().reindex(p, fill_value=0.0).to_numpy()
    vol = by["volume_m3"].sum().reindex(p, fill_value=0.0).to_numpy()
    wage = ev.assign(w=net[ev["pos"]] * ev["age_at_harvest_yr"]).groupby("period")["w"].sum()
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_age = wage.reindex(p).to_numpy() / np.where(area > 0, area, np.nan)
    new = openings["new_harvest_gross_ha"] > 0
    largest = openings[new].groupby("period")["gross_area_ha"].max().reindex(p, fill_value=0.0)
    other = openings[~new].groupby("period")["gross_area_ha"].max().reindex(p, fill_value=0.0)
    tol = s.rules.flow_tolerance
    prev = np.r_[np.nan, vol[:-1]]
    old_share, standing = [], []
    for q in p:
        ages = _ages_at(age0, ev, (q - 0.5) * L)
        old_share.append(gross[ages >= 80.0].sum() / gross.sum())
        standing.append(float(np.sum(VOL_PER_HA_PER_YR * ages * net)))
    start = START + (p - 1) * L
    return pd.DataFrame(
        {
            "period": p,
            "start_year": start,
            "end_year": start + L,
            "mid_year": start + L / 2,
            "harvest_net_area_ha": area,
            "harvest_volume_m3": vol,
            "gross_value": by["gross_value"].sum().reindex(p, fill_value=0.0).to_numpy(),
            "npv": by["npv"].sum().reindex(p, fill_value=0.0).to_numpy(),
            "mean_age_at_harvest_yr": mean_age,
            "stands_harvested": by.size().reindex(p, fill_value=0).to_numpy(),
            "opening_count": openings.groupby("period").size().reindex(p, fill_value=0).to_numpy(),
            "largest_opening_ha": largest.to_numpy(),
            "largest_other_opening_ha": other.to_numpy(),
            "max_opening_ha": 40.0,
            "flow_lower_m3": (1 - tol) * prev,
            "flow_upper_m3": (1 + tol) * prev,
            "area_lower_ha": np.nan,
            "area_upper_ha": np.nan,
            "old_forest_share": old_share,
            "standing_volume_m3": standing,
        }
    )


def _strata(ev, g, net) -> pd.DataFrame:
    strata = sorted(g["stratum"].unique())
    lab = g["stratum"].to_numpy()[ev["pos"]]
    t = ev.assign(stratum=lab, a=net[ev["pos"]]).groupby(["stratum", "period"])
    idx = pd.MultiIndex.from_product([strata, range(1, P + 1)], names=["stratum", "period"])
    out = pd.DataFrame(
        {
            "harvest_net_area_ha": t["a"].sum().reindex(idx, fill_value=0.0),
            "harvest_volume_m3": t["volume_m3"].sum().reindex(idx, fill_value=0.0),
        }
    ).reset_index()
    out["stratum_area_ha"] = out["stratum"].map(g.groupby("stratum")["area_ha"].sum())
    return out
