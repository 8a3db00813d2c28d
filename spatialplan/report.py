"""One-page HTML report of a plan.

The report is self-contained: charts are embedded as base64 PNG, so the page can be
handed over as one file; the map is linked by a relative path. Every value is escaped.
The rules achieved and the sustainability statement it shows are computed in
:mod:`spatialplan.assessment`; the bundle of review files (map, charts, report) is
written by :func:`spatialplan.review.write_review_files`.

It reads the plan in the names of the current format (``docs/architecture.md``, "Output
GeoPackage"); plans written before the estate model are read through
:func:`spatialplan._review.current_names`, so they still render.
"""

from __future__ import annotations

import base64
import html
import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatialplan import _review as _rv
from spatialplan._io import write_text_atomic
from spatialplan._review import CAUTIONS

# The plan assessment and the review bundle moved out of this module; their names stay
# importable from here for existing callers.
from spatialplan.assessment import rules_achieved, sustainability
from spatialplan.review import review_paths, write_review_files

__all__ = [
    "CAUTIONS",
    "review_paths",
    "rules_achieved",
    "sustainability",
    "write_report",
    "write_review_files",
]

# Run-summary rows shown first, in this order, when present: (key, label). Keys are the
# current ones (old plans are read through _review.current_run_info).
_SUMMARY = (
    ("npv", "Net present value (NPV) of the plan"),
    ("ending_value_npv", "of which: ending value of the forest left (discounted)"),
    ("best_bound", "Best proven upper bound"),
    ("gap", "Gap to the best proven bound"),
    ("bound_aspatial_lp", "Upper bound recorded: aspatial LP (HiGHS), no spatial rules"),
    ("bound_cpsat", "Upper bound recorded: CP-SAT"),
    ("solver_status", "Solver status"),
    ("verify_verdict", "Independent check (verify)"),
    ("solve_time_s", "Solve time (s)"),
    ("ltsy_rotation_m3_yr", "LTSY at the economic rotation (m³ per year)"),
    ("ltsy_mai_m3_yr", "LTSY at MAI culmination (m³ per year)"),
    ("software", "Software"),
    ("stands_path", "Stand layer"),
    ("stands_sha256", "Stand layer SHA-256"),
    ("yields_path", "Yield table"),
    ("yields_sha256", "Yield table SHA-256"),
)
_MONEY = {"npv", "ending_value_npv", "best_bound", "bound_aspatial_lp", "bound_cpsat"}
_VOLUME = {"ltsy_rotation_m3_yr", "ltsy_mai_m3_yr"}

# long texts kept in the GeoPackage, not the page; best_bound_method is shown with the bound
_HIDDEN = {"settings_json", "yields_csv", "best_bound_method", "title"}

# The periods table on the page: (column, label, decimals); "_" columns are made here.
_PERIOD_COLS = (
    ("period", "Period", 0),
    ("_years", "Years", 0),
    ("harvest_net_area_ha", "Harvest area (net, ha)", 1),
    ("harvest_volume_m3", "Harvest volume (m³)", 0),
    ("_change_pct", "Change from the previous period (%)", 1),
    ("_flow_band", "Volume the flow rules allowed (m³)", 0),
    ("gross_value", "Gross value, undiscounted (before costs)", 0),
    ("npv", "NPV of the period's harvests (discounted)", 0),
    ("mean_age_at_harvest_yr", "Mean age at harvest (yr)", 1),
    ("stands_harvested", "Stands harvested", 0),
    ("opening_count", "Openings", 0),
    ("largest_opening_ha", "Largest opening (gross, ha)", 1),
    ("_old_forest_pct", "Old forest (% of gross area)", 1),
    ("standing_volume_m3", "Standing volume at mid-period (m³)", 0),
)


def _esc(text: Any) -> str:
    return html.escape(str(text))


# ---------------------------------------------------------------------------------------
# HTML pieces
# ---------------------------------------------------------------------------------------
def _table(frame: pd.DataFrame, cols: Sequence[tuple[str, str, int]], cls: str = "") -> str:
    use = [(c, lbl, d) for c, lbl, d in cols if c in frame.columns]
    head = "".join(f"<th>{_esc(lbl)}</th>" for _c, lbl, _d in use)
    body = []
    for rec in frame.to_dict("records"):
        css = ' class="total"' if rec.get("_total") else ""
        tds = "".join(f"<td>{_esc(_rv.fmt_number(rec[c], d))}</td>" for c, _l, d in use)
        body.append(f"<tr{css}>{tds}</tr>")
    return (
        f'<table class="{cls}"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'
    )


