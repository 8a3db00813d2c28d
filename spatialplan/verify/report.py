"""What verify found: one :class:`Violation` per broken rule, gathered in a :class:`VerifyReport`."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

__all__ = ["VerifyReport", "Violation"]

#: at most this many stand ids are printed on one line; the report holds all of them
_MAX_IDS_SHOWN = 12


@dataclass(frozen=True)
class Violation:
    """One broken rule (or one pre-existing condition).

    Attributes
    ----------
    rule
        ``max_opening``, ``green_up``, ``unit_restriction``, ``min_age``, ``reserve``,
        ``reharvest``, ``period_range``, ``inoperable``, ``even_flow``, ``non_declining``,
        ``volume_min``, ``volume_max``, ``area_min``, ``area_max``, ``ending_volume``,
        ``ending_age``, ``old_forest``, ``recorded_age``, ``recorded_volume``,
        ``recorded_value``, ``recorded_ending_value`` or ``recorded_npv``.
    period
        Planning period (1-based) or ``None`` for whole-horizon rules.
    stand_ids
        Stands involved.
    value
        The measured size (ha, m3, years, period number).
    limit
        The limit it is compared with.
    message
        One plain sentence.
    """

    rule: str
    period: int | None
    stand_ids: tuple[str, ...]
    value: float | None
    limit: float | None
    message: str

    def line(self) -> str:
        """One printable line."""
        per = f"period {self.period}" if self.period is not None else "horizon"
        shown = ",".join(self.stand_ids[:_MAX_IDS_SHOWN])
        if len(self.stand_ids) > _MAX_IDS_SHOWN:
            shown += f",... ({len(self.stand_ids)} stands)"
        ids_part = f" stands {shown}" if shown else ""
        return f"{self.rule} {per}{ids_part}: {self.message}"


@dataclass(frozen=True, eq=False)
class VerifyReport:
    """What :func:`~spatialplan.verify.verify_schedule` found.

    Attributes
    ----------
    violations
        Broken rules; empty when the schedule is legal.
    preexisting
        Conditions over a limit at the start with no harvest of the plan in them.
    notes
        Other remarks (geometry repairs, conversions, checks that could not be made).
    openings
        Every opening of every period: ``period``, ``opening``, ``stand_count``,
        ``gross_area_ha``, ``new_harvest_gross_ha`` (gross area cut in that period),
        ``stand_ids`` (comma-separated), ``positions``.
    periods
        Per period (the names of the plan's ``periods`` table): ``period``,
        ``harvest_volume_m3``, ``harvest_net_area_ha``, ``stands_harvested`` (harvests),
        ``largest_opening_ha`` (gross, measured), ``old_forest_share`` (NaN when the
        rule is off).
    n_stands, n_periods
        Size of the checked schedule.
    rules_checked
        Names of the rules that were checked.
    """

    violations: list[Violation]
    preexisting: list[Violation]
    notes: list[str]
    openings: pd.DataFrame
    periods: pd.DataFrame
    n_stands: int
    n_periods: int
    rules_checked: tuple[str, ...] = field(default_factory=tuple)

    @property
    def ok(self) -> bool:
        """True when every rule holds."""
        return not self.violations

    @property
    def verdict(self) -> str:
        """One line: ``passed: ...`` or ``failed: ...`` with counts per rule."""
        pre = (
            f"; {len(self.preexisting)} pre-existing condition(s) noted" if self.preexisting else ""
        )
        if self.ok:
            return (
                f"passed: all rules hold for {self.n_stands} stands over {self.n_periods} "
                f"periods ({', '.join(self.rules_checked)}){pre}"
            )
        counts: dict[str, int] = {}
        for v in self.violations:
            counts[v.rule] = counts.get(v.rule, 0) + 1
        parts = ", ".join(f"{k} {c}" for k, c in counts.items())
        return f"failed: {len(self.violations)} violation(s) ({parts}){pre}"

    def to_frame(self) -> pd.DataFrame:
        """Violations and pre-existing conditions as one table (column ``kind``)."""
        rows = [
            {
                "kind": kind,
                "rule": v.rule,
                "period": v.period,
                "stand_ids": ",".join(v.stand_ids),
                "value": v.value,
                "limit": v.limit,
                "message": v.message,
            }
            for kind, items in (("violation", self.violations), ("preexisting", self.preexisting))
            for v in items
        ]
        cols = ["kind", "rule", "period", "stand_ids", "value", "limit", "message"]
        return pd.DataFrame(rows, columns=cols)
