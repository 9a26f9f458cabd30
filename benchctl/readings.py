"""Readings of several instruments taken at the same moment, N times, with their scatter.

Readings are grouped by instrument (the object a bound method belongs to: one guarded
driver per role); each instrument is read in a thread of its own, so independent
instruments measure at the same time, and a barrier starts every round of readings on
all instruments together (an instrument's own readings within a round follow one
another: an instrument answers one query at a time). A reader may return several values
of one instrument taken together, named by a tuple key: ``{("vin_v", "iin_a", "pin_w"):
meter.measure_all}`` (a meter's trigger-then-fetch: voltage, current and power of one
integration). The drivers are thread-safe per
instrument (each holds a lock), so the interlock watch may read the same instrument
meanwhile.

A quantity read N times is stored as its mean ``<name>`` and the sample standard
deviation of its readings ``<base>_sd_<unit>`` (``pin_w`` → ``pin_sd_w``; the unit
suffix stays last), with ``n_readings`` on the point: the Type A standard uncertainty of
the mean is then sd/√N (JCGM 100:2008, the GUM, 4.2.2-4.2.3).
"""

from __future__ import annotations

import math
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, Callable, Mapping, Tuple, Union

from benchctl.units import SUFFIX_UNITS

Reader = Callable[[], Any]
#: A quantity's name, or the names of the values one reading returns together (a meter's
#: trigger-then-fetch giving voltage, current and power of one integration).
Key = Union[str, Tuple[str, ...]]

#: How long a round waits for the slowest instrument of the round before giving up (s).
ROUND_TIMEOUT_S = 120.0


def sd_name(name: str) -> str:
    """Name of the standard deviation of quantity ``name``: ``pin_w`` → ``pin_sd_w``; ``efficiency`` → ``efficiency_sd``."""
    head, sep, suffix = name.rpartition("_")
    if sep and head and suffix.lower() in SUFFIX_UNITS:
        return f"{head}_sd_{suffix}"
    return f"{name}_sd"


@dataclass(frozen=True)
class Readings:
    """N rounds of readings taken together: per quantity its values and times (s, on the bench clock)."""

    values: Mapping[str, tuple[float, ...]]
    times_s: Mapping[str, tuple[float, ...]]
    t_start_s: float
    t_end_s: float

    @property
    def n(self) -> int:
        return min((len(v) for v in self.values.values()), default=0)

    def mean(self, name: str) -> float:
        v = self.values[name]
        return math.fsum(v) / len(v)

    def sd(self, name: str) -> float:
        """Sample standard deviation (N − 1 in the denominator); NaN for a single reading."""
        v = self.values[name]
        if len(v) < 2:
            return math.nan
        m = math.fsum(v) / len(v)
        return math.sqrt(math.fsum((x - m) ** 2 for x in v) / (len(v) - 1))

    def as_values(self) -> dict[str, float]:
        """``{name: mean, sd_name(name): sd, ..., "n_readings": N}`` for recording a point."""
        out: dict[str, float] = {}
        for name in self.values:
            out[name] = self.mean(name)
        if self.n >= 2:
            for name in self.values:
                out[sd_name(name)] = self.sd(name)
        out["n_readings"] = float(self.n)
        return out


def _names(key: Key) -> tuple[str, ...]:
    return (key,) if isinstance(key, str) else tuple(key)


def _split(key: Key, answer: Any) -> list[tuple[str, float]]:
    """The (name, value) pairs of one reading: one float, or one per name of a tuple key."""
    if isinstance(key, str):
        return [(key, float(answer))]
    values = tuple(answer)
    if len(values) != len(key):
        raise ValueError(f"a reading for {', '.join(key)} returned {len(values)} values, not {len(key)}")
    return [(name, float(v)) for name, v in zip(key, values)]


def _instrument_of(read: Reader) -> Any:
    owner = getattr(read, "__self__", None)
    return owner if owner is not None else read