def _period_frame(pdf: pd.DataFrame, hz: _rv.Horizon) -> pd.DataFrame:
    """The periods table as the page shows it, with a totals row."""
    t = pdf.copy()
    t["_years"] = [hz.text(int(p)) for p in t["period"]]
    vol = _rv.column(t, "harvest_volume_m3")
    t["_change_pct"] = [_rv.fmt_signed(100.0 * c, 1) for c in _rv.volume_changes(vol)]
    lo, hi = _rv.column(t, "flow_lower_m3"), _rv.column(t, "flow_upper_m3")
    if np.isfinite(lo).any() or np.isfinite(hi).any():
        t["_flow_band"] = [
            "–" if not (np.isfinite(a) or np.isfinite(b))
            else f"{_rv.fmt_number(a, 0) if np.isfinite(a) else '0'}–{_rv.fmt_number(b, 0) if np.isfinite(b) else '…'}"
            for a, b in zip(lo, hi, strict=True)
        ]  # fmt: skip
    if "old_forest_share" in t.columns:
        t["_old_forest_pct"] = 100.0 * _rv.column(t, "old_forest_share")
    for c in ("_old_forest_pct", "standing_volume_m3"):
        if c in t.columns and not np.isfinite(_rv.column(t, c)).any():
            t = t.drop(columns=c)
    t["period"] = t["period"].astype(int).astype(str)
    area = np.nan_to_num(_rv.column(t, "harvest_net_area_ha"))
    mean_age = _rv.column(t, "mean_age_at_harvest_yr")
    ok = np.isfinite(mean_age) & (area > 0)
    total: dict[str, Any] = dict.fromkeys(t.columns, "")
    total.update({"period": "Total", "_years": hz.span(), "_total": True})
    for c in ("harvest_net_area_ha", "harvest_volume_m3", "gross_value", "npv",
              "stands_harvested"):  # fmt: skip
        if c in t.columns:
            total[c] = float(np.nansum(_rv.column(t, c)))
    if ok.any():
        total["mean_age_at_harvest_yr"] = float(np.average(mean_age[ok], weights=area[ok]))
    if "largest_opening_ha" in t.columns:
        total["largest_opening_ha"] = float(np.nanmax(_rv.column(t, "largest_opening_ha")))
    t["_total"] = False
    return pd.concat([t, pd.DataFrame([total])], ignore_index=True)


def _strata_pivot(strata_df: pd.DataFrame | None, hz: _rv.Horizon) -> str:
    """Strata as rows, periods as columns: harvested volume (m³) / net area (ha) per cell."""
    if strata_df is None or not len(strata_df):
        return "<p>No strata.</p>"
    sdf = _rv.current_names(strata_df, "strata")
    vol = sdf.pivot_table(index="stratum", columns="period", values="harvest_volume_m3",
                          aggfunc="sum", fill_value=0.0)  # fmt: skip
    area = sdf.pivot_table(index="stratum", columns="period", values="harvest_net_area_ha",
                           aggfunc="sum", fill_value=0.0)  # fmt: skip
    periods = list(vol.columns)
    head = (
        "<th>Stratum</th>"
        + "".join(f"<th>{int(p)}<br><small>{_esc(hz.text(int(p)))}</small></th>" for p in periods)
        + "<th>Total</th>"
    )
    rows = []
    for s in vol.index:
        cells = "".join(
            f"<td>{_esc(_rv.fmt_number(vol.loc[s, p], 0))}<br><small>"
            f"{_esc(_rv.fmt_number(area.loc[s, p], 1))} ha</small></td>"
            for p in periods
        )
        tot = (f"<td><b>{_esc(_rv.fmt_number(vol.loc[s].sum(), 0))}</b><br><small>"
               f"{_esc(_rv.fmt_number(area.loc[s].sum(), 1))} ha</small></td>")  # fmt: skip
        rows.append(f"<tr><th>{_esc(s)}</th>{cells}{tot}</tr>")
    return (
        '<table class="num"><thead><tr>'
        + head
        + "</tr></thead><tbody>"
        + "".join(rows)
        + '</tbody></table><p class="note">Cells: harvested volume (m³) and harvest area '
        "(net, ha) by period.</p>"
    )


