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
from collections.abc import Mapping  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import TYPE_CHECKING  # noqa: E402

import numpy as np  # noqa: E402

from spatialplan import _review as _rv  # noqa: E402
from spatialplan._io import atomic_path  # noqa: E402
from spatialplan.errors import OutputError  # noqa: E402

if TYPE_CHECKING:
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

__all__ += ["age_class_areas", "age_class_table", "plan_charts"]

#: Colours of the age-class series at the start, the middle and the end of the horizon:
#: light to dark, so the order reads in greyscale too.
AGE_SERIES_COLOURS = ("#c9bfa8", "#7d9c74", "#2e5e4e")
LTSY_ROTATION_COLOUR = "#8a2b4a"  # LTSY at the economic rotation (solid line)
LTSY_MAI_COLOUR = "#4a4a4a"  # LTSY at MAI culmination (dashed line)
ENDING_VALUE_COLOUR = "#6f7f8f"
#: Age classes beyond this many are pooled into the last, open class.
MAX_AGE_CLASSES = 30


def age_class_areas(
    age_yr: np.ndarray, area_ha: np.ndarray, class_width_yr: float, n_classes: int
) -> np.ndarray:
    """Area per age class ``[k w, (k + 1) w)``; the last class also takes everything older.

    Examples
    --------
    >>> age_class_areas(np.array([3.0, 12.0, 95.0]), np.array([1.0, 2.0, 4.0]), 10.0, 3).tolist()
    [1.0, 2.0, 4.0]
    """
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


def _class_label(lo: float, hi: float, width: float) -> str:
    if float(width).is_integer():  # whole-year classes: 0–9, 10–19, ...
        return f"{lo:g}–{hi - 1:g}"
    return f"{lo:g}–{hi:g}"


def _start_ages(schedule: Any, settings: Any) -> np.ndarray:
    import pandas as pd

    col = str(_rv.setting(settings, "fields.age_field", "age"))
    col = col if col in schedule.columns else "age"
    if col not in schedule.columns:
        msg = f"the schedule has no age column ({col!r}); cannot draw age classes"
        raise OutputError(msg)
    return np.nan_to_num(np.asarray(pd.to_numeric(schedule[col], errors="coerce"), dtype=float))


def _gross_area(schedule: Any) -> np.ndarray:
    import pandas as pd

    col = "area_ha" if "area_ha" in schedule.columns else "net_area_ha"
    return np.nan_to_num(np.asarray(pd.to_numeric(schedule[col], errors="coerce"), dtype=float))


def age_class_table(
    schedule: Any, settings: Any, harvests: Any = None, *, id_col: str | None = None
) -> Any:
    """Gross area by age class at the start, the middle and the end of the horizon.

    Ages at ``t = 0``, ``P L / 2`` and ``P L`` come from the start ages and the harvests:
    after a harvest in period ``q`` the stand is age 0 at mid-period ``q`` plus
    ``regeneration.delay_yr`` (bare land counts in the youngest class).

    Parameters
    ----------
    schedule
        The ``schedule`` layer: start age (``fields.age_field``, else ``age``),
        ``area_ha`` (gross), ``period`` or ``harvest_periods``.
    settings
        Settings tree (``horizon``, ``regeneration.delay_yr``,
        ``output.age_class_width_yr``, ``fields``).
    harvests
        The ``harvests`` table (one row per harvest) or ``None`` (one harvest per stand,
        read from the schedule).
    id_col
        Stand id column (default ``fields.id_field``).

    Returns
    -------
    pandas.DataFrame
        One row per class: ``age_class`` (label), ``from_yr``, ``to_yr`` (NaN for the last,
        open class when older stands are pooled), ``area_start_ha``, ``area_mid_ha``,
        ``area_end_ha``. ``attrs["times_yr"]`` holds the three times in years from the start.
    """
    import pandas as pd

    P = int(_rv.setting(settings, "horizon.periods", 10))
    L = float(_rv.setting(settings, "horizon.period_length_yr", 5.0))
    delay = float(_rv.setting(settings, "regeneration.delay_yr", 0.0))
    width = float(_rv.setting(settings, "output.age_class_width_yr", 10.0))
    ident = id_col or str(_rv.setting(settings, "fields.id_field", "stand_id"))
    events = _rv.harvest_events(schedule, harvests, ident)
    age0 = _start_ages(schedule, settings)
    area = _gross_area(schedule)
    times = (0.0, P * L / 2.0, P * L)
    ages = [_rv.ages_at(age0, events, t, L, delay) for t in times]
    oldest = max((float(a.max(initial=0.0)) for a in ages), default=0.0)
    n_cls = max(1, math.floor(oldest / width) + 1)
    pooled = n_cls > MAX_AGE_CLASSES
    n_cls = min(n_cls, MAX_AGE_CLASSES)
    lo = np.arange(n_cls) * width
    hi = lo + width
    labels = [_class_label(a, b, width) for a, b in zip(lo, hi, strict=True)]
    if pooled:
        labels[-1] = f"≥ {lo[-1]:g}"
    table = pd.DataFrame(
        {
            "age_class": labels,
            "from_yr": lo,
            "to_yr": np.where(pooled & (np.arange(n_cls) == n_cls - 1), np.nan, hi),
            "area_start_ha": age_class_areas(ages[0], area, width, n_cls),
            "area_mid_ha": age_class_areas(ages[1], area, width, n_cls),
            "area_end_ha": age_class_areas(ages[2], area, width, n_cls),
        }
    )
    table.attrs["times_yr"] = times
    return table


