"""One-page HTML report of a plan, and the bundle of review files (map, charts, report).

The report is self-contained: charts are embedded as base64 PNG, so the page can be
handed over as one file; the map is linked by a relative path. Every value is escaped.
"""

from __future__ import annotations

import base64
import html
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatialplan._io import write_text_atomic

__all__ = ["CAUTIONS", "review_paths", "write_report", "write_review_files"]

CAUTIONS: tuple[str, ...] = (
    "This plan is a planning aid. It does not replace field checks, the forest practice "
    "law and permits that apply where the forest is, or the judgement of a licensed "
    "or registered forester.",
    "Yields, prices, costs and growth are the inputs' estimates; the plan is only as good "
    "as they are.",
    "Slope, operability and net-area outputs are estimates from the elevation model and "
    "stream data given; check them on the ground before laying out a harvest.",
    "Openings are judged from the stand polygons and the adjacency rule chosen; local "
    "rules may measure openings or green-up differently.",
)

# Run-summary rows shown first, in this order, when present: (key in run_info, label).
_SUMMARY = (
    ("npv", "Net present value (NPV)"),
    ("cpsat_bound", "Solver bound (CP-SAT)"),
    ("lp_bound", "Upper bound without spatial rules (LP)"),
    ("gap", "Gap to the tighter bound"),
    ("solver_status", "Solver status"),
    ("verify_verdict", "Independent check (verify)"),
    ("solve_time_s", "Solve time (s)"),
    ("stands_path", "Stand layer"),
    ("stands_sha256", "Stand layer SHA-256"),
    ("yields_path", "Yield table"),
    ("yields_sha256", "Yield table SHA-256"),
    ("spatialplan_version", "spatialplan version"),
)

_HIDDEN = {"settings_json", "yields_csv"}  # long texts kept in the GeoPackage, not the page

_PERIOD_COLS = (
    ("period", "Period", 0),
    ("mid_yr", "Mid-period (yr)", 1),
    ("harvest_area_ha", "Area (ha)", 1),
    ("harvest_volume_m3", "Volume (m³)", 0),
    ("flow_lower_m3", "Flow min (m³)", 0),
    ("flow_upper_m3", "Flow max (m³)", 0),
    ("gross_value", "Undiscounted value", 0),
    ("discounted_value", "Discounted value", 0),
    ("mean_age_at_harvest_yr", "Mean age at harvest (yr)", 1),
    ("stands_harvested", "Stands", 0),
    ("opening_count", "Openings", 0),
    ("largest_opening_ha", "Largest opening (ha)", 1),
)


def _fmt_value(key: str, v: Any) -> str:
    """Numbers in the summary: gap as percent, money without decimals, else as given."""
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not np.isfinite(x):
        return str(v)
    if key == "gap":
        return f"{100.0 * x:.2f} %"
    if key in ("npv", "cpsat_bound", "lp_bound"):
        return f"{x:,.0f}"
    if key == "solve_time_s":
        return f"{x:,.1f}"
    return str(v)


def _num(v: Any, digits: int) -> str:
    if isinstance(v, bool | np.bool_):
        return "yes" if v else "no"
    try:
        x = float(v)
    except (TypeError, ValueError):
        return "" if v is None else str(v)
    if not np.isfinite(x):
        return "–"
    return f"{x:,.{digits}f}"


def _table(frame: pd.DataFrame, cols: Sequence[tuple[str, str, int]], cls: str = "") -> str:
    use = [(c, lbl, d) for c, lbl, d in cols if c in frame.columns]
    head = "".join(f"<th>{html.escape(lbl)}</th>" for _c, lbl, _d in use)
    body = []
    for rec in frame.to_dict("records"):
        tds = "".join(f"<td>{html.escape(_num(rec[c], d))}</td>" for c, _l, d in use)
        body.append(f"<tr>{tds}</tr>")
    return (
        f'<table class="{cls}"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'
    )


