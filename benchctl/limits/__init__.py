"""Spec limits: load a limits file, validate it, evaluate it against a stored run.

A limits file is TOML, read with the standard library's ``tomllib``; nothing in it is
evaluated as code. Loading validates the whole file and reports every problem with
its key (``limit[2].min: must be a number ...``; limits are numbered from 1 in file
order), so one edit fixes them all. The format::

    [spec]                                   # optional
    name = "FB-48S05 rev B"
    description = "36-75 V telecom-input flyback, 5 V / 5 A"

    [[limit]]
    name = "efficiency at half load and above, 48 V"   # required, unique
    quantity = "efficiency"          # required: a result name or a point quantity (column)
    min = 0.86                       # min and/or max, inclusive, in the quantity's stored unit
    where.vin_set_v = 48.0           # optional filter: only these values are checked
    where.load_pct = { min = 50 }    # load in % of the run parameter iout_rated_a
    description = "spec table 3, line 2"               # optional, free text

    [[limit]]
    name = "load regulation within +/-1 %"
    quantity = "load_regulation_pct"
    min = -1.0
    max = 1.0

    [[limit]]
    name = "phase margin at every corner"
    quantity = "phase_margin_deg"
    min = 45.0
    where.vin_set_v = { at = "extremes" }
    where.iout_set_a = { at = "extremes" }
    procedure = "loop_gain"          # only runs of this procedure (a name or a list)
    unit = "deg"                     # optional: refuse to compare if the stored unit differs
    required = true                  # false: advisory, shown but never fails the check
    missing = "fail"                 # what a value that is absent (NaN) does: "fail" | "ignore"
    source = "result"                # "result" | "point"; default: result if one exists
    decision = "guarded"             # "simple" (default) | "guarded": how uncertainty counts

Values. ``quantity`` names a derived result (``store.results``) when the run has a
result of that name, else a column of the run's points (``store.points``); ``source``
forces one. Results are matched on their ``scope`` (``{"vin_set_v": 48.0,
"iout_set_a": 2.5}``); a key missing from a result's scope is looked up in the point
the scope names by ``seq``. Points are matched on their own columns.

Filters (``where.<key> = ...``), all of which must hold:

* a number: equal within a relative 1e-9 (setpoints round-trip through floats);
* a list of numbers: equal to any of them;
* text or true/false: exactly equal (``where.tag = "ascending"``, ``where.settled = true``);
* ``{ min = a, max = b }`` (one or both): inclusive range, with the same 1e-9 slack;
* ``{ at = "min" | "max" | "extremes" }``: the smallest, the largest, or both values of
  that key among all values of the quantity in the run (``extremes`` on line and on
  load selects the four corners of the envelope).

``load_pct`` is 100 x ``iout_set_a`` / ``iout_rated_a`` (the run parameter) unless the
result scope or the points carry a ``load_pct`` of their own; a run without a positive
``iout_rated_a`` leaves such a limit not checked (filter on ``iout_set_a`` in amps then).

Outcome of one limit. Each checked value has a margin to the limit, in the quantity's
unit, positive inside: ``value - min`` and ``max - value`` (the smaller of the two when
both are given). The worst value is the one with the smallest margin (the first such
in stored order); the relative margin is that margin over ``|bound|`` (None when the
bound is 0). The limit passes when every margin is >= 0. A value that is absent (NaN:
a result stored as "not found", or a point quantity not measured at that point) fails
the limit when ``missing = "fail"``, the default for results, and is skipped when
``missing = "ignore"``, the default for point columns (procedures record different
quantities at different points). A limit with no value left to check is *not checked*,
with the reason.

Decision rules (``decision``), after ILAC-G8:09/2019 section 4.2 (clause numbers from
memory). Results may carry an expanded uncertainty U (k = 2, JCGM 100:2008 6.2; column
``expanded_uncertainty`` of ``store.results``):

* ``"simple"`` (the default): simple acceptance, 4.2.1 - the value alone decides, inside
  (margin >= 0) passes. Values within U of a bound are mentioned in the reason only.
* ``"guarded"``: guarded acceptance with a guard band w = U, 4.2.2 / 4.2.3 - a value
  passes only when the whole interval value ± U is inside (margin >= U), fails when the
  whole interval is outside (margin < -U), and is **borderline** otherwise: proven
  neither inside nor outside (4.2.3's "conditional" pass and fail, in one word of ours).
  A value without a stored U cannot be judged this way: the limit is *not checked*,
  with the reason. Point columns carry no U; use the matching result for them.

Verdicts of a limit, the most severe value deciding: ``fail`` (a value fails, or an absent
value with ``missing = "fail"``) > ``not_checked`` > ``borderline`` > ``suspect`` >
``pass``. A value is **suspect** when it would pass but was measured at a point that did
not settle or whose setpoints were not verified (``settled`` false, ``settle_info``), or
its result carries a quality flag (``details["flags"]``: clipped, outside_band,
beyond_standard_range ...): such a value never passes silently. A ``lower_bound`` above
a max, or an ``upper_bound`` below a min, is a definite fail; a ``lower_bound`` at or above
a min of a limit without a max (an ``upper_bound`` under a max, no min) proves a pass when
only the bound is flagged; any other bound is suspect. A quantity that does not exist there (flag ``not_exist``; e.g. no phase
crossover, so no gain margin) is not a missing value: when its result says it is
unbounded (``details["unbounded"] = "above" | "below"``) it is compared as +inf / -inf
(an unbounded gain margin meets any minimum); otherwise it is left out and counted.

Exit code of a check (``benchctl check``), in this order:

1. ``EXIT_FAILED`` (1) when a required limit failed - the measured data violate the
   spec, whatever else is missing;
2. ``EXIT_NOT_CHECKED`` (4) when a required limit could not be checked **or decided**
   (borderline or suspect: conformance is not shown, so 0 would be wrong, and violation
   is not shown, so 1 would be wrong), the run's status is not ``completed`` (running,
   interrupted, tripped, failed: its points are not the whole envelope), or no limit of
   the file applies to the run's procedure;
3. ``EXIT_OK`` (0) otherwise.

So 0 means proven conformance under each limit's own rule; reading a borderline as a
fail gives ILAC-G8's binary guarded rule (4.2.2), reading it as a pass would be simple
acceptance. Advisory limits (``required = false``) and limits for other procedures never
change it. The evaluation of margins is common practice for spec-limit checks.
"""

from __future__ import annotations

from .evaluate import check_limits, evaluate_limit, exit_code_for
from .outcomes import CheckedValue, CheckReport, LimitOutcome, RunContext, RunData
from .spec import (
    BORDERLINE,
    COMPLETED_STATUS,
    DECISIONS,
    FAIL,
    GUARDED,
    SIMPLE,
    STATUSES,
    SUSPECT,
    LOAD_PCT,
    NOT_CHECKED,
    PASS,
    RATED_CURRENT_PARAMETER,
    SOURCE_POINT,
    SOURCE_RESULT,
    Filter,
    LimitsFile,
    LimitSpec,
    load_limits,
    parse_limits,
)

__all__ = [
    "BORDERLINE", "DECISIONS", "GUARDED", "SIMPLE", "STATUSES", "SUSPECT",
    "COMPLETED_STATUS", "FAIL", "LOAD_PCT", "NOT_CHECKED", "PASS", "RATED_CURRENT_PARAMETER", "SOURCE_POINT",
    "SOURCE_RESULT", "CheckReport", "CheckedValue", "Filter", "LimitOutcome", "LimitSpec", "LimitsFile", "RunContext",
    "RunData", "check_limits", "evaluate_limit", "exit_code_for", "load_limits", "parse_limits",
]
