"""Jobs: several procedures run in order on one station, each a run of its own.

A job file is TOML (data only; nothing in it is evaluated)::

    [job]
    name = "nightly FB-48S05 rev B"
    dut_part = "FB-48S05"            # optional defaults for every step
    dut_revision = "B"
    dut_serials = ["0007", "0008", "0011"]   # or dut_serial = "0007" for one unit
    unit_change = "operator"         # how the next unit gets connected (see benchctl.job_units)
    switch_channels = [1, 2, 5]      # with a switch matrix: the channel of each serial (default 1, 2, 3 ...)

    [[step]]
    procedure = "efficiency_map"     # bundled name or a path (relative to the job file)
    params = "flyback.toml"          # optional parameter file (relative to the job file)
    limits = "limits.toml"           # optional spec limits checked after the run
    [step.parameters]                # optional inline values (override the file's)
    vin_v = [36.0, 48.0, 75.0]

Every step becomes a run with the same ``job_id``, for each unit in turn (all steps of the
first unit, then of the next: one change of unit each); ``benchctl job --dut-serial A,B,C``
gives the units on the command line instead. The job's exit code is 0 only when every run
completed and every limit passed (otherwise the worst step's code).
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from benchctl.errors import ConfigurationError
from benchctl.config_file import read_config_text
from benchctl.run_status import RunStatus

_JOB_KEYS = {"name", "description", "dut_part", "dut_revision", "dut_serial", "dut_serials", "unit_change",
             "switch_channels"}
_TEXT_KEYS = _JOB_KEYS - {"dut_serials", "switch_channels"}
_STEP_KEYS = {"procedure", "params", "limits", "parameters", "name"}


class JobFileError(ConfigurationError):
    """The job file cannot be used."""


@dataclass(frozen=True)
class JobStep:
    procedure: str
    name: str = ""
    params_file: Path | None = None
    limits_file: Path | None = None
    parameters: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Job:
    name: str
    steps: tuple[JobStep, ...]
    description: str = ""
    dut_part: str = ""
    dut_revision: str = ""
    dut_serial: str = ""
    path: Path | None = None
    dut_serials: tuple[str, ...] = ()
    unit_change: str = ""
    switch_channels: tuple[int, ...] = ()

    @property
    def units(self) -> tuple[str, ...]:
        """The serials the job runs its steps on, in order (one, maybe ``""``, when none is listed)."""
        return self.dut_serials or (self.dut_serial,)


def parse_serials(text: str) -> tuple[str, ...]:
    """``"A, B,C"`` -> ``("A", "B", "C")``; refuses empty items and repeats (JobFileError)."""
    items = tuple(s.strip() for s in text.split(","))
    return _check_serials(items, "--dut-serial")


def _check_serials(items: tuple[str, ...], where: str) -> tuple[str, ...]:
    if not items or any(not s for s in items):
        raise JobFileError(f"{where}: give serial numbers separated by commas, none empty (got {', '.join(items)!r})")
    repeated = sorted({s for s in items if items.count(s) > 1})
    if repeated:
        raise JobFileError(f"{where}: serial(s) {', '.join(repeated)} given twice; each unit runs once per job")
    return items


def _resolve(base: Path | None, value: str) -> Path:
    p = Path(value)
    return p if p.is_absolute() or base is None else (base / p)


def parse_job(text: str, *, path: Path | None = None) -> Job:
    """Validate a job file completely; JobFileError lists every problem with its key."""
    where = str(path) if path else "job text"
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise JobFileError(f"{where}: not valid TOML: {exc}") from exc
    base = path.parent if path else None
    problems: list[str] = []
    for key in sorted(set(data) - {"job", "step"}):
        problems.append(f"[{key}]: unknown table; expected [job] and [[step]]")
    job = data.get("job", {})
    if not isinstance(job, dict):
        problems.append("[job]: must be a table")
        job = {}
    for key in sorted(set(job) - _JOB_KEYS):
        problems.append(f"job.{key}: unknown key; known keys: {', '.join(sorted(_JOB_KEYS))}")
    for key in _TEXT_KEYS:
        if key in job and not isinstance(job[key], str):
            problems.append(f"job.{key}: must be text")
    serials: tuple[str, ...] = ()
    if "dut_serials" in job:
        raw = job["dut_serials"]
        if not isinstance(raw, list) or not raw or not all(isinstance(s, str) and s.strip() for s in raw):
            problems.append("job.dut_serials: must be a list of serial numbers (text, none empty)")
        elif "dut_serial" in job:
            problems.append("job.dut_serials: give either dut_serial (one unit) or dut_serials (several), not both")
        else:
            try:
                serials = _check_serials(tuple(s.strip() for s in raw), "job.dut_serials")
            except JobFileError as exc:
                problems.append(str(exc))
    channels: tuple[int, ...] = ()
    if "switch_channels" in job:
        raw_ch = job["switch_channels"]
        if (not isinstance(raw_ch, list) or not raw_ch
                or not all(isinstance(c, int) and not isinstance(c, bool) and c >= 1 for c in raw_ch)):
            problems.append("job.switch_channels: must be a list of channel numbers (whole numbers from 1)")
        elif len(set(raw_ch)) != len(raw_ch):
            problems.append("job.switch_channels: a channel is given twice; each unit has its own channel")
        elif len(raw_ch) != len(serials or (job.get("dut_serial", ""),)):
            problems.append(f"job.switch_channels: {len(raw_ch)} channel(s) for {len(serials) or 1} serial(s); give "
                            "one channel per serial, in the order of dut_serials")
        else:
            channels = tuple(raw_ch)
    from benchctl.job_units import UNIT_CHANGES

    change = job.get("unit_change", "")
    if isinstance(change, str) and change and change not in UNIT_CHANGES:
        problems.append(f"job.unit_change: {change!r} is not known; choose {' or '.join(sorted(UNIT_CHANGES))}")
    raw_steps = data.get("step", [])
    if not isinstance(raw_steps, list) or not raw_steps:
        problems.append("[[step]]: at least one step with procedure = \"...\" is required")
        raw_steps = []
    steps = []
    for k, step in enumerate(raw_steps, 1):
        key = f"step[{k}]"
        if not isinstance(step, dict):
            problems.append(f"{key}: must be a table")
            continue
        for extra in sorted(set(step) - _STEP_KEYS):
            problems.append(f"{key}.{extra}: unknown key; known keys: {', '.join(sorted(_STEP_KEYS))}")
        proc = step.get("procedure")
        if not isinstance(proc, str) or not proc:
            problems.append(f"{key}.procedure: required, a bundled procedure name or a path")
            continue
        if proc.endswith(".py"):
            proc = str(_resolve(base, proc))
        files = {}
        for fkey in ("params", "limits"):
            value = step.get(fkey)
            if value is None:
                files[fkey] = None
            elif not isinstance(value, str) or not value:
                problems.append(f"{key}.{fkey}: must be a file path")
                files[fkey] = None
            else:
                p = _resolve(base, value)
                if not p.is_file():
                    problems.append(f"{key}.{fkey}: file {p} does not exist")
                files[fkey] = p
        params = step.get("parameters", {})
        if not isinstance(params, dict):
            problems.append(f"{key}.parameters: must be a table of name = value")
            params = {}
        steps.append(JobStep(proc, str(step.get("name", "")), files["params"], files["limits"], dict(params)))
    if problems:
        raise JobFileError(f"{where}: {len(problems)} problem(s) in the job file", problems)
    return Job(
        name=str(job.get("name", path.stem if path else "job")), steps=tuple(steps),
        description=str(job.get("description", "")), dut_part=str(job.get("dut_part", "")),
        dut_revision=str(job.get("dut_revision", "")), dut_serial=str(job.get("dut_serial", "")), path=path,
        dut_serials=serials, unit_change=str(job.get("unit_change", "")), switch_channels=channels,
    )


def load_job(path: str | Path) -> Job:
    path = Path(path)
    return parse_job(read_config_text(path, "job file", JobFileError), path=path)


@dataclass(frozen=True)
class DurationEstimate:
    """Expected run time from earlier runs of the same procedure on the same station.

    ``seconds_per_point`` is the median over those runs of (end − start) / points;
    ``basis_runs`` how many runs it rests on (0: no history, then ``seconds`` is None).
    """

    points: int
    seconds_per_point: float | None
    seconds: float | None
    basis_runs: int


def estimate_duration(runs: Any, points: int) -> DurationEstimate:
    """Estimate from a ``Store.runs(...)`` frame of earlier runs (completed ones count)."""
    import numpy as np

    if runs is None or runs.empty:
        return DurationEstimate(points, None, None, 0)
    done = runs[(runs["status"] == RunStatus.COMPLETED) & (runs["n_points"] > 0) & runs["ended_utc"].notna()]
    if done.empty:
        return DurationEstimate(points, None, None, 0)
    per_point = [(e - s).total_seconds() / n for s, e, n in zip(done["started_utc"], done["ended_utc"], done["n_points"])]
    spp = float(np.median(per_point))
    return DurationEstimate(points, spp, spp * points, len(per_point))