def _period_axis(ax: Any, p: np.ndarray, first_years: np.ndarray, calendar: bool) -> None:
    """Period numbers with the first year of each period below; thinned when crowded."""
    step = 1 if len(p) <= 16 else math.ceil(len(p) / 16)
    shown = p[::step]
    years = first_years[::step]
    ax.set_xticks(shown, [f"{k}\n{y:g}" for k, y in zip(shown, years, strict=True)], fontsize=8)
    ax.set_xlabel("Period (first year)" if calendar else "Period (years from the plan start)")


def _periods_years(pdf: Any, settings: Any, P: int, L: float) -> tuple[np.ndarray, bool]:
    """(P, 2) start and end year of each period in ``pdf`` and whether they are calendar years."""
    start_year = float(_rv.setting(settings, "horizon.start_year", 0) or 0)
    calendar = start_year != 0
    if {"start_year", "end_year"} <= set(pdf.columns):
        return pdf[["start_year", "end_year"]].to_numpy(dtype=float), calendar
    return _rv.period_years(P, L, start_year)[pdf["period"].to_numpy(dtype=int) - 1], calendar


def plan_charts(
    periods_df: Any,
    schedule: Any,
    settings: Any,
    out_dir: str | Path,
    *,
    harvests: Any = None,
    run_info: Mapping[str, Any] | None = None,
    id_col: str | None = None,
) -> list[Path]:
    """Write the plan's PNG charts into ``out_dir`` (created when missing).

    Charts: ``harvest_flow.png`` (volume and net area by period, with the flow band that
    applied and the long-term sustained yield per period), ``age_classes.png`` (gross area
    by age class at the start, the middle and the end of the horizon) and
    ``npv_by_period.png`` (discounted value of each period's harvests, the discounted
    ending value, the running total, and the gross value before costs and discounting).

    Parameters
    ----------
    periods_df
        The ``periods`` table (old column names are read too).
    schedule
        The ``schedule`` layer (start age, ``area_ha``, ``period``/``harvest_periods``).
    settings
        :class:`spatialplan.settings.Settings` or the same tree as nested dicts.
    out_dir
        Folder for the PNGs.
    harvests
        The ``harvests`` table, one row per harvest (``None``: one per stand, from the
        schedule).
    run_info
        The ``run`` table as a dict: ``ltsy_mai_m3_yr``, ``ltsy_rotation_m3_yr`` (m3 per
        year) and ``ending_value_npv`` are drawn when present.
    id_col
        Stand id column (default ``fields.id_field``).

    Returns
    -------
    list of pathlib.Path
        The PNGs written, in the order above.
    """
    from spatialplan.outputs import period_colours

    info = _rv.current_run_info(run_info or {})
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    pdf = _rv.current_names(periods_df, "periods").sort_values("period")
    P = int(_rv.setting(settings, "horizon.periods", len(pdf)))
    L = float(_rv.setting(settings, "horizon.period_length_yr", 5.0))
    colours = period_colours(P)
    p = pdf["period"].to_numpy(dtype=int)
    years, calendar = _periods_years(pdf, settings, P, L)
    bar_c = [colours[i - 1] if 1 <= i <= P else "grey" for i in p]
    return [
        _flow_chart(pdf, p, years, calendar, bar_c, L, info, out / "harvest_flow.png"),
        _age_chart(schedule, settings, harvests, id_col, out / "age_classes.png"),
        _value_chart(pdf, p, years, calendar, bar_c, schedule, info, out / "npv_by_period.png"),
    ]


