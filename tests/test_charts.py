"""Plan charts: age classes at the start, middle and end, LTSY lines, value chart labels."""

from __future__ import annotations

import math

import numpy as np
import pytest
from matplotlib.image import imread

from spatialplan import charts
from tests.plan_frames import DELAY, START, L, P, estate_plan, estate_settings

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)


def ages_by_loop(ep, t: float) -> np.ndarray:
    """Age of each stand t years after the start, one stand and one harvest at a time
    (after a mid-period cut the crop is age 0 ``delay`` years later; docs/architecture.md,
    "Timing"; common practice, no source)."""
    out = []
    for sid, age0 in zip(ep.schedule["stand_id"], ep.schedule["age"], strict=True):
        age = age0 + t
        for q in ep.harvests.loc[ep.harvests["stand_id"] == sid, "period"]:
            if (q - 0.5) * L <= t:
                age = max(t - (q - 0.5) * L - DELAY, 0.0)
        out.append(age)
    return np.array(out)


@pytest.mark.parametrize("width", [10.0, 5.0, 7.5])
def test_age_class_table_against_a_loop(width):
    ep = estate_plan()
    s = estate_settings(**{"output.age_class_width_yr": width})
    got = charts.age_class_table(ep.schedule, s, ep.harvests)
    gross = ep.schedule["area_ha"].to_numpy()
    ages = [ages_by_loop(ep, t) for t in (0.0, P * L / 2, P * L)]
    n = math.floor(max(a.max() for a in ages) / width) + 1
    assert len(got) == min(n, charts.MAX_AGE_CLASSES)
    for col, a in zip(("area_start_ha", "area_mid_ha", "area_end_ha"), ages, strict=True):
        want = np.zeros(len(got))
        for age, area in zip(a, gross, strict=True):
            want[min(int(age // width), len(got) - 1)] += area
        np.testing.assert_allclose(got[col], want)
        assert got[col].sum() == pytest.approx(gross.sum())  # every stand in one class
    np.testing.assert_allclose(got["from_yr"], np.arange(len(got)) * width)
    if width == 10.0:
        assert got["age_class"].iloc[:2].tolist() == ["0–9", "10–19"]


def test_age_classes_without_harvests_table_use_the_first_period():
    ep = estate_plan()
    first = ep.harvests[ep.harvests["harvest"] == 1]
    sched = ep.schedule.drop(columns=["harvest_periods"])
    got = charts.age_class_table(sched, ep.settings)  # one harvest per stand, from `period`
    want = charts.age_class_table(sched, ep.settings, first)
    np.testing.assert_allclose(
        got[["area_mid_ha", "area_end_ha"]], want[["area_mid_ha", "area_end_ha"]]
    )


@pytest.fixture
def figures(monkeypatch):
    """The figures plan_charts makes, kept open (``_save`` still writes the PNG)."""
    kept = {}
    real = charts._save

    def keep(fig, path):
        fig.canvas.draw()
        kept[path.name] = {
            "size_px": fig.get_size_inches() * 110,
            "axes": [
                {
                    "ylim": ax.get_ylim(),
                    "box": ax.get_window_extent(),
                    "lines": {ln.get_label(): ln for ln in ax.get_lines()},
                    "bars": [list(c) for c in ax.containers],
                    "texts": [t.get_text() for t in ax.texts],
                }
                for ax in fig.axes
            ],
            "legends": [(lg, [t.get_text() for t in lg.get_texts()]) for lg in fig.legends],
        }
        return real(fig, path)

    monkeypatch.setattr(charts, "_save", keep)
    return kept


def test_plan_charts(tmp_path, figures):
    ep = estate_plan()
    paths = charts.plan_charts(ep.periods, ep.schedule, ep.settings, tmp_path,
                               harvests=ep.harvests, run_info=ep.run_info)  # fmt: skip
    assert [p.name for p in paths] == ["harvest_flow.png", "age_classes.png", "npv_by_period.png"]
    for p in paths:
        assert p.read_bytes()[:8] == PNG_MAGIC
        img = imread(p)
        w, h = figures[p.name]["size_px"]
        # figure size x 110 dpi (matplotlib rounds a fractional pixel either way)
        assert abs(img.shape[0] - h) < 1 and abs(img.shape[1] - w) < 1
        assert img[:, :, :3].std() > 0.05  # not blank

    # Harvest flow: the LTSY per period (per year x L) as horizontal lines.
    flow = figures["harvest_flow.png"]
    lines = flow["axes"][0]["lines"]
    for key, words in (("ltsy_rotation_m3_yr", "LTSY at the economic rotation"),
                       ("ltsy_mai_m3_yr", "LTSY at MAI culmination")):  # fmt: skip
        per_period = float(ep.run_info[key]) * L
        line = lines[f"{words}: {per_period:,.0f} m³ per period"]
        np.testing.assert_allclose(line.get_ydata(), per_period / 1000.0)
    last = ep.periods["harvest_volume_m3"].iloc[-1]
    share = last / (float(ep.run_info["ltsy_rotation_m3_yr"]) * L)
    assert f"{100 * share:.0f} % of LTSY\n(economic rotation)" in flow["axes"][0]["texts"]
    assert flow["axes"][1]["ylim"][1] > ep.periods["harvest_net_area_ha"].max()

    # Age classes: three series with the areas of age_class_table and calendar years.
    age = figures["age_classes.png"]
    table = charts.age_class_table(ep.schedule, ep.settings, ep.harvests)
    heights = [[b.get_height() for b in c] for c in age["axes"][0]["bars"]]
    for h, col in zip(heights, ("area_start_ha", "area_mid_ha", "area_end_ha"), strict=True):
        np.testing.assert_allclose(h, table[col])
    labels = age["legends"][0][1]
    assert [t for t in labels if " of the plan " in t] == [
        f"Start of the plan ({START})",
        f"Middle of the plan ({START + P * L / 2:g})",
        f"End of the plan ({START + P * L:g})",
    ]
    # The minimum harvest age as a line between the classes it separates (25 yr: the
    # class 20-29 spans x = 1.5 .. 2.5 with 10-year classes, so 25 years is at x = 2).
    line = age["axes"][0]["lines"]["Minimum harvest age (25 years)"]
    np.testing.assert_allclose(line.get_xdata(), 25.0 / 10.0 - 0.5)

    # Value chart: gross value named as such, inside its axes, legend clear of the axes.
    val = figures["npv_by_period.png"]
    gross_label = "Gross value, undiscounted (volume x price, before costs)"
    top = val["axes"][0]
    gross = top["lines"][gross_label]
    y = np.asarray(gross.get_ydata(), float)
    lo, hi = top["ylim"]
    assert lo <= y.min() and y.max() < hi
    np.testing.assert_allclose(y, ep.periods["gross_value"] / 1000.0)
    labels = [t for _lg, texts in val["legends"] for t in texts]
    assert gross_label in labels
    assert not [t for t in labels if "net value" in t.lower()]
    for lg, _texts in val["legends"]:
        box = lg.get_window_extent()
        assert not any(box.overlaps(ax["box"]) for ax in val["axes"])
    # The running total ends at the plan NPV (period values plus the ending value).
    running = val["axes"][1]["lines"]["NPV, running total"]
    want = ep.periods["npv"].sum() + float(ep.run_info["ending_value_npv"])
    assert running.get_ydata()[-1] * 1000.0 == pytest.approx(want)
    assert want == pytest.approx(ep.schedule["npv"].sum())
