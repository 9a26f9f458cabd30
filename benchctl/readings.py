"""Readings of several instruments taken at the same moment, N times, with their scatter.

Readings are grouped by instrument (the object a bound method belongs to: one guarded
driver per role); each instrument is read in a thread of its own, so independent
instruments measure at the same time, and a barrier starts every round of readings on
all instruments together (an instrument's own readings within a round follow one
another: an instrument answers one query at a time). The drivers are thread-safe per
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
from typing import Any, Callable, Mapping

from benchctl.units import SUFFIX_UNITS

Reader = Callable[[], float]

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


def _instrument_of(read: Reader) -> Any:
    owner = getattr(read, "__self__", None)
    return owner if owner is not None else read


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
    def groups(readers: Mapping[str, Reader]) -> list[list[tuple[str, Reader]]]:
        """Quantities grouped by the instrument that reads them, in the order given."""
        by_owner: dict[int, list[tuple[str, Reader]]] = {}
        for name, read in readers.items():
            by_owner.setdefault(id(_instrument_of(read)), []).append((name, read))
        return list(by_owner.values())

    def read(self, readers: Mapping[str, Reader], n: int = 1) -> Readings:
        """``n`` rounds of every reader; instruments in parallel, each round started together."""
        if n < 1:
            raise ValueError(f"the number of readings must be >= 1, not {n}")
        if not readers:
            raise ValueError("no quantity to read")
        groups = self.groups(readers)
        values: dict[str, list[float]] = {name: [] for name in readers}
        times: dict[str, list[float]] = {name: [] for name in readers}
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

    def _read_group(self, group: list[tuple[str, Reader]], n: int, values: dict[str, list[float]],
                    times: dict[str, list[float]], barrier: threading.Barrier | None) -> None:
        try:
            for _ in range(n):
                if barrier is not None:
                    barrier.wait(timeout=ROUND_TIMEOUT_S)
                for name, read in group:
                    t_a = self.clock()
                    value = float(read())
                    t_b = self.clock()
                    values[name].append(value)
                    times[name].append(0.5 * (t_a + t_b))
        except BaseException:
            if barrier is not None:
                barrier.abort()
            raise
