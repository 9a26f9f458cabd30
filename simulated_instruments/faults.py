"""Fault injection for the simulated bench: what goes wrong, on which instrument, and when.

A fault is written ``KIND[@ROLE][:KEY=VALUE,...]`` (:func:`parse_fault_spec`), e.g.
``drop@source:after=40,for=0``, ``reset@load:after=25``, ``feedback_open:at=3.5``,
``scpi_error@load:after=12,code=-222``, ``garble@output_meter:random=7``.

Kinds on an instrument (``@ROLE`` required):

* ``unresponsive`` — the instrument's server stops answering (bytes wait unread);
* ``drop`` — the server closes every connection and resets new ones;
* ``garble`` — the next response is replaced by a malformed line (one-shot; with
  ``after=N`` that is the answer to the N-th message itself when it has one);
* ``scpi_error`` — the next setting queues SCPI error ``code`` (default -200) instead
  of executing (one-shot);
* ``reset`` — the instrument resets itself as after a power cycle: ``*RST`` and ``*CLS``
  run under its lock (settings lost, outputs off) and the power-on bit PON (128) of the
  Standard Event Status Register is set again, so ``*ESR?`` shows it
  (IEEE 488.2-1992 §11.5.1.1.8, from memory).

Kinds on the converter under test (``@ROLE`` only names whose commands ``after=``
and ``on=`` count): ``feedback_open``, ``output_short``, ``overheat`` (the model's own
faults) and ``input_sag`` — the DUT input falls to ``level`` volts (default half the
UVLO turn-off threshold) whatever the source is set to, as a sagging supply or a
failing input contact would do.

When (at most one of these; none means at once when the plan is armed):

* ``after=N`` — after the instrument of ROLE has received N program messages
  (counted from arming; the N-th message is processed first);
* ``on=TEXT`` — after the instrument of ROLE receives a message starting with TEXT
  (case-insensitive, e.g. ``on=OUTP ON``);
* ``at=T`` — when the model clock reaches T model seconds;
* ``random=SEED`` — after a number of messages drawn with that seed from
  ``1 … max`` (``max=``, default 100);
* or from a test: :meth:`FaultPlan.fire` on a spec made with ``manual=True``
  (``KIND@ROLE:manual``).

``for=D`` ends a fault D wall-clock seconds after it started (wall-clock because the
instruments' timeouts are); without it ``unresponsive``, ``drop``, ``input_sag`` and the
model faults last until the plan is cleared. ``drop`` with ``for=0`` is one connection
loss: connections close, new ones are accepted at once.

This module knows nothing of benchctl: it acts on the simulator only.
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Mapping

import numpy as np

from .scpi.status import ESR_PON

logger = logging.getLogger(__name__)

INSTRUMENT_FAULTS = ("unresponsive", "drop", "garble", "scpi_error", "reset")
DUT_FAULTS = ("feedback_open", "output_short", "overheat", "input_sag")
FAULT_KINDS = INSTRUMENT_FAULTS + DUT_FAULTS
#: Kinds that end by themselves after one event.
ONE_SHOT = ("garble", "scpi_error", "reset")
_HISTORY_CAP = 100_000
_KEYS = ("after", "on", "at", "random", "max", "for", "code", "message", "level", "manual")


class FaultSpecError(ValueError):
    """A fault specification cannot be used; the message says what and how to write it."""


@dataclass(frozen=True)
class FaultSpec:
    """One fault to inject: its kind, the instrument role, the trigger and its options.

    ``after_messages``: fire after that many program messages to ROLE; ``on_prefix``:
    fire after a message starting with it; ``at_model_s``: fire at that model time (s);
    ``manual``: only :meth:`FaultPlan.fire` fires it; none of them: fire when armed.
    ``duration_s``: wall-clock seconds until the fault is cleared (None: until the
    plan is cleared). ``code``/``message``: the SCPI error of ``scpi_error``.
    ``level_v``: the DUT input voltage of ``input_sag`` (None: half the UVLO turn-off).
    """

    kind: str
    role: str | None = None
    after_messages: int | None = None
    on_prefix: str | None = None
    at_model_s: float | None = None
    manual: bool = False
    duration_s: float | None = None
    code: int = -200
    message: str | None = None
    level_v: float | None = None

    def __post_init__(self) -> None:
        if self.kind not in FAULT_KINDS:
            raise FaultSpecError(f"unknown fault kind {self.kind!r}; kinds: {', '.join(FAULT_KINDS)}")
        if self.kind in INSTRUMENT_FAULTS and not self.role:
            raise FaultSpecError(f"fault {self.kind!r} acts on an instrument: write {self.kind}@ROLE "
                                 "(e.g. @source, @load, @input_meter, @output_meter)")
        triggers = [self.after_messages is not None, self.on_prefix is not None, self.at_model_s is not None,
                    self.manual]
        if sum(triggers) > 1:
            raise FaultSpecError(f"fault {self.kind!r}: give at most one of after=, on=, at=, random=, manual")
        if (self.after_messages is not None or self.on_prefix is not None) and not self.role:
            raise FaultSpecError(f"fault {self.kind!r}: after=/on= count the messages of an instrument; "
                                 f"write {self.kind}@ROLE:after=N")
        if self.after_messages is not None and self.after_messages < 1:
            raise FaultSpecError(f"fault {self.kind!r}: after={self.after_messages} must be a whole number >= 1")
        if self.at_model_s is not None and not self.at_model_s >= 0:
            raise FaultSpecError(f"fault {self.kind!r}: at={self.at_model_s} must be model seconds >= 0")
        if self.duration_s is not None and not self.duration_s >= 0:
            raise FaultSpecError(f"fault {self.kind!r}: for={self.duration_s} must be wall-clock seconds >= 0")
        if self.level_v is not None and not self.level_v >= 0:
            raise FaultSpecError(f"fault {self.kind!r}: level={self.level_v} must be volts >= 0")

    def text(self) -> str:
        """The spec written back in the ``KIND@ROLE:KEY=VALUE`` form."""
        head = self.kind + (f"@{self.role}" if self.role else "")
        opts = []
        if self.after_messages is not None:
            opts.append(f"after={self.after_messages}")
        if self.on_prefix is not None:
            opts.append(f"on={self.on_prefix}")
        if self.at_model_s is not None:
            opts.append(f"at={self.at_model_s:g}")
        if self.manual:
            opts.append("manual")
        if self.duration_s is not None:
            opts.append(f"for={self.duration_s:g}")
        if self.kind == "scpi_error":
            opts.append(f"code={self.code}")
        if self.level_v is not None:
            opts.append(f"level={self.level_v:g}")
        return head + (":" + ",".join(opts) if opts else "")


@dataclass(frozen=True)
class FiredFault:
    """A fault that happened: the spec, when (monotonic and model s), and the last message ROLE received."""

    spec: FaultSpec
    t_monotonic_s: float
    t_model_s: float
    last_message: str
    messages_seen: int


def parse_fault_spec(text: str) -> FaultSpec:
    """Parse ``KIND[@ROLE][:KEY=VALUE,...]`` (see the module docstring) into a :class:`FaultSpec`."""
    if not isinstance(text, str) or not text.strip():
        raise FaultSpecError("empty fault spec; write KIND@ROLE:after=N, e.g. drop@source:after=40")
    raw = text.strip()
    head, _, tail = raw.partition(":")
    kind, _, role = head.partition("@")
    kind, role = kind.strip().lower(), role.strip() or None
    values: dict[str, str] = {}
    for item in (p for p in tail.split(",") if p.strip()) if tail else ():
        key, eq, value = item.partition("=")
        key = key.strip().lower()
        if key not in _KEYS:
            raise FaultSpecError(f"fault spec {raw!r}: unknown key {key!r}; keys: {', '.join(_KEYS)}")
        if not eq and key != "manual":
            raise FaultSpecError(f"fault spec {raw!r}: {key} needs a value ({key}=...)")
        if key in values:
            raise FaultSpecError(f"fault spec {raw!r}: {key} given twice")
        values[key] = value.strip()

    def number(key: str, kind_: Callable[[str], Any]) -> Any:
        if key not in values:
            return None
        try:
            return kind_(values[key])
        except ValueError:
            raise FaultSpecError(f"fault spec {raw!r}: {key}={values[key]!r} is not a "
                                 f"{'whole number' if kind_ is int else 'number'}") from None

    after = number("after", int)
    seed = number("random", int)
    top = number("max", int)
    if seed is not None:
        if after is not None:
            raise FaultSpecError(f"fault spec {raw!r}: give after= or random=, not both")
        if top is not None and top < 1:
            raise FaultSpecError(f"fault spec {raw!r}: max={top} must be >= 1")
        after = random_after(seed, top or 100)
    elif top is not None:
        raise FaultSpecError(f"fault spec {raw!r}: max= only goes with random=SEED")
    kwargs: dict[str, Any] = {
        "kind": kind, "role": role, "after_messages": after, "on_prefix": values.get("on") or None,
        "at_model_s": number("at", float), "manual": "manual" in values, "duration_s": number("for", float),
        "message": values.get("message") or None, "level_v": number("level", float),
    }
    code = number("code", int)
    if code is not None:
        if kind != "scpi_error":
            raise FaultSpecError(f"fault spec {raw!r}: code= only goes with scpi_error")
        kwargs["code"] = code
    return FaultSpec(**kwargs)


def random_after(seed: int, maximum: int = 100) -> int:
    """A message count in ``1 … maximum`` drawn reproducibly from ``seed``."""
    return int(np.random.default_rng(seed).integers(1, maximum + 1))


def random_faults(seed: int, count: int, *, roles: Iterable[str] = ("source", "load", "input_meter", "output_meter"),
                  kinds: Iterable[str] = INSTRUMENT_FAULTS, max_after: int = 100) -> list[FaultSpec]:
    """``count`` faults of random kinds on random roles after a random number of messages (reproducible)."""
    rng = np.random.default_rng(seed)
    roles, kinds = list(roles), list(kinds)
    return [FaultSpec(str(rng.choice(kinds)), str(rng.choice(roles)), after_messages=int(rng.integers(1, max_after + 1)))
            for _ in range(count)]


class _Counter:
    """Counts the program messages one instrument receives and fires the triggers waiting on it."""

    def __init__(self, plan: "FaultPlan", role: str, instrument: Any) -> None:
        self.plan = plan
        self.role = role
        self.instrument = instrument
        self.count = 0
        self.last = ""
        self.history: list[str] = []  # every message seen, oldest first (capped)
        self.waiting: list[FaultSpec] = []
        self._lock = threading.Lock()
        original = instrument.process_message

        def counting(data: bytes, *, source: str = "direct") -> bytes | None:
            response = original(data, source=source)
            self._seen(data.decode("latin-1").strip())
            return response

        self._original = original
        instrument.process_message = counting  # the server calls the instance attribute

    def _seen(self, text: str) -> None:
        with self._lock:
            self.count += 1
            self.last = text
            if len(self.history) < _HISTORY_CAP:
                self.history.append(text)
            due = [s for s in self.waiting
                   if (s.after_messages is not None and self.count >= s.after_messages)
                   or (s.on_prefix is not None and text.upper().startswith(s.on_prefix.upper()))]
            for s in due:
                self.waiting.remove(s)
        for s in due:
            self.plan._fire(s)

    def restore(self) -> None:
        if self.instrument.__dict__.get("process_message") is not None:
            del self.instrument.process_message


class FaultPlan:
    """Faults armed on a :class:`~simulated_instruments.bench.SimulatedBench`; a context manager.

    ``fired`` lists what happened, in order. :meth:`clear` ends every fault still on
    (servers answer again, model faults and input sag removed) and stops counting.
    """

    def __init__(self, bench: Any) -> None:
        self.bench = bench
        self.specs: list[FaultSpec] = []
        self.fired: list[FiredFault] = []
        self._counters: dict[str, _Counter] = {}
        self._timers: list[threading.Timer] = []
        self._sags: dict[int, Any] = {}
        self._lock = threading.RLock()
        self._cleared = False
        self._fired_event = threading.Event()

    # -- arming ------------------------------------------------------------------------
    def add(self, spec: FaultSpec | str) -> FaultSpec:
        """Arm one fault (a spec or its text)."""
        spec = parse_fault_spec(spec) if isinstance(spec, str) else spec
        if spec.role is not None and spec.role not in self.bench.instruments:
            raise FaultSpecError(f"fault {spec.text()!r}: the bench has no role {spec.role!r}; "
                                 f"roles: {', '.join(self.bench.instruments)}")
        with self._lock:
            self.specs.append(spec)
            if spec.role is not None:
                self._counter(spec.role)
            if spec.manual:
                return spec
            if spec.after_messages is not None or spec.on_prefix is not None:
                counter = self._counters[spec.role]  # type: ignore[index]
                with counter._lock:
                    counter.waiting.append(spec)
            elif spec.at_model_s is not None:
                clock = self.bench.clock
                delay = max(0.0, (spec.at_model_s - clock.now_s()) / getattr(clock, "scale", 1.0))
                self._timer(delay, self._fire, spec)
            else:
                self._fire(spec)
        return spec

    def _counter(self, role: str) -> _Counter:
        if role not in self._counters:
            self._counters[role] = _Counter(self, role, self.bench.instruments[role])
        return self._counters[role]

    def _timer(self, delay_s: float, fn: Callable[..., None], *args: Any) -> None:
        timer = threading.Timer(delay_s, fn, args)
        timer.daemon = True
        with self._lock:
            if self._cleared:
                return
            self._timers.append(timer)
        timer.start()

    def messages_seen(self, role: str) -> int:
        """Program messages ROLE's instrument received since it was first named in this plan."""
        counter = self._counters.get(role)
        return 0 if counter is None else counter.count

    def messages(self, role: str) -> list[str]:
        """The program messages ROLE's instrument received since it was first named in this plan, oldest first."""
        counter = self._counters.get(role)
        return [] if counter is None else list(counter.history)

    # -- firing ------------------------------------------------------------------------
    def fire(self, spec: FaultSpec | str) -> FiredFault:
        """Inject ``spec`` now (a test callback's way; the spec need not have been added)."""
        spec = parse_fault_spec(spec) if isinstance(spec, str) else spec
        with self._lock:
            if spec not in self.specs:
                self.specs.append(spec)
                if spec.role is not None:
                    self._counter(spec.role)
        return self._fire(spec)

    def wait_fired(self, timeout_s: float) -> bool:
        """Block until at least one fault fired (or the timeout); True if one did."""
        return self._fired_event.wait(timeout_s)

    def _fire(self, spec: FaultSpec) -> FiredFault:
        counter = self._counters.get(spec.role) if spec.role else None
        record = FiredFault(spec, time.monotonic(), self.bench.clock.now_s(),
                            counter.last if counter else "", counter.count if counter else 0)
        with self._lock:
            if self._cleared:
                return record
            self.fired.append(record)
        logger.info("fault %s fired (%s messages seen, last %r)", spec.text(), record.messages_seen, record.last_message)
        self._start(spec)
        self._fired_event.set()
        if spec.duration_s is not None and spec.kind not in ONE_SHOT:
            if spec.duration_s == 0:
                self._stop(spec)
            else:
                self._timer(spec.duration_s, self._stop, spec)
        return record

    def _start(self, spec: FaultSpec) -> None:
        kind = spec.kind
        if kind in ("unresponsive", "drop", "garble"):
            self.bench.servers[spec.role].set_fault(kind)
        elif kind == "scpi_error":
            self.bench.instruments[spec.role].fail_next_setting(
                spec.code, spec.message, detail=f"injected fault {spec.text()}")
        elif kind == "reset":
            power_cycle(self.bench.instruments[spec.role])
        elif kind == "input_sag":
            self._sag(spec)
        else:
            self.bench.model.inject_fault(kind)

    def _stop(self, spec: FaultSpec) -> None:
        kind = spec.kind
        if kind in ("unresponsive", "drop"):
            server = self.bench.servers[spec.role]
            if server.fault == kind:
                server.set_fault("none")
        elif kind == "input_sag":
            self._unsag()
        elif kind in ("feedback_open", "output_short", "overheat"):
            self.bench.model.clear_faults()
        logger.info("fault %s ended", spec.text())

    def _sag(self, spec: FaultSpec) -> None:
        source = self.bench.instruments["source"]
        design = self.bench.design
        level = spec.level_v if spec.level_v is not None else 0.5 * design.protection.uvlo_off_v
        with source.lock:
            if id(source) not in self._sags:
                self._sags[id(source)] = source.__dict__.get("_apply")

            def sagging_apply() -> None:
                self.bench.model.set_source(min(source.voltage_v, level), source.current_limit_a, source.output_on)

            source._apply = sagging_apply
            source._apply()

    def _unsag(self) -> None:
        source = self.bench.instruments["source"]
        with source.lock:
            if id(source) in self._sags:
                previous = self._sags.pop(id(source))
                if previous is None:
                    del source._apply
                else:
                    source._apply = previous
                source._apply()

    # -- ending ------------------------------------------------------------------------
    def clear(self) -> None:
        """End every fault of the plan and stop counting. Safe twice."""
        with self._lock:
            self._cleared = True
            timers, self._timers = self._timers, []
            counters = list(self._counters.values())
        for timer in timers:
            timer.cancel()
        for counter in counters:
            counter.restore()
        for role, server in self.bench.servers.items():
            if server.fault != "none":
                server.set_fault("none")
        for inst in self.bench.instruments.values():
            with inst.lock:
                inst._fail_next = None
        self._unsag()
        if self.bench.model.faults:
            self.bench.model.clear_faults()

    def __enter__(self) -> "FaultPlan":
        return self

    def __exit__(self, *exc: object) -> None:
        self.clear()


