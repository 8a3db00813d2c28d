"""PNG charts (matplotlib, non-interactive Agg backend): rotation charts and plan charts."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402

__all__: list[str] = []

# Functions are appended below by topic: rotation charts, then plan charts.
_ = plt