def _summary_value(key: str, v: Any, info: Mapping[str, Any]) -> str:
    x = _rv.numeric(v)
    if key == "verify_verdict":
        word, rest = _rv.verdict_parts(v)
        return f"{word}: {rest}" if word and rest else (word or str(v))
    if not np.isfinite(x):
        return str(v)
    if key == "gap":
        return f"{100.0 * x:.2f} %"
    if key == "best_bound":
        method = str(info.get("best_bound_method") or "").strip()
        return f"{x:,.0f}" + (f" (method: {method})" if method else "")
    if key in _MONEY:
        return f"{x:,.0f}"
    if key in _VOLUME:
        return f"{x:,.0f}"
    if key == "solve_time_s":
        return f"{x:,.1f}"
    return str(v)


def _rules_html(rules: pd.DataFrame) -> str:
    if not len(rules):
        return '<p class="note">note: the plan records no settings, so its rules are unknown.</p>'
    body = []
    for rec in rules.to_dict("records"):
        check = str(rec["check"])
        css = {"passed": "ok", "failed": "bad"}.get(check, "na")
        body.append(
            f"<tr><td>{_esc(rec['rule'])}</td><td>{_esc(rec['achieved'])}</td>"
            f'<td class="{css}">{_esc(check or "–")}</td></tr>'
        )
    return (
        '<table class="rules"><thead><tr><th>Rule in force</th><th>What the plan achieved</th>'
        f"<th>Check</th></tr></thead><tbody>{''.join(body)}</tbody></table>"
        '<p class="note">Checks measured here from the plan tables; green-up and the unit '
        "restriction rest on the independent check (verify), which re-derives every rule "
        "from the stand polygons.</p>"
    )


def _age_table_html(ages: pd.DataFrame, hz: _rv.Horizon) -> str:
    """Gross area and share by age class at the start, the middle and the end."""
    cols = ("area_start_ha", "area_mid_ha", "area_end_ha")
    tot = [float(ages[c].sum()) or 1.0 for c in cols]
    times = ages.attrs.get("times_yr", (0.0, hz.P * hz.L / 2, hz.P * hz.L))
    head = "".join(
        f'<th colspan="2">{w} ({_esc(hz.at(t))})</th>'
        for w, t in zip(("Start", "Middle", "End"), times, strict=True)
    )
    rows = "".join(
        f"<tr><td>{_esc(r['age_class'])}</td>"
        + "".join(
            f"<td>{_rv.fmt_number(r[c], 1)}</td><td>{_rv.fmt_number(100 * r[c] / t, 1)}</td>"
            for c, t in zip(cols, tot, strict=True)
        )
        + "</tr>"
        for r in ages.to_dict("records")
    )
    return (
        '<table class="num ages"><thead><tr><th rowspan="2">Age class (years)</th>'
        f"{head}</tr><tr>" + "<th>ha (gross)</th><th>%</th>" * 3 + "</tr></thead>"
        f"<tbody>{rows}</tbody></table>"
    )