def _strata_pivot(strata_df: pd.DataFrame) -> str:
    """Strata as rows, periods as columns: harvested volume (m³) / area (ha) per cell."""
    if strata_df is None or not len(strata_df):
        return "<p>No strata.</p>"
    vol = strata_df.pivot_table(index="stratum", columns="period", values="harvest_volume_m3",
                                aggfunc="sum", fill_value=0.0)  # fmt: skip
    area = strata_df.pivot_table(index="stratum", columns="period", values="harvest_area_ha",
                                 aggfunc="sum", fill_value=0.0)  # fmt: skip
    periods = list(vol.columns)
    head = "<th>Stratum</th>" + "".join(f"<th>P{int(p)}</th>" for p in periods) + "<th>Total</th>"
    rows = []
    for s in vol.index:
        cells = "".join(
            f"<td>{html.escape(_num(vol.loc[s, p], 0))}<br><small>"
            f"{html.escape(_num(area.loc[s, p], 1))} ha</small></td>"
            for p in periods
        )
        tot = (f"<td><b>{html.escape(_num(vol.loc[s].sum(), 0))}</b><br><small>"
               f"{html.escape(_num(area.loc[s].sum(), 1))} ha</small></td>")  # fmt: skip
        rows.append(f"<tr><th>{html.escape(str(s))}</th>{cells}{tot}</tr>")
    return (
        '<table class="num"><thead><tr>'
        + head
        + "</tr></thead><tbody>"
        + "".join(rows)
        + '</tbody></table><p class="note">Cells: harvested volume (m³) and area.</p>'
    )


