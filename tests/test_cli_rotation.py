"""End-to-end test of ``spatialplan rotation`` through click's CliRunner."""

from __future__ import annotations

import pandas as pd
import pytest
from click.testing import CliRunner

from spatialplan.cli import cli
from spatialplan.economics import rotation_table
from spatialplan.growth import build_growth_model, load_yield_table
from spatialplan.settings import Economics, GrowthSettings, Settings, YieldColumns
from spatialplan.synthetic import synthetic_yield_table

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG file signature (ISO/IEC 15948, section 5.2)
COLUMNS = [
    "mai_max_age",
    "mai_max_m3_ha_yr",
    "value_mai_max_age",
    "fisher_age",
    "faustmann_age",
    "lev_per_ha",
]


@pytest.fixture
def yields(tmp_path):
    df = synthetic_yield_table(["DF/II", "HW/I"], max_age=120)
    df[["species", "site"]] = df["stratum"].str.split("/", expand=True)
    p = tmp_path / "yields.csv"
    df[["species", "site", "age", "volume", "diameter"]].to_csv(p, index=False)
    return p


def test_rotation_writes_csv_and_charts(tmp_path, yields):
    out = tmp_path / "rotation.csv"
    args = [
        "rotation",
        "--yields",
        str(yields),
        "--yield-keys",
        "species,site",
        "--discount-rate",
        "0.03",
        "--price",
        "40",
        "--regeneration-cost",
        "1200",
        "--out",
        str(out),
    ]
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 0, res.output
    df = pd.read_csv(out, dtype={"site": str})
    assert list(df.columns[:3]) == ["species", "site", "stratum"]
    assert set(COLUMNS) <= set(df.columns)
    assert df["stratum"].tolist() == ["DF/II", "HW/I"]
    # the CSV holds what the library computes for the same inputs
    tab = load_yield_table(yields, ["species", "site"], YieldColumns())
    g = build_growth_model(tab, GrowthSettings(), ["species", "site"])
    st = Settings(
        economics=Economics(discount_rate=0.03, price_per_m3=40.0, regeneration_cost_per_ha=1200.0)
    )
    ref = rotation_table(g, g.strata, st)
    for c in COLUMNS:
        assert df[c].tolist() == pytest.approx(ref[c].tolist(), rel=1e-5)
    charts = sorted((tmp_path / "rotation_charts").glob("*.png"))
    assert [p.name for p in charts] == ["rotation_DF_II.png", "rotation_HW_I.png"]
    for p in charts:
        assert p.read_bytes()[:8] == PNG_MAGIC
        assert p.stat().st_size > 20_000  # a real figure, not an empty canvas

    # a second run refuses to overwrite without --overwrite, then succeeds with it
    res2 = CliRunner().invoke(cli, args)
    assert res2.exit_code != 0
    assert "--overwrite" in str(res2.exception) + res2.output
    res3 = CliRunner().invoke(cli, [*args, "--overwrite", "--no-charts"])
    assert res3.exit_code == 0, res3.output


def test_rotation_without_price_names_the_setting(tmp_path, yields, capsys):
    from spatialplan.cli import main

    out = tmp_path / "r.csv"
    with pytest.raises(SystemExit) as ei:
        main(
            ["rotation", "--yields", str(yields), "--yield-keys", "species,site", "--out", str(out)]
        )
    assert ei.value.code == 1
    assert "economics.price_per_m3" in capsys.readouterr().err
    assert not out.exists()


def test_rotation_price_schedule_from_settings(tmp_path, yields):
    toml = tmp_path / "s.toml"
    toml.write_text(
        "[fields]\nyield_keys = ['species', 'site']\n"
        "[economics]\ndiscount_rate = 0.025\n"
        "[[economics.price_schedule]]\nproduct = 'pulp'\nmin_diameter_cm = 0\nprice_per_m3 = 18\n"
        "[[economics.price_schedule]]\nproduct = 'saw'\nmin_diameter_cm = 25\nprice_per_m3 = 70\n",
        encoding="utf-8",
    )
    out = tmp_path / "r.csv"
    res = CliRunner().invoke(
        cli, ["rotation", "--yields", str(yields), "--settings", str(toml), "--out", str(out)]
    )
    assert res.exit_code == 0, res.output
    df = pd.read_csv(out)
    assert (df["lev_per_ha"] > 0).all()
    assert (df["faustmann_age"] <= df["fisher_age"]).all()


def test_rotation_parametric_strata_only(tmp_path):
    # Chapman-Richards strata from settings; exact MAI culmination from e^x - 1 = c x
    # (derivation in docs/methods.md), checked against scipy.special.lambertw.
    import math

    from scipy.special import lambertw

    toml = tmp_path / "cr.toml"
    toml.write_text(
        "[economics]\nprice_per_m3 = 35\ndiscount_rate = 0.02\n"
        "[growth.chapman_richards.PP]\nA = 600\nk = 0.025\nc = 2.8\n",
        encoding="utf-8",
    )
    out = tmp_path / "cr.csv"
    res = CliRunner().invoke(
        cli, ["rotation", "--settings", str(toml), "--out", str(out), "--no-charts"]
    )
    assert res.exit_code == 0, res.output
    df = pd.read_csv(out)
    c = 2.8
    x = float((-lambertw(-math.exp(-1 / c) / c, k=-1)).real - 1 / c)
    assert df.loc[0, "stratum"] == "PP"
    assert df.loc[0, "mai_max_age_exact"] == pytest.approx(x / 0.025, rel=1e-5)
    assert abs(df.loc[0, "mai_max_age"] - x / 0.025) <= 1.0
    assert not (tmp_path / "cr_charts").exists()
