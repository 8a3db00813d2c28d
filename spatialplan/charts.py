"""PNG charts (matplotlib, non-interactive Agg backend): rotation charts and plan charts."""

from __future__ import annotations

from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt

__all__: list[str] = []

# Functions are appended below by topic: rotation charts, then plan charts.
_ = plt


# --- rotation charts ---
import math  # noqa: E402
import re  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import TYPE_CHECKING  # noqa: E402

import numpy as np  # noqa: E402

from spatialplan._io import atomic_path  # noqa: E402

if TYPE_CHECKING:
    from collections.abc import Mapping

    from spatialplan.economics import RotationCurves

__all__ += ["rotation_chart", "safe_file_stem"]


def safe_file_stem(text: str) -> str:
    """A file-name-safe version of a stratum label (``DF/II`` -> ``DF_II``)."""
    stem = re.sub(r"[^A-Za-z0-9._-]+", "_", str(text)).strip("._")
    return stem or "stratum"


def rotation_chart(curves: RotationCurves, path: str | Path, title: str | None = None) -> Path:
    """Write the rotation chart of one stratum as a PNG.

    Upper panel: MAI and CAI against age with the MAI culmination marked. Lower panel:
    value growth rate ``S(t+1)/S(t) - 1`` against age with the discount rate, the Faustmann
    threshold ``r (1 + LEV/S)`` and the Fisher and Faustmann ages marked.

    Parameters
    ----------
    curves
        Curves from :func:`spatialplan.economics.rotation_curves`.
    path
        Target PNG; written atomically.
    title
        Figure title; default names the stratum.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    c = curves
    r = c.discount_rate
    marks = [
        v
        for v in (c.mai_max_age, c.fisher_age, c.faustmann_age, c.value_mai_max_age)
        if np.isfinite(v)
    ]
    xmax = float(c.ages[-1])
    if marks:
        xmax = min(xmax, max(60.0, math.ceil(1.6 * max(marks) / 10.0) * 10.0))
    show = c.ages <= xmax

    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(8.5, 8.0), sharex=True, layout="constrained")
    fig.suptitle(title or f"Rotation ages of stratum {c.stratum}", fontsize=14)

    ax1.plot(
        c.ages[show], c.mai[show], color="tab:blue", lw=2.2, label="MAI (mean annual increment)"
    )
    ax1.plot(
        c.ages[show],
        c.cai[show],
        color="tab:orange",
        lw=1.6,
        ls="--",
        label="CAI (current annual increment)",
    )
    ax1.axvline(c.mai_max_age, color="tab:blue", ls=":", lw=1.2)
    ax1.plot(
        [c.mai_max_age],
        [c.mai_max_m3_ha_yr],
        "o",
        color="tab:blue",
        ms=7,
        label=f"MAI culmination: {c.mai_max_age:g} yr, {c.mai_max_m3_ha_yr:.1f} m³/ha/yr",
    )
    ax1.set_ylabel("Increment (m³/ha/yr)")
    ax1.set_ylim(bottom=0)
    ax1.grid(alpha=0.3)
    ax1.legend(loc="upper right", fontsize=9)
    ax1.set_title("Volume increment", fontsize=11, loc="left")

    pct = 100.0
    ax2.plot(
        c.ages[show],
        pct * c.value_growth[show],
        color="tab:green",
        lw=2.2,
        label="Value growth rate S(t+1)/S(t) − 1",
    )
    ax2.axhline(pct * r, color="black", lw=1.2, label=f"Discount rate r = {pct * r:.2f} %/yr")
    if np.isfinite(c.faustmann_threshold).any():
        ax2.plot(
            c.ages[show],
            pct * c.faustmann_threshold[show],
            color="tab:purple",
            lw=1.3,
            ls="-.",
            label="Faustmann threshold r (1 + LEV/S)",
        )
    if np.isfinite(c.fisher_age):
        # drawn wide and pale so a Faustmann line at the same age stays visible on top
        ax2.axvline(
            c.fisher_age,
            color="tab:red",
            ls="-",
            lw=4.0,
            alpha=0.45,
            label=f"Fisher (single rotation): {c.fisher_age:g} yr",
        )
    if np.isfinite(c.faustmann_age):
        lev_txt = f", LEV {c.lev_per_ha:,.0f}/ha" if np.isfinite(c.lev_per_ha) else ""
        ax2.axvline(
            c.faustmann_age,
            color="tab:purple",
            ls="--",
            lw=1.4,
            label=f"Faustmann: {c.faustmann_age:g} yr{lev_txt}",
        )
    if np.isfinite(c.value_mai_max_age):
        ax2.axvline(
            c.value_mai_max_age,
            color="tab:gray",
            ls=":",
            lw=1.2,
            label=f"Max mean annual net value: {c.value_mai_max_age:g} yr",
        )
    top = max(4.0 * r, 0.05) * pct
    ax2.set_ylim(-0.1 * top, top)
    ax2.set_xlim(0, xmax)
    ax2.set_xlabel("Stand age (years)")
    ax2.set_ylabel("Rate (% per year)")
    ax2.grid(alpha=0.3)
    ax2.legend(loc="upper right", fontsize=9)
    ax2.set_title("Value growth and the discount rate", fontsize=11, loc="left")

    return _save(fig, Path(path))


# --- plan charts ---

__all__ += ["age_class_areas", "plan_charts"]


def age_class_areas(
    age_yr: np.ndarray, area_ha: np.ndarray, class_width_yr: float, n_classes: int
) -> np.ndarray:
    """Area per age class ``[k w, (k + 1) w)``; the last class also takes everything older."""
    k = np.clip(np.floor(np.asarray(age_yr, float) / class_width_yr), 0, n_classes - 1).astype(int)
    return np.bincount(k, weights=np.asarray(area_ha, float), minlength=n_classes)


def _save(fig: Any, path: Path) -> Path:
    """Write ``fig`` as PNG atomically and close it."""
    try:
        with atomic_path(path, suffix=".png") as tmp:
            fig.savefig(tmp, format="png", dpi=110)
    finally:
        plt.close(fig)
    return path


def plan_charts(periods_df: Any, schedule: Any, settings: Any, out_dir: str | Path) -> list[Path]:
    """Write the plan's PNG charts into ``out_dir`` (created when missing).

    Charts: ``harvest_flow.png`` (volume and area by period, with the flow band that
    applied), ``age_classes.png`` (area by age class at the start and at the end of the
    horizon), ``npv_by_period.png`` (discounted value by period and its running total).

    Parameters
    ----------
    periods_df
        Frame from :func:`spatialplan.outputs.period_table`.
    schedule
        Stand frame with ``period`` (0/null = not harvested), the age at the start (column
        ``fields.age_field`` of the settings, else ``age``) and ``net_area_ha`` or
        ``area_ha``.
    settings
        :class:`spatialplan.settings.Settings` or the same tree as nested dicts
        (``horizon.periods``, ``horizon.period_length_yr``).
    out_dir
        Folder for the PNGs.

    Returns
    -------
    list of pathlib.Path
        The PNGs written, in the order above.
    """
    import pandas as pd

    from spatialplan.outputs import _area_column, _get, _period_array, period_colours

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    P = int(_get(settings, "horizon.periods", len(periods_df)))
    L = float(_get(settings, "horizon.period_length_yr", 5.0))
    colours = period_colours(P)
    pdf = periods_df.sort_values("period")
    p = pdf["period"].to_numpy(dtype=int)
    bar_c = [colours[i - 1] if 1 <= i <= P else "grey" for i in p]
    paths: list[Path] = []

    # 1. harvest flow ----------------------------------------------------------------
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(8.5, 7.5), sharex=True, layout="constrained")
    fig.suptitle("Harvest by period", fontsize=14)
    vol = pdf["harvest_volume_m3"].to_numpy(float) / 1000.0
    ax1.bar(p, vol, color=bar_c, edgecolor="#333333", lw=0.6, label="Harvest volume")
    lo = pdf.get("flow_lower_m3")
    hi = pdf.get("flow_upper_m3")
    if lo is not None and hi is not None:
        lo_v = lo.to_numpy(float) / 1000.0
        hi_v = hi.to_numpy(float) / 1000.0
        top = np.nanmax(np.r_[vol, hi_v[np.isfinite(hi_v)], 0.0]) * 1.3 or 1.0
        band = np.isfinite(lo_v) | np.isfinite(hi_v)
        first = True
        for x, a, b in zip(p[band], lo_v[band], hi_v[band], strict=True):
            a = 0.0 if not np.isfinite(a) else a
            b = top if not np.isfinite(b) else b
            ax1.fill_between(
                [x - 0.45, x + 0.45],
                a,
                b,
                color="#f0a030",
                alpha=0.25,
                lw=0,
                label="Allowed range (flow rules)" if first else None,
            )
            ax1.hlines([a, b], x - 0.45, x + 0.45, color="#c06000", lw=1.2)
            first = False
        ax1.set_ylim(0, top)
    ax1.set_ylabel("Volume (1000 m³)")
    ax1.grid(axis="y", alpha=0.3)
    ax1.legend(loc="upper center", ncol=2, fontsize=9)
    ax1.set_title(
        "Volume, with the range allowed given the previous period", fontsize=11, loc="left"
    )
    area = pdf["harvest_area_ha"].to_numpy(float)
    ax2.bar(p, area, color=bar_c, edgecolor="#333333", lw=0.6)
    for col, txt in (("area_lower_ha", "area target, min"), ("area_upper_ha", "area target, max")):
        if col in pdf and np.isfinite(pdf[col].to_numpy(float)).any():
            ax2.axhline(float(np.nanmax(pdf[col])), color="#c06000", ls="--", lw=1.2, label=txt)
            ax2.legend(loc="upper right", fontsize=9)
    ax2.set_ylabel("Area (ha)")
    ax2.set_xlabel("Period")
    ax2.set_xticks(p)
    ax2.grid(axis="y", alpha=0.3)
    ax2.set_title("Area harvested", fontsize=11, loc="left")
    paths.append(_save(fig, out / "harvest_flow.png"))

    # 2. age classes at start and end -------------------------------------------------
    per = _period_array(schedule["period"])
    a_col = _area_column(schedule, None)
    area_s = np.nan_to_num(np.asarray(schedule[a_col], dtype=float))
    age_col = _get(settings, "fields.age_field", "age")
    age_col = age_col if age_col in schedule.columns else "age"
    age0 = np.nan_to_num(np.asarray(pd.to_numeric(schedule[age_col], errors="coerce"), dtype=float))
    horizon = P * L
    # Harvest at mid-period, regrowth from then on (docs/architecture.md, "Timing").
    age_end = np.where(per > 0, horizon - (per - 0.5) * L, age0 + horizon)
    width = 10.0 if max(age0.max(initial=0), age_end.max(initial=0)) <= 200 else 20.0
    n_cls = int(np.ceil((max(age0.max(initial=0), age_end.max(initial=0)) + 1e-9) / width)) or 1
    a0 = age_class_areas(age0, area_s, width, n_cls)
    a1 = age_class_areas(age_end, area_s, width, n_cls)
    x = np.arange(n_cls)
    fig, ax = plt.subplots(figsize=(9.5, 5.2), layout="constrained")
    ax.bar(x - 0.2, a0, width=0.4, color="#8a8a8a", label="Start of plan")
    ax.bar(
        x + 0.2,
        a1,
        width=0.4,
        color=colours[-1] if P > 1 else "#3b528b",
        edgecolor="#333333",
        lw=0.5,
        label=f"End of plan (after {horizon:g} years)",
    )
    ax.set_xticks(
        x,
        [f"{int(k * width)}–{int((k + 1) * width) - 1}" for k in x],
        rotation=45 if n_cls > 10 else 0,
        ha="right" if n_cls > 10 else "center",
    )
    ax.set_xlabel("Age class (years)")
    ax.set_ylabel("Area (ha)")
    ax.set_title("Area by age class", fontsize=14)
    ax.grid(axis="y", alpha=0.3)
    ax.legend(fontsize=9)
    paths.append(_save(fig, out / "age_classes.png"))

    # 3. NPV by period -----------------------------------------------------------------
    disc = pdf["discounted_value"].to_numpy(float)
    fig, ax = plt.subplots(figsize=(8.5, 5.0), layout="constrained")
    ax.bar(p, disc / 1000.0, color=bar_c, edgecolor="#333333", lw=0.6, label="Discounted net value")
    if "gross_value" in pdf and np.isfinite(pdf["gross_value"].to_numpy(float)).any():
        ax.plot(
            p,
            pdf["gross_value"].to_numpy(float) / 1000.0,
            "o--",
            color="#555555",
            label="Undiscounted net value",
        )
    ax.set_xlabel("Period")
    ax.set_ylabel("Value (1000s)")
    ax.set_xticks(p)
    ax.grid(axis="y", alpha=0.3)
    ax3 = ax.twinx()
    ax3.plot(
        p,
        np.cumsum(disc) / 1000.0,
        "-",
        color="#c06000",
        lw=2,
        marker="s",
        ms=4,
        label="Running total (NPV)",
    )
    ax3.set_ylabel("Running total (1000s)")
    ax3.set_ylim(bottom=min(0.0, float(np.min(np.cumsum(disc))) / 1000.0))
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax3.get_legend_handles_labels()
    ax.set_ylim(
        min(0.0, float(np.nanmin(disc)) / 1000.0), max(1e-9, float(np.nanmax(disc))) / 1000.0 * 1.3
    )
    ax3.set_ylim(top=max(1e-9, float(np.max(np.cumsum(disc)))) / 1000.0 * 1.15)
    ax.legend(h1 + h2, l1 + l2, loc="upper center", ncol=3, fontsize=9)
    ax.set_title(f"Net present value by period (total {np.sum(disc):,.0f})", fontsize=14)
    paths.append(_save(fig, out / "npv_by_period.png"))
    return paths


# --- scenario charts ---
__all__ += ["comparison_chart"]


def comparison_chart(
    table: Any,
    path: str | Path,
    title: str = "Scenario comparison",
    column_labels: Mapping[str, str] | None = None,
    scenario_labels: Mapping[str, str] | None = None,
) -> Path:
    """Write the scenario comparison chart (one PNG, four panels).

    Panels: NPV per scenario with the aspatial LP bound and the gap; the NPV cost of each
    rule (``cost_*`` columns; the cost of the spatial rules as a bar up to its upper
    estimate with a tick at its lower estimate); harvest volume by period; area harvested
    and the largest opening. Failed scenarios are shown as an empty slot labelled with
    their status.

    Parameters
    ----------
    table
        Frame from :func:`spatialplan.scenarios.comparison_table` (columns ``scenario``,
        ``status``, ``npv``, ``lp_bound``, ``gap``, ``verification``, ``volume_m3_p<k>``,
        ``area_harvested_ha``, ``largest_opening_ha`` and ``cost_*``).
    path
        Target PNG.
    title
        Figure title.
    column_labels
        Column -> legend words (:func:`spatialplan.scenarios.column_labels`); columns
        without one are named as in the table.
    scenario_labels
        Scenario -> its settings in words, added to its name in the volume legend.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    import pandas as pd

    df = table.reset_index(drop=True)
    names = df["scenario"].astype(str).tolist()
    n = len(names)
    x = np.arange(n)
    npv = pd.to_numeric(df["npv"], errors="coerce").to_numpy(float)
    lp = pd.to_numeric(df["lp_bound"], errors="coerce").to_numpy(float)
    gap = pd.to_numeric(df["gap"], errors="coerce").to_numpy(float)
    ran = np.isfinite(npv)
    verified = (df["verification"].astype(str) == "passed").to_numpy() & ran
    words = dict(column_labels or {})
    settings_words = dict(scenario_labels or {})
    width_in = max(10.0, 0.55 * n + 4.0)
    fig, axes = plt.subplots(2, 2, figsize=(width_in, 9.5), layout="constrained")
    fig.suptitle(title, fontsize=14)
    rot = 45 if n > 4 else 0
    ha = "right" if rot else "center"

    # 1. NPV and LP bound ---------------------------------------------------------------
    ax = axes[0, 0]
    colour = np.where(verified, "#3a7d44", "#d08c2a")
    ax.bar(
        x[ran],
        npv[ran] / 1000.0,
        color=colour[ran],
        edgecolor="#333333",
        lw=0.6,
        label="NPV of the plan",
    )
    ok_lp = np.isfinite(lp)
    ax.plot(
        x[ok_lp],
        lp[ok_lp] / 1000.0,
        "D",
        color="#222222",
        ms=6,
        label="LP bound (no spatial rules)",
    )
    top = np.nanmax(np.r_[npv[ran], lp[ok_lp], 0.0]) / 1000.0 or 1.0
    for i in x:
        if ran[i]:
            g = "" if not np.isfinite(gap[i]) else f"{100 * gap[i]:.1f}%"
            ax.text(i, npv[i] / 1000.0, g, ha="center", va="bottom", fontsize=8)
        else:
            ax.text(
                i,
                0.02 * top,
                str(df.loc[i, "status"]),
                rotation=90,
                ha="center",
                va="bottom",
                fontsize=9,
                color="#a02020",
            )
    if (~verified & ran).any():
        ax.bar([], [], color="#d08c2a", label="failed verification")
    ax.set_ylabel("Value (1000s)")
    ax.set_title("NPV, LP bound and gap", fontsize=11, loc="left")
    ax.legend(fontsize=8, loc="lower right")

    # 2. cost of the rules --------------------------------------------------------------
    ax = axes[0, 1]
    # The lower estimate of the spatial rules' cost is drawn on the bar of the upper one.
    lower_col = "cost_spatial_rules_lower"
    cost_cols = [c for c in df.columns if str(c).startswith("cost_") and c != lower_col]
    if cost_cols:
        k = len(cost_cols)
        w = 0.8 / k
        for j, c in enumerate(cost_cols):
            v = pd.to_numeric(df[c], errors="coerce").to_numpy(float) / 1000.0
            xs = x - 0.4 + (j + 0.5) * w
            ax.bar(
                xs,
                np.nan_to_num(v),
                width=w,
                label=words.get(c, c),
                edgecolor="#333333",
                lw=0.4,
            )
            if c == "cost_spatial_rules_upper" and lower_col in df.columns:
                lo = pd.to_numeric(df[lower_col], errors="coerce").to_numpy(float) / 1000.0
                ok_lo = np.isfinite(lo)
                ax.plot(
                    xs[ok_lo],
                    lo[ok_lo],
                    "_",
                    color="#111111",
                    ms=max(6.0, 40.0 * w),
                    mew=2,
                    label=words.get(lower_col, lower_col),
                )
        ax.axhline(0, color="#333333", lw=0.8)
        ax.legend(fontsize=8)
    ax.set_ylabel("NPV given up (1000s)")
    ax.set_title("Cost of each rule, against the relaxed scenario", fontsize=11, loc="left")

    # 3. volume by period --------------------------------------------------------------
    ax = axes[1, 0]
    vcols = sorted(
        (c for c in df.columns if str(c).startswith("volume_m3_p")), key=lambda c: int(str(c)[11:])
    )
    periods = [int(str(c)[11:]) for c in vcols]
    cmap = plt.get_cmap("tab20" if n > 10 else "tab10")
    for i in x:
        if not ran[i] or not vcols:
            continue
        v = pd.to_numeric(df.loc[i, vcols], errors="coerce").to_numpy(float) / 1000.0
        extra = settings_words.get(names[i], "")
        lab = f"{names[i]}: {extra}" if extra else names[i]
        ax.plot(periods, v, "-o", ms=3, lw=1.3, color=cmap(i % cmap.N), label=lab)
    ax.set_xlabel("Period")
    ax.set_ylabel("Volume (1000 m³)")
    if periods:
        ax.set_xticks(periods)
    ax.grid(axis="y", alpha=0.3)
    ax.set_title("Harvest volume by period", fontsize=11, loc="left")
    if ran.any():
        ax.legend(fontsize=7, ncol=2 if n > 6 else 1)

    # 4. area harvested and largest opening ----------------------------------------------
    ax = axes[1, 1]
    area = pd.to_numeric(df["area_harvested_ha"], errors="coerce").to_numpy(float)
    largest = pd.to_numeric(df["largest_opening_ha"], errors="coerce").to_numpy(float)
    ax.bar(
        x,
        np.nan_to_num(area),
        color="#6a8caf",
        edgecolor="#333333",
        lw=0.6,
        label="Area harvested (ha)",
    )
    ax.set_ylabel("Area harvested over the plan (ha)")
    # Head room above the bars and markers for the legend.
    ax.set_ylim(0, max(1e-9, float(np.nanmax(np.r_[area, 0.0]))) * 1.3)
    ax2 = ax.twinx()
    ok_l = np.isfinite(largest) & ran
    ax2.plot(x[ok_l], largest[ok_l], "s", color="#c06000", ms=6, label="Largest opening (ha)")
    ax2.set_ylabel("Largest opening (ha)")
    ax2.set_ylim(0, max(1e-9, float(np.nanmax(np.r_[largest[ok_l], 0.0]))) * 1.3)
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, fontsize=8, loc="upper left")
    ax.set_title("Area harvested and largest opening", fontsize=11, loc="left")

    for a in (axes[0, 0], axes[0, 1], axes[1, 1]):
        a.set_xticks(x, names, rotation=rot, ha=ha, fontsize=8)
        a.grid(axis="y", alpha=0.3)
    return _save(fig, Path(path))