def _flow_chart(
    pdf: Any,
    p: np.ndarray,
    years: np.ndarray,
    calendar: bool,
    bar_c: list[str],
    L: float,
    info: Mapping[str, Any],
    path: Path,
) -> Path:
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(9.0, 8.0), sharex=True, layout="constrained")
    fig.suptitle("Harvest by period", fontsize=14)
    vol = pdf["harvest_volume_m3"].to_numpy(float) / 1000.0
    ax1.bar(p, vol, color=bar_c, edgecolor="#333333", lw=0.6)
    tops = [vol, [0.0]]
    lo = pdf.get("flow_lower_m3")
    hi = pdf.get("flow_upper_m3")
    band_drawn = False
    if lo is not None and hi is not None:
        lo_v = lo.to_numpy(float) / 1000.0
        hi_v = hi.to_numpy(float) / 1000.0
        tops.append(hi_v[np.isfinite(hi_v)])
        band = np.isfinite(lo_v) | np.isfinite(hi_v)
        ceiling = max(float(np.nanmax(np.r_[vol, hi_v[np.isfinite(hi_v)], 0.0])), 1e-9) * 1.6
        for x, a, b in zip(p[band], lo_v[band], hi_v[band], strict=True):
            a = 0.0 if not np.isfinite(a) else a
            b = ceiling if not np.isfinite(b) else b
            ax1.fill_between(
                [x - 0.45, x + 0.45],
                a,
                b,
                color="#f0a030",
                alpha=0.25,
                lw=0,
                label=None if band_drawn else "Volume allowed by the flow rules",
            )
            ax1.hlines([a, b], x - 0.45, x + 0.45, color="#c06000", lw=1.2)
            band_drawn = True
    # LTSY per period = LTSY per year x L (names contract); lines span the whole axis.
    for key, colour, style, words in (
        ("ltsy_rotation_m3_yr", LTSY_ROTATION_COLOUR, "-", "LTSY at the economic rotation"),
        ("ltsy_mai_m3_yr", LTSY_MAI_COLOUR, "--", "LTSY at MAI culmination"),
    ):
        per_year = _rv.numeric(info.get(key))
        if np.isfinite(per_year):
            y = per_year * L / 1000.0
            tops.append([y])
            ax1.axhline(
                y,
                color=colour,
                ls=style,
                lw=1.8,
                label=f"{words}: {per_year * L:,.0f} m³ per period",
            )
    top = max(float(np.max(np.concatenate([np.asarray(t, float) for t in tops]))), 1e-9)
    ltsy_rot = _rv.numeric(info.get("ltsy_rotation_m3_yr")) * L / 1000.0
    if len(vol) and np.isfinite(ltsy_rot) and ltsy_rot > 0:
        # The late harvest against the LTSY, written over the last bar.
        above = [float(vol[-1])]
        if hi is not None and np.isfinite(hi.to_numpy(float)[-1]):
            above.append(float(hi.to_numpy(float)[-1]) / 1000.0)
        ax1.annotate(
            f"{100.0 * vol[-1] / ltsy_rot:.0f} % of LTSY\n(economic rotation)",
            (float(p[-1]), max(above)),
            xytext=(0, 4),
            textcoords="offset points",
            ha="center",
            va="bottom",
            fontsize=8,
            color=LTSY_ROTATION_COLOUR,
            bbox={"boxstyle": "round,pad=0.25", "fc": "white", "ec": LTSY_ROTATION_COLOUR,
                  "lw": 0.6},
        )  # fmt: skip
        top = max(top, max(above) * 1.3)
    ax1.set_ylim(0, top * 1.12)
    ax1.set_ylabel("Volume (1000 m³)")
    ax1.grid(axis="y", alpha=0.3)
    parts = ["the range the flow rules allowed"] if band_drawn else []
    if any(
        np.isfinite(_rv.numeric(info.get(k))) for k in ("ltsy_rotation_m3_yr", "ltsy_mai_m3_yr")
    ):
        parts.append("the long-term sustained yield (LTSY)")
    ax1.set_title(
        "Volume" + (", with " + " and ".join(parts) if parts else ""), fontsize=10.5, loc="left"
    )
    area = pdf["harvest_net_area_ha"].to_numpy(float)
    ax2.bar(p, area, color=bar_c, edgecolor="#333333", lw=0.6)
    for col, txt, style in (
        ("area_lower_ha", "Area target, least", ":"),
        ("area_upper_ha", "Area target, most", "--"),
    ):
        if col in pdf and np.isfinite(pdf[col].to_numpy(float)).any():
            ax2.axhline(float(np.nanmax(pdf[col])), color="#c06000", ls=style, lw=1.2, label=txt)
    ax2.set_ylim(0, max(float(np.nanmax(np.r_[area, 0.0])), 1e-9) * 1.12)
    ax2.set_ylabel("Harvest area (net, ha)")
    ax2.grid(axis="y", alpha=0.3)
    ax2.set_title("Area harvested (net of stream buffers)", fontsize=10.5, loc="left")
    _period_axis(ax2, p, years[:, 0], calendar)
    handles, labels = ax1.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    fig.legend(handles + h2, labels + l2, loc="outside lower center", ncol=2, fontsize=9)
    return _save(fig, path)


