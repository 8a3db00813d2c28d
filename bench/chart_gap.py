"""Chart of plan NPV and best proven bound against seconds, from benchmark results.

Usage::

    python bench/chart_gap.py results.jsonl [more.jsonl ...] --out docs/landscape_gap_over_time.png

Reads the JSON lines printed by ``bench_schedule.py`` and ``bench_estate.py`` (each carries
a ``trace`` of ``[seconds, plan NPV, best proven bound]`` at every improvement) and draws
one panel per run: the plan and the bound as shares of the run's aspatial LP bound, so the
gap is the distance between the two lines.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path


def load(paths: list[Path]) -> list[dict]:
    """Every result line holding a trace."""
    runs = []
    for p in paths:
        for line in p.read_text().splitlines():
            line = line.strip()
            if not line.startswith("{"):
                continue
            r = json.loads(line)
            if r.get("trace"):
                runs.append(r)
    return runs


def chart(runs: list[dict], out: Path) -> None:
    """One panel per run: plan NPV / LP and best bound / LP against seconds (step lines)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(len(runs), 1, figsize=(8, 2.6 * len(runs)), squeeze=False)
    for ax, r in zip(axes[:, 0], runs, strict=True):
        lp = float(r["lp_bound"])
        limit = float(r["time_limit_s"])
        tr = r["trace"]
        t = [x[0] for x in tr] + [limit]
        v = [x[1] / lp for x in tr] + [tr[-1][1] / lp]
        b = [x[2] / lp for x in tr] + [tr[-1][2] / lp]
        ax.step(t, v, where="post", label="plan NPV")
        ax.step(t, b, where="post", color="black", linestyle="--", label="best proven bound")
        model = f"{r['periods']} periods, re-harvest" if "periods" in r else "single harvest"
        gap = (tr[-1][2] - tr[-1][1]) / tr[-1][2]
        ax.set_title(
            f"{r['stands']:,} stands, seed {r['seed']}, {model}: gap {gap:.2%} at {limit:g} s",
            fontsize=9,
        )
        ax.set_xlim(0, limit)
        ax.set_ylim(max(0.8, min(v[1:] or v) - 0.01), 1.005)
        ax.set_ylabel("share of aspatial LP")
        ax.legend(fontsize=7, loc="lower right")
    axes[-1, 0].set_xlabel("seconds")
    fig.tight_layout()
    fig.savefig(out, dpi=100)
    plt.close(fig)


def main(argv: list[str] | None = None) -> None:
    """Command-line entry."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("results", type=Path, nargs="+")
    ap.add_argument("--out", type=Path, required=True)
    a = ap.parse_args(argv)
    chart(load(a.results), a.out)


if __name__ == "__main__":
    main()