class ReadingStream:
    """Readers read continuously, one thread per instrument, each at its own pace, until stopped.

    For settling: every quantity's readings carry their own times, so no instrument waits for
    another (one held up by the interlock watch delays only its own readings). :meth:`take`
    returns what arrived since the last call, waiting until every quantity has something new;
    an error in any reading is raised there. Use as a context manager (:meth:`stop` joins the
    threads; a reading in progress is finished first).
    """

    def __init__(self, groups: list[list[tuple[Key, Reader]]], clock: Callable[[], float]) -> None:
        self._clock = clock
        self._cond = threading.Condition()
        self._new: dict[str, list[tuple[float, float]]] = {name: [] for g in groups for key, _ in g
                                                           for name in _names(key)}
        self._error: BaseException | None = None
        self._stop = threading.Event()
        self._threads = [threading.Thread(target=self._loop, args=(g,), name="benchctl-reading-stream", daemon=True)
                         for g in groups]
        for t in self._threads:
            t.start()

    def _loop(self, group: list[tuple[Key, Reader]]) -> None:
        try:
            while not self._stop.is_set():
                for key, read in group:
                    t_a = self._clock()
                    values = _split(key, read())
                    t_b = self._clock()
                    with self._cond:
                        for name, value in values:
                            self._new[name].append((0.5 * (t_a + t_b), value))
                        self._cond.notify_all()
        except BaseException as exc:  # noqa: BLE001 - handed to the caller's thread by take()
            with self._cond:
                if self._error is None:
                    self._error = exc
                self._cond.notify_all()

    def take(self, timeout_s: float = ROUND_TIMEOUT_S) -> dict[str, list[tuple[float, float]]]:
        """Readings ``{name: [(t_s, value), ...]}`` since the last call, at least one of each quantity."""
        with self._cond:
            ok = self._cond.wait_for(lambda: self._error is not None or all(self._new.values()), timeout=timeout_s)
            if self._error is not None:
                raise self._error
            if not ok:
                raise TimeoutError(f"no new reading of {', '.join(n for n, v in self._new.items() if not v)} "
                                   f"within {timeout_s:g} s")
            out = {name: list(v) for name, v in self._new.items()}
            for v in self._new.values():
                v.clear()
            return out

    def stop(self) -> None:
        """Stop reading: the readings in progress are finished; one that failed is raised here
        (an instrument that answered garbage or not at all after the last :meth:`take` still
        stops the run)."""
        self._halt()
        with self._cond:
            error = self._error
        if error is not None:
            raise error

    def _halt(self) -> None:
        self._stop.set()
        for t in self._threads:
            if t is not threading.current_thread():
                t.join(timeout=ROUND_TIMEOUT_S)

    def __enter__(self) -> "ReadingStream":
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        if exc_type is None:
            self.stop()
        else:
            self._halt()  # an error is already on its way: do not mask it


class SimultaneousReader:
    """Reads groups of quantities, one thread per instrument, rounds started together.

    ``clock`` stamps each reading with the midpoint of its query (s). Worker threads are
    kept between calls; :meth:`close` ends them (also done when the reader is collected).
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self.clock = clock
        self._pool: ThreadPoolExecutor | None = None
        self._workers = 0
        self._lock = threading.Lock()

    def close(self) -> None:
        with self._lock:
            pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=False, cancel_futures=True)

    def __del__(self) -> None:  # never raises
        try:
            self.close()
        except Exception:
            pass

    def _executor(self, workers: int) -> ThreadPoolExecutor:
        with self._lock:
            if self._pool is None or self._workers < workers:
                if self._pool is not None:
                    self._pool.shutdown(wait=False)
                self._pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="benchctl-reading")
                self._workers = workers
            return self._pool

    @staticmethod
    def groups(readers: Mapping[Key, Reader]) -> list[list[tuple[Key, Reader]]]:
        """Quantities grouped by the instrument that reads them, in the order given."""
        by_owner: dict[int, list[tuple[Key, Reader]]] = {}
        for name, read in readers.items():
            by_owner.setdefault(id(_instrument_of(read)), []).append((name, read))
        return list(by_owner.values())

    def stream(self, readers: Mapping[Key, Reader]) -> ReadingStream:
        """Start reading every quantity continuously (see :class:`ReadingStream`)."""
        if not readers:
            raise ValueError("no quantity to read")
        return ReadingStream(self.groups(readers), self.clock)

    def read(self, readers: Mapping[Key, Reader], n: int = 1) -> Readings:
        """``n`` rounds of every reader; instruments in parallel, each round started together."""
        if n < 1:
            raise ValueError(f"the number of readings must be >= 1, not {n}")
        if not readers:
            raise ValueError("no quantity to read")
        groups = self.groups(readers)
        names = [name for key in readers for name in _names(key)]
        if len(set(names)) != len(names):
            raise ValueError(f"a quantity is read twice: {', '.join(sorted(n for n in names if names.count(n) > 1))}")
        values: dict[str, list[float]] = {name: [] for name in names}
        times: dict[str, list[float]] = {name: [] for name in names}
        t_start = self.clock()
        if len(groups) == 1:
            self._read_group(groups[0], n, values, times, None)
        else:
            barrier = threading.Barrier(len(groups))
            pool = self._executor(len(groups))
            futures = [pool.submit(self._read_group, g, n, values, times, barrier) for g in groups]
            first_error: BaseException | None = None
            for f in futures:
                try:
                    f.result()
                except threading.BrokenBarrierError:
                    continue  # another instrument failed first; its error is the one to raise
                except BaseException as exc:  # noqa: BLE001 - re-raised below in the caller's thread
                    if first_error is None:
                        first_error = exc
            if first_error is not None:
                raise first_error
            if any(len(v) != n for v in values.values()):
                raise RuntimeError("simultaneous readings: a round was abandoned without an error")
        return Readings({k: tuple(v) for k, v in values.items()}, {k: tuple(v) for k, v in times.items()},
                        t_start, self.clock())

    def _read_group(self, group: list[tuple[Key, Reader]], n: int, values: dict[str, list[float]],
                    times: dict[str, list[float]], barrier: threading.Barrier | None) -> None:
        try:
            for _ in range(n):
                if barrier is not None:
                    barrier.wait(timeout=ROUND_TIMEOUT_S)
                for key, read in group:
                    t_a = self.clock()
                    pairs = _split(key, read())
                    t_b = self.clock()
                    for name, value in pairs:
                        values[name].append(value)
                        times[name].append(0.5 * (t_a + t_b))
        except BaseException:
            if barrier is not None:
                barrier.abort()
            raise