def _age_chart(schedule: Any, settings: Any, harvests: Any, id_col: str | None, path: Path) -> Path:
    table = age_class_table(schedule, settings, harvests, id_col=id_col)
    start_year = float(_rv.setting(settings, "horizon.start_year", 0) or 0)
    times = table.attrs["times_yr"]
    n = len(table)
    x = np.arange(n)
    fig, ax = plt.subplots(figsize=(max(9.0, 0.45 * n + 3.0), 5.6), layout="constrained")
    names = ("Start of the plan", "Middle of the plan", "End of the plan")
    cols = ("area_start_ha", "area_mid_ha", "area_end_ha")
    for j, (name, col, colour) in enumerate(zip(names, cols, AGE_SERIES_COLOURS, strict=True)):
        when = f"{start_year + times[j]:g}" if start_year else f"year {times[j]:g}"
        ax.bar(
            x + (j - 1) * 0.28,
            table[col].to_numpy(float),
            width=0.28,
            color=colour,
            edgecolor="#333333",
            lw=0.4,
            label=f"{name} ({when})",
        )
    ax.set_xticks(
        x,
        table["age_class"].tolist(),
        rotation=45 if n > 10 else 0,
        ha="right" if n > 10 else "center",
        fontsize=8.5,
    )
    width = float(_rv.setting(settings, "output.age_class_width_yr", 10.0))
    min_age = float(_rv.setting(settings, "rules.min_age_yr", 0.0) or 0.0)
    if 0 < min_age < n * width:
        # Class k spans x = k - 0.5 .. k + 0.5, so age a sits at a / width - 0.5.
        ax.axvline(
            min_age / width - 0.5,
            color="#8a2b4a",
            ls="--",
            lw=1.3,
            label=f"Minimum harvest age ({min_age:g} years)",
        )
    ax.set_xlabel(f"Age class (years; classes of {width:g} years)")
    ax.set_ylabel("Area (gross, ha)")
    ax.set_ylim(0, max(float(table[list(cols)].to_numpy().max(initial=0.0)), 1e-9) * 1.1)
    ax.set_title("Area by age class at the start, the middle and the end", fontsize=14)
    ax.grid(axis="y", alpha=0.3)
    fig.legend(loc="outside lower center", ncol=4, fontsize=9)
    return _save(fig, path)


