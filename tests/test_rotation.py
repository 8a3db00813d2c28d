"""spatialplan.rotation: rotation ages from the growth inputs, CSV and charts."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from spatialplan.errors import InputError, OutputError
from spatialplan.rotation import rotation_table, write_rotation
from spatialplan.settings import load_settings
from spatialplan.synthetic import synthetic_yield_table

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)

A, K, C_SHAPE = 600.0, 0.025, 2.8
PRICE, RATE, REGEN = 35.0, 0.02, 900.0


def cr_settings():
    return load_settings(
        None,
        {
            "economics.price_per_m3": PRICE,
            "economics.discount_rate": RATE,
            "economics.regeneration_cost_per_ha": REGEN,
            "growth.chapman_richards": {"PP": {"A": A, "k": K, "c": C_SHAPE}},
        },
    )


def test_parametric_stratum_matches_brute_force_rules() -> None:
    df = rotation_table(None, cr_settings(), max_age=200)
    row = df.set_index("stratum").loc["PP"]
    # Brute force on the 1-year grid, straight from the published rules:
    t = np.arange(1, 201, dtype=float)
    v = A * (1 - np.exp(-K * t)) ** C_SHAPE  # Chapman-Richards (Richards 1959)
    s = PRICE * v
    g = (1 + RATE) ** t
    lev = (s - REGEN * g) / (g - 1)  # Faustmann (1849), regeneration cost at each start
    assert row["mai_max_age"] == t[np.argmax(v / t)]  # culmination of MAI
    assert row["fisher_age"] == t[np.argmax(s / g)]  # single rotation (Fisher 1930)
    assert row["faustmann_age"] == t[np.argmax(lev)]
    assert row["lev_per_ha"] == pytest.approx(lev.max(), rel=1e-12)
    assert row["value_mai_max_age"] == t[np.argmax((s - REGEN) / t)]  # forest rent
    # Faustmann is never longer than Fisher (common practice, no source: textbook result).
    assert row["faustmann_age"] <= row["fisher_age"]


def test_no_growth_inputs_is_an_error() -> None:
    with pytest.raises(InputError, match="--yields"):
        rotation_table(None, load_settings(None, {"economics.price_per_m3": 30.0}))


def test_write_rotation_csv_charts_and_output_policy(tmp_path: Path) -> None:
    yields = tmp_path / "yields.csv"
    synthetic_yield_table(["S1", "S2"], max_age=120).to_csv(yields, index=False)
    s = load_settings(None, {"economics.price_per_m3": 40.0})
    out = tmp_path / "rot.csv"
    done = write_rotation(yields, s, out, max_age=150)
    csv = pd.read_csv(out)
    assert csv["stratum"].tolist() == ["S1", "S2"]
    np.testing.assert_allclose(csv["lev_per_ha"], done.table["lev_per_ha"], rtol=1e-5)
    assert sorted(p.name for p in done.charts.values()) == ["rot_S1.png", "rot_S2.png"]
    assert all(p.read_bytes()[:8] == PNG_MAGIC for p in done.charts.values())
    # Nothing is replaced without overwrite; the input is never an output.
    before = out.read_bytes()
    with pytest.raises(OutputError, match="--overwrite"):
        write_rotation(yields, s, out, max_age=150)
    out.unlink()
    with pytest.raises(OutputError, match=r"chart .*rot_S1.png exists \(2 in all\)"):
        write_rotation(yields, s, out, max_age=150)
    assert not out.exists()
    with pytest.raises(OutputError, match="same file as input"):
        write_rotation(yields, s, yields, overwrite=True)
    done = write_rotation(yields, s, out, max_age=150, overwrite=True, charts=False)
    assert out.read_bytes() == before and done.charts == {} and done.chart_dir is None
