"""An independent check of a harvest plan against every rule.

Verify is a second, plain code path: it reads the plan file, measures adjacency from the
geometry, reads the yield table, evaluates growth, ages, openings, volumes and values with
its own code, and shares only the settings and the file format with the planner. The
modules inside are the parts of that one job:

* ``planfile`` - read the schedule layer, the recorded run and a ``harvests`` table;
* ``geometry`` - stand areas and its own shared-boundary measure;
* ``yields`` - its own reading of the yield table and growth curves;
* ``events`` - harvests as (stand, period) events, regrowth, who is open when;
* ``values`` - its own volume and value arithmetic;
* ``rules`` - the rule checks;
* ``check`` - :func:`verify_schedule`, which runs them in turn;
* ``report`` - :class:`Violation` and :class:`VerifyReport`.
"""

from spatialplan.verify.check import verify_schedule
from spatialplan.verify.planfile import read_harvests, read_plan
from spatialplan.verify.report import VerifyReport, Violation

__all__ = ["VerifyReport", "Violation", "read_harvests", "read_plan", "verify_schedule"]