def _value_chart(
    pdf: Any,
    p: np.ndarray,
    years: np.ndarray,
    calendar: bool,
    bar_c: list[str],
    schedule: Any,
    info: Mapping[str, Any],
    path: Path,
) -> Path:
    import pandas as pd

    disc = np.nan_to_num(pdf["npv"].to_numpy(float))
    ending = _rv.numeric(info.get("ending_value_npv"))
    if not np.isfinite(ending) and "ending_value_npv" in schedule.columns:
        ending = float(pd.to_numeric(schedule["ending_value_npv"], errors="coerce").sum())
    has_end = bool(np.isfinite(ending))
    fig, (ax, ax2) = plt.subplots(
        2, 1, figsize=(9.0, 8.0), sharex=True, layout="constrained", height_ratios=(3, 2)
    )
    ax.bar(p, disc / 1000.0, color=bar_c, edgecolor="#333333", lw=0.6)
    # Legend swatch in a neutral grey: the bars take the period colours of the map.
    ax.bar(
        [],
        [],
        color="#b5b5b5",
        edgecolor="#333333",
        lw=0.6,
        label="NPV of the period's harvests (discounted, after costs; colours as on the map)",
    )
    xs = [float(x) for x in p]
    steps = list(disc)
    if has_end:
        x_end = float(p.max(initial=0)) + 1.0
        ax.bar(
            [x_end],
            [ending / 1000.0],
            color=ENDING_VALUE_COLOUR,
            edgecolor="#333333",
            lw=0.6,
            hatch="//",
            label="Ending value of the forest left (discounted)",
        )
        xs.append(x_end)
        steps.append(ending)
    vals = np.asarray(steps, float) / 1000.0
    lows, highs = [0.0, float(vals.min(initial=0.0))], [float(vals.max(initial=0.0))]
    gross = pdf["gross_value"].to_numpy(float) if "gross_value" in pdf else np.full(len(p), np.nan)
    if np.isfinite(gross).any():
        ax.plot(
            p,
            gross / 1000.0,
            "o--",
            color="#555555",
            ms=4,
            label="Gross value, undiscounted (volume x price, before costs)",
        )
        highs.append(float(np.nanmax(gross)) / 1000.0)
        lows.append(float(np.nanmin(gross)) / 1000.0)
    _fit_ylim(ax, min(lows), max(highs))
    ax.set_ylabel("Value (1000s)")
    ax.grid(axis="y", alpha=0.3)
    ax.set_title("Value of each period's harvests", fontsize=10.5, loc="left")

    total = np.cumsum(vals)
    ax2.plot(xs, total, "-", color="#c06000", lw=2, marker="s", ms=4, label="NPV, running total")
    t_hi = [float(total.max(initial=0.0))]
    bound = _rv.numeric(info.get("best_bound"))
    if np.isfinite(bound):
        method = str(info.get("best_bound_method") or "").strip()
        ax2.axhline(
            bound / 1000.0,
            color="#222222",
            ls=":",
            lw=1.4,
            label=f"Best proven upper bound{f', {method}' if method else ''}: {bound:,.0f}",
        )
        t_hi.append(bound / 1000.0)
    _fit_ylim(ax2, min(0.0, float(total.min(initial=0.0))), max(t_hi))
    ax2.set_ylabel("Running total (1000s)")
    ax2.grid(axis="y", alpha=0.3)
    ax2.set_title("NPV added up over the periods, ending value last", fontsize=10.5, loc="left")
    _period_axis(ax2, p, years[:, 0], calendar)
    if has_end:
        ticks = [*ax2.get_xticks(), xs[-1]]
        labels = [t.get_text() for t in ax2.get_xticklabels()]
        end_year = years[-1, 1] if len(years) else 0.0
        ax2.set_xticks(ticks, [*labels, f"End\n{end_year:g}"], fontsize=8)
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    fig.legend(h1 + h2, l1 + l2, loc="outside lower center", ncol=2, fontsize=9)
    fig.suptitle(f"Net present value by period (plan NPV {float(np.sum(steps)):,.0f})", fontsize=14)
    return _save(fig, path)


def _fit_ylim(ax: Any, low: float, high: float) -> None:
    """Y range holding ``low .. high`` with head room, so no line or marker touches the frame."""
    span = max(high - low, 1e-9)
    ax.set_ylim(low - (0.06 * span if low < 0 else 0.0), high + 0.1 * span)


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
    lp = pd.to_numeric(df["bound_aspatial_lp"], errors="coerce").to_numpy(float)
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