def write_report(
    path: str | Path,
    run_info: Mapping[str, Any],
    periods_df: pd.DataFrame,
    strata_df: pd.DataFrame,
    chart_paths: Sequence[str | Path],
    map_href: str | None,
    cautions: Sequence[str] = CAUTIONS,
) -> None:
    """Write the one-page HTML report.

    Parameters
    ----------
    path
        Target ``.html`` (written atomically).
    run_info
        Run facts (the ``run`` table as a dict): ``npv``, ``cpsat_bound``, ``lp_bound``,
        ``gap``, ``solver_status``, ``verify_verdict`` ... Unknown keys are listed too,
        except long texts (``settings_json``, ``yields_csv``).
    periods_df, strata_df
        Frames from :func:`spatialplan.outputs.period_table` / ``strata_table``.
    chart_paths
        PNGs to embed (base64), in order.
    map_href
        Link to the map, relative to the report (``None``: no link).
    cautions
        Cautions listed at the end.
    """
    path = Path(path)
    info = dict(run_info)
    title = str(info.get("title") or f"Harvest plan: {path.name.removesuffix('.report.html')}")
    summary = []
    for key, label in _SUMMARY:
        if key in info and str(info[key]) != "":
            summary.append((label, _fmt_value(key, info[key])))
    shown = {k for k, _ in _SUMMARY} | _HIDDEN | {"title"}
    extra = [(k, str(v)) for k, v in info.items() if k not in shown and str(v) != ""]
    rows = "".join(
        f"<tr><th>{html.escape(lbl)}</th><td>{html.escape(val)}</td></tr>" for lbl, val in summary
    )
    extra_rows = "".join(
        f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>" for k, v in extra
    )
    settings_block = ""
    if info.get("settings_json"):
        try:
            pretty = json.dumps(json.loads(str(info["settings_json"])), indent=2, sort_keys=True)
        except ValueError:
            pretty = str(info["settings_json"])
        settings_block = (
            "<details><summary>All settings used</summary>"
            f"<pre>{html.escape(pretty)}</pre></details>"
        )
    charts = []
    for cp in chart_paths:
        p = Path(cp)
        if not p.is_file():
            continue
        b64 = base64.b64encode(p.read_bytes()).decode("ascii")
        charts.append(
            f'<figure><img alt="{html.escape(p.stem.replace("_", " "))}" '
            f'src="data:image/png;base64,{b64}"></figure>'
        )
    map_link = (
        f'<p class="maplink"><a href="{html.escape(map_href, quote=True)}">Open the map of '
        "harvest periods</a> (works offline)</p>"
        if map_href
        else ""
    )
    cautions_html = "".join(f"<li>{html.escape(c)}</li>" for c in cautions)
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{html.escape(title)}</title>
<style>
body{{font:15px/1.45 system-ui,sans-serif;margin:2rem auto;max-width:1100px;padding:0 1rem;
color:#222}}
h1{{font-size:1.6rem;margin-bottom:.2rem}} h2{{font-size:1.2rem;margin-top:2rem;
border-bottom:1px solid #ccc}}
table{{border-collapse:collapse;margin:.5rem 0;font-size:.9rem}}
th,td{{border:1px solid #ccc;padding:3px 7px;vertical-align:top}}
thead th{{background:#f2f2f2}} table.num td{{text-align:right}} .summary th{{text-align:left;
background:#f7f7f7}}
figure{{margin:1rem 0}} img{{max-width:100%;height:auto;border:1px solid #ddd}}
.cautions{{background:#fff7e6;border:1px solid #e0b050;padding:.6rem 1.2rem}}
.maplink{{font-size:1.1rem}} .note{{color:#555;font-size:.85rem}}
pre{{background:#f7f7f7;padding:.5rem;overflow:auto;font-size:.8rem}}
</style></head>
<body>
<h1>{html.escape(title)}</h1>
{map_link}
<h2>Run summary</h2>
<table class="summary">{rows}</table>
<h2>Periods</h2>
{_table(periods_df, _PERIOD_COLS, "num")}
<h2>Harvest by stratum</h2>
{_strata_pivot(strata_df)}
<h2>Charts</h2>
{"".join(charts) or "<p>No charts.</p>"}
<h2>Cautions</h2>
<ul class="cautions">{cautions_html}</ul>
<h2>Run record</h2>
<table class="summary">{extra_rows}</table>
{settings_block}
</body></html>
"""
    write_text_atomic(path, page, "report")


def review_paths(gpkg: str | Path, out_html: str | Path | None = None) -> dict[str, Path]:
    """Default paths beside ``NAME.gpkg``: ``map`` NAME.map.html, ``report``
    NAME.report.html, ``charts`` NAME_charts/ (``out_html`` overrides the map path)."""
    g = Path(gpkg)
    stem = g.with_suffix("")
    return {
        "map": Path(out_html) if out_html else stem.with_name(stem.name + ".map.html"),
        "report": stem.with_name(stem.name + ".report.html"),
        "charts": stem.with_name(stem.name + "_charts"),
    }


def write_review_files(
    gpkg: str | Path,
    schedule: Any,
    openings: Any,
    periods_df: pd.DataFrame,
    strata_df: pd.DataFrame,
    run_info: Mapping[str, Any],
    settings: Any,
    *,
    out_html: str | Path | None = None,
    basemap: str | None = None,
    id_col: str = "stand_id",
    stratum_col: str = "stratum",
    reserve_col: str | None = "reserve",
    title: str | None = None,
    cautions: Sequence[str] = CAUTIONS,
) -> dict[str, Any]:
    """Write the map, the charts and the report that go with a plan GeoPackage.

    Used by ``spatialplan plan`` (after the GeoPackage is written) and ``spatialplan map``.

    Returns
    -------
    dict
        ``map``, ``report`` (paths), ``charts`` (list of PNG paths).
    """
    from spatialplan.charts import plan_charts
    from spatialplan.mapping import write_map
    from spatialplan.outputs import _get

    paths = review_paths(gpkg, out_html)
    P = int(_get(settings, "horizon.periods", len(periods_df)))
    name = title or f"Harvest plan: {Path(gpkg).stem}"
    age_col = str(_get(settings, "fields.age_field", "age"))
    write_map(schedule, openings, paths["map"], id_col=id_col, stratum_col=stratum_col,
              reserve_col=reserve_col, periods=P, title=name, basemap=basemap,
              age_col=age_col if age_col in schedule.columns else "age")  # fmt: skip
    charts = plan_charts(periods_df, schedule, settings, paths["charts"])
    href = os.path.relpath(paths["map"].resolve(), paths["report"].resolve().parent)
    info = {"title": name, **dict(run_info)}
    write_report(
        paths["report"], info, periods_df, strata_df, charts, Path(href).as_posix(), cautions
    )
    return {"map": paths["map"], "report": paths["report"], "charts": charts}