def power_cycle(instrument: Any) -> None:
    """Reset ``instrument`` as a power cycle would: ``*RST`` and ``*CLS`` under its lock, then PON set.

    Settings return to their reset values (outputs off, recorded in the audit log by the
    instrument's own ``on_reset``) and ``*ESR?`` reports the power-on bit (128) until read.
    """
    with instrument.lock:
        instrument.handle_message("*RST;*CLS")
        instrument._esr |= ESR_PON  # the core keeps ESR private; a power-on sets PON (IEEE 488.2 §11.5.1.1.8)


def apply_fault_specs(bench: Any, specs: Iterable[FaultSpec | str] | Mapping[str, Any]) -> FaultPlan:
    """Arm every spec (``FaultSpec`` or text such as ``"drop@source:after=40"``) on ``bench``; returns the plan.

    All specs are parsed and checked before any is armed, so a typo arms nothing.
    """
    parsed = [parse_fault_spec(s) if isinstance(s, str) else s for s in specs]
    for spec in parsed:
        if not isinstance(spec, FaultSpec):
            raise FaultSpecError(f"expected a fault spec text or FaultSpec, got {type(spec).__name__}")
        if spec.role is not None and spec.role not in bench.instruments:
            raise FaultSpecError(f"fault {spec.text()!r}: the bench has no role {spec.role!r}; "
                                 f"roles: {', '.join(bench.instruments)}")
    plan = FaultPlan(bench)
    for spec in parsed:
        plan.add(spec)
    return plan