def write_report(
    path: str | Path,
    run_info: Mapping[str, Any],
    periods_df: pd.DataFrame,
    strata_df: pd.DataFrame,
    chart_paths: Sequence[str | Path],
    map_href: str | None,
    cautions: Sequence[str] = CAUTIONS,
    *,
    settings: Any = None,
    schedule: pd.DataFrame | None = None,
    harvests: pd.DataFrame | None = None,
    openings: pd.DataFrame | None = None,
    id_col: str | None = None,
) -> None:
    """Write the one-page HTML report.

    Sections: the result (NPV, the best proven upper bound with its method, the gap to it,
    every bound recorded), the rules in force beside what the plan achieved, a
    sustainability statement (standing volume, age classes at the end, last-period harvest
    against the LTSY), the periods with calendar years and a totals row, harvest by
    stratum, the charts, the cautions and the run record.

    Parameters
    ----------
    path
        Target ``.html`` (written atomically).
    run_info
        The ``run`` table as a dict: ``npv``, ``best_bound``, ``best_bound_method``,
        ``gap``, ``bound_aspatial_lp``, ``bound_cpsat``, ``ending_value_npv``,
        ``ltsy_mai_m3_yr``, ``ltsy_rotation_m3_yr``, ``solver_status``,
        ``verify_verdict``, ``software`` ... (old keys are read too). Other keys are
        listed in the run record, except long texts (``settings_json``, ``yields_csv``).
    periods_df, strata_df
        The ``periods`` and ``strata`` tables.
    chart_paths
        PNGs to embed (base64), in order.
    map_href
        Link to the map, relative to the report (``None``: no link).
    cautions
        Cautions listed on the page.
    settings
        Settings of the plan (for the rules and calendar years; without them the rules
        section says the rules are unknown).
    schedule
        The ``schedule`` layer (rules achieved, sustainability); ``None`` leaves those
        sections out.
    harvests
        The ``harvests`` table (``None``: one harvest per stand, from the schedule).
    openings
        The ``openings`` layer.
    id_col
        Stand id column (default ``fields.id_field``).
    """
    path = Path(path)
    info = _rv.current_run_info(run_info)
    pdf = _rv.current_names(periods_df, "periods").sort_values("period").reset_index(drop=True)
    hz = _rv.Horizon(settings, pdf)
    title = str(info.get("title") or f"Harvest plan: {path.name.removesuffix('.report.html')}")
    messages: list[str] = []
    if not hz.calendar:
        messages.append(
            "note: horizon.start_year is not set, so periods are given in years from the "
            "plan start (yr 0–5 ...), not calendar years"
        )

    summary = [
        (label, _summary_value(key, info[key], info))
        for key, label in _SUMMARY
        if key in info and str(info[key]) != ""
    ]
    shown = {k for k, _ in _SUMMARY} | _HIDDEN
    extra = [(k, str(v)) for k, v in info.items() if k not in shown and str(v) != ""]
    rows = "".join(f"<tr><th>{_esc(lbl)}</th><td>{_esc(val)}</td></tr>" for lbl, val in summary)
    extra_rows = "".join(f"<tr><th>{_esc(k)}</th><td>{_esc(v)}</td></tr>" for k, v in extra)
    word, _rest = _rv.verdict_parts(info.get("verify_verdict"))
    if word == "failed":
        messages.append(
            "violation: the independent check failed; `spatialplan verify` lists every "
            "broken rule by stand and period"
        )
    elif not word:
        messages.append("note: no verdict of the independent check is recorded")

    rules_html = '<p class="note">note: no schedule given; rules not measured.</p>'
    sust_html = rules_html
    if schedule is not None and settings is not None:
        rules = rules_achieved(settings, schedule, pdf, info, harvests=harvests,
                               openings=openings, id_col=id_col)  # fmt: skip
        for rec in rules[rules["check"] == "failed"].to_dict("records"):
            messages.append(f"violation: {rec['rule']}: {rec['achieved']}")
        messages.extend(rules.attrs.get("notes", []))
        rules_html = _rules_html(rules)
        sust = sustainability(settings, schedule, pdf, info, harvests=harvests, id_col=id_col)
        if not np.isfinite(sust["share_of_ltsy_rotation"]):
            messages.append(
                "note: the plan records no LTSY (ltsy_rotation_m3_yr), so the last-period "
                "harvest is not compared with it"
            )
        if not sust["standing_basis"]:
            messages.append("note: the plan records no standing volume")
        sentences = "".join(f"<li>{_esc(s)}</li>" for s in sust["sentences"])
        sust_html = f'<ul class="sust">{sentences}</ul>{_age_table_html(sust["age_classes"], hz)}'
    elif settings is None:
        rules_html = _rules_html(pd.DataFrame())

    settings_block = ""
    if info.get("settings_json"):
        try:
            pretty = json.dumps(json.loads(str(info["settings_json"])), indent=2, sort_keys=True)
        except ValueError:
            pretty = str(info["settings_json"])
        settings_block = (
            f"<details><summary>All settings used</summary><pre>{_esc(pretty)}</pre></details>"
        )
    charts = []
    for cp in chart_paths:
        p = Path(cp)
        if not p.is_file():
            continue
        b64 = base64.b64encode(p.read_bytes()).decode("ascii")
        charts.append(
            f'<figure><img alt="{_esc(p.stem.replace("_", " "))}" '
            f'src="data:image/png;base64,{b64}"></figure>'
        )
    map_link = (
        f'<p class="maplink"><a href="{html.escape(map_href, quote=True)}">Open the map of '
        "harvest periods</a> (works offline)</p>"
        if map_href
        else ""
    )
    lead = f"{hz.P} periods of {hz.L:g} years, {hz.span()}"
    if word:
        lead += f" · independent check: {word}"
    msg_html = "".join(f'<li class="{m.split(":", 1)[0]}">{_esc(m)}</li>' for m in messages)
    cautions_html = "".join(f"<li>{_esc(c)}</li>" for c in cautions)
    period_table = _table(_period_frame(pdf, hz), _PERIOD_COLS, "num periods")
    record = (
        f'<table class="summary">{extra_rows}</table>' if extra_rows else "<p>Nothing more.</p>"
    )
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_esc(title)}</title>
<style>
body{{font:15px/1.45 system-ui,sans-serif;margin:1.5rem auto;max-width:1150px;padding:0 1rem;
color:#222}}
h1{{font-size:1.6rem;margin-bottom:.2rem}} h2{{font-size:1.2rem;margin-top:1.8rem;
border-bottom:1px solid #ccc}}
.lead{{color:#444;margin-top:0}}
table{{border-collapse:collapse;margin:.5rem 0;font-size:.85rem}}
th,td{{border:1px solid #ccc;padding:3px 6px;vertical-align:top}}
thead th{{background:#eef0ec;font-weight:600}} table.num td{{text-align:right}}
.summary th{{text-align:left;background:#f7f7f5;font-weight:600;white-space:nowrap}}
.wide{{overflow-x:auto}} table.periods td:nth-child(2){{white-space:nowrap}}
table.periods th{{font-size:.8rem}}
tr.total td{{font-weight:700;background:#f4f4f0;border-top:2px solid #888}}
.rules td.ok{{color:#1d6b2f;font-weight:600}} .rules td.bad{{color:#a3161b;font-weight:700}}
.rules td.na{{color:#777}}
.msgs{{list-style:none;padding:0}} .msgs li{{padding:2px 8px;margin:2px 0;border-left:4px solid
#999}} .msgs li.violation{{border-color:#a3161b;background:#fbeaea}}
.msgs li.warning{{border-color:#c77c00;background:#fff4e0}}
.msgs li.note{{border-color:#6b8fb3;background:#f1f5f9}}
figure{{margin:1rem 0}} img{{max-width:100%;height:auto;border:1px solid #ddd}}
.cautions{{background:#fff7e6;border:1px solid #e0b050;padding:.6rem 1.2rem}}
.maplink{{font-size:1.1rem}} .note{{color:#555;font-size:.85rem}}
pre{{background:#f7f7f7;padding:.5rem;overflow:auto;font-size:.8rem}}
</style></head>
<body>
<h1>{_esc(title)}</h1>
<p class="lead">{_esc(lead)}</p>
{map_link}
<ul class="msgs">{msg_html}</ul>
<h2>Result</h2>
<table class="summary">{rows}</table>
<h2>Rules in force</h2>
{rules_html}
<h2>Sustainability</h2>
{sust_html}
<h2>Periods</h2>
<div class="wide">{period_table}</div>
<p class="note">Total row: sums over the periods; mean age weighted by net harvest area;
largest opening over all periods. Harvest areas are net of stream buffers; openings are
measured on the gross stand polygons.</p>
<h2>Harvest by stratum</h2>
{_strata_pivot(strata_df, hz)}
<h2>Charts</h2>
{"".join(charts) or "<p>No charts.</p>"}
<h2>Cautions</h2>
<ul class="cautions">{cautions_html}</ul>
<h2>Run record</h2>
{record}
{settings_block}
</body></html>
"""
    write_text_atomic(path, page, "report")
