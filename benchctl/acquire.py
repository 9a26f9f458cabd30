"""Scope captures the screen did not cut: re-acquire with a wider vertical scale, a bounded
number of times, and say so when the trace still clips.

A sample at the top or bottom edge of the screen (an ADC end code) is not the signal's
value but a limit it reached or passed, so a peak read from a clipped trace is only a bound.
:func:`acquire_unclipped` captures, checks every watched channel, and while one clips it
widens that channel's screen (``widen_factor`` times the range, keeping the edge that did
not clip where it was, so the part of the trace that fitted stays on screen) and captures
again, at most ``max_retries`` times. The channels are returned to the scale and offset they
had (``restore``), so every point of a sweep starts from the procedure's own setting and the
result does not depend on the order of the points. A value read from a trace that still clips
is stored with the quality flags :func:`clip_flags` builds ("clipped" and, where the direction
is known, "lower_bound" or "upper_bound"), and :func:`report_clipping` writes the run events.
Common practice on the bench; the number of retries bounds the time it may take.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from benchctl.analysis.quality import CLIPPED, LOWER_BOUND, UPPER_BOUND

logger = logging.getLogger(__name__)

DEFAULT_MAX_RETRIES = 3
DEFAULT_WIDEN_FACTOR = 2.0
DIVISIONS = 10  # vertical divisions of the screen (full-scale range = 10 x scale)


@dataclass(frozen=True)
class ChannelClipping:
    """What happened on one watched channel: the screen of each attempt and what the last clipped.

    ``scales_per_div`` / ``offsets`` hold one value per capture (unit of the channel per
    division, value at the screen centre); ``clipped_*_samples`` are of the last capture.
    """

    channel: int
    label: str
    unit: str
    scales_per_div: tuple[float, ...]
    offsets: tuple[float, ...]
    first_clipped_samples: int
    clipped_high_samples: int
    clipped_low_samples: int

    @property
    def clipped(self) -> bool:
        return self.clipped_high_samples + self.clipped_low_samples > 0

    @property
    def clipped_high(self) -> bool:
        return self.clipped_high_samples > 0

    @property
    def clipped_low(self) -> bool:
        return self.clipped_low_samples > 0

    @property
    def widened(self) -> bool:
        return len(self.scales_per_div) > 1

    def summary(self) -> dict[str, Any]:
        """JSON-ready record of the attempts (stored with the waveform)."""
        return {"channel": self.channel, "label": self.label, "scales_per_div": list(self.scales_per_div),
                "offsets": list(self.offsets), "first_clipped_samples": self.first_clipped_samples,
                "clipped_high_samples": self.clipped_high_samples, "clipped_low_samples": self.clipped_low_samples}


@dataclass(frozen=True)
class Acquisition:
    """The waveforms of the last capture (by channel), how many captures it took, and per
    watched channel whether it still clips."""

    waveforms: Mapping[int, Any]
    attempts: int
    channels: Mapping[int, ChannelClipping]

    @property
    def clipped(self) -> bool:
        """True when a watched channel still clips after the last capture."""
        return any(c.clipped for c in self.channels.values())

    def waveform(self, channel: int) -> Any:
        return self.waveforms[channel]

    def meta(self) -> dict[str, Any]:
        """JSON-ready account of the acquisition (stored in the waveform's meta)."""
        return {"attempts": self.attempts, "still_clipped": self.clipped,
                "channels": [c.summary() for c in self.channels.values()]}


def widened_screen(scale_per_div: float, offset: float, *, clipped_high: bool, clipped_low: bool,
                   factor: float = DEFAULT_WIDEN_FACTOR) -> tuple[float, float]:
    """Scale and centre of a screen ``factor`` times taller.

    Clipped only at the top: the bottom edge stays where it was; only at the bottom: the top
    edge stays; at both (or neither): the centre stays.
    """
    if not factor > 1.0:
        raise ValueError(f"widen factor must be above 1, got {factor!r}")
    half_old = scale_per_div * DIVISIONS / 2
    new_scale = scale_per_div * factor
    half_new = new_scale * DIVISIONS / 2
    if clipped_high and not clipped_low:
        return new_scale, offset - half_old + half_new
    if clipped_low and not clipped_high:
        return new_scale, offset + half_old - half_new
    return new_scale, offset


def acquire_unclipped(
    scope: Any,
    capture: Callable[[int], None],
    channels: Iterable[int],
    *,
    watch: Mapping[int, str] | Sequence[int] | None = None,
    max_retries: int = DEFAULT_MAX_RETRIES,
    widen_factor: float = DEFAULT_WIDEN_FACTOR,
    max_scale_per_div: float | None = None,
    restore: bool = True,
) -> Acquisition:
    """Capture, fetch ``channels``, and re-capture with a wider screen while a watched channel clips.

    ``capture(attempt)`` arms the scope and waits for the acquisition (attempt 0 is the
    first; a later attempt may first have to bring the DUT back to where the event starts,
    e.g. undo a load step). ``watch`` lists the channels whose clipping matters (default:
    all), optionally as {channel: label} for messages. A watched channel that clips gets
    :func:`widened_screen`; no channel is made wider than ``max_scale_per_div``. At most
    ``max_retries`` re-captures. With ``restore`` the channels' scale and offset are set
    back afterwards (also when a capture raises).
    """
    channels = list(dict.fromkeys(channels))
    if watch is None:
        labels = {ch: f"channel {ch}" for ch in channels}
    elif isinstance(watch, Mapping):
        labels = {int(ch): str(label) for ch, label in watch.items()}
    else:
        labels = {int(ch): f"channel {ch}" for ch in watch}
    missing = [ch for ch in labels if ch not in channels]
    if missing:
        raise ValueError(f"watched channels {missing} are not among the fetched channels {channels}")
    if max_retries < 0:
        raise ValueError(f"max_retries must be 0 or more, got {max_retries!r}")
    start = {ch: (scope.scale(ch), scope.offset(ch)) for ch in labels}
    screens = {ch: [start[ch]] for ch in labels}
    first_clipped: dict[int, int] = {}
    attempt = 0
    try:
        while True:
            capture(attempt)
            waveforms = {ch: scope.fetch_waveform(ch) for ch in channels}
            for ch in labels:
                first_clipped.setdefault(ch, waveforms[ch].clipped_samples)
            to_widen = []
            for ch in labels:
                wf = waveforms[ch]
                if not wf.clipped_samples:
                    continue
                scale, offset = screens[ch][-1]
                new_scale, new_offset = widened_screen(scale, offset, clipped_high=wf.clipped_high_samples > 0,
                                                       clipped_low=wf.clipped_low_samples > 0, factor=widen_factor)
                if max_scale_per_div is not None and new_scale > max_scale_per_div * (1 + 1e-9):
                    continue
                to_widen.append((ch, new_scale, new_offset))
            if not to_widen or attempt >= max_retries:
                break
            for ch, new_scale, new_offset in to_widen:
                logger.info("%s clipped %d samples at %g/div; widening to %g/div (centre %g)", labels[ch],
                            waveforms[ch].clipped_samples, screens[ch][-1][0], new_scale, new_offset)
                scope.set_scale(ch, new_scale)
                scope.set_offset(ch, new_offset)
                screens[ch].append((new_scale, new_offset))
            for ch in labels:  # channels left as they were keep their screen for this attempt too
                if ch not in {w[0] for w in to_widen}:
                    screens[ch].append(screens[ch][-1])
            attempt += 1
    finally:
        if restore:
            for ch, (scale, offset) in start.items():
                if screens[ch][-1] != (scale, offset):
                    scope.set_scale(ch, scale)
                    scope.set_offset(ch, offset)
    result = {
        ch: ChannelClipping(
            channel=ch, label=labels[ch], unit=str(getattr(waveforms[ch], "unit", "")),
            scales_per_div=tuple(s for s, _ in screens[ch]), offsets=tuple(o for _, o in screens[ch]),
            first_clipped_samples=first_clipped.get(ch, 0),
            clipped_high_samples=int(waveforms[ch].clipped_high_samples),
            clipped_low_samples=int(waveforms[ch].clipped_low_samples),
        )
        for ch in labels
    }
    return Acquisition(waveforms=waveforms, attempts=attempt + 1, channels=result)


def clip_flags(clipped: bool, *, bound: str | None = None, reason: str = "") -> dict[str, Any]:
    """Quality flags of a value read from a trace that clipped: {} when it did not, else
    ``{"flags": ["clipped", <bound>], "flag_reasons": reason}``; ``bound`` is
    "lower_bound" (the true value is at least the stored one), "upper_bound", or None."""
    if not clipped:
        return {}
    if bound not in (None, LOWER_BOUND, UPPER_BOUND):
        raise ValueError(f"bound must be {LOWER_BOUND!r}, {UPPER_BOUND!r} or None, not {bound!r}")
    flags = [CLIPPED] + ([bound] if bound else [])
    return {"flags": flags, "flag_reasons": reason or "the trace touched the scope's screen limits"}


def add_flags(details: Mapping[str, Any], extra: Mapping[str, Any]) -> dict[str, Any]:
    """``details`` with the flags of ``extra`` added (flags united in order, reasons joined)."""
    out = dict(details)
    if not extra.get("flags"):
        return out
    flags = list(out.get("flags", []))
    flags += [f for f in extra["flags"] if f not in flags]
    out["flags"] = flags
    reasons = [r for r in (out.get("flag_reasons", ""), extra.get("flag_reasons", "")) if r]
    out["flag_reasons"] = "; ".join(dict.fromkeys(reasons))
    return out


def report_clipping(bench: Any, acq: Acquisition, where: str, *, seq: int | None = None,
                    remedy: str = "") -> None:
    """Run events for ``acq``: an info event for each channel that needed a wider screen and
    fitted, a warning for each that still clipped (its values are stored as bounds)."""
    for c in acq.channels.values():
        unit = f" {c.unit}" if c.unit else ""
        if c.clipped:
            bench.event(
                "warning",
                f"{c.label} still clipped at {where} ({c.clipped_high_samples} samples at the top, "
                f"{c.clipped_low_samples} at the bottom of the screen, at {c.scales_per_div[-1]:g}{unit}/div after "
                f"{len(c.scales_per_div)} capture(s)); values read from it are stored as bounds"
                + (f"; {remedy}" if remedy else ""),
                seq=seq, channel=c.channel, scales_per_div=list(c.scales_per_div),
                clipped_high_samples=c.clipped_high_samples, clipped_low_samples=c.clipped_low_samples)
        elif c.widened:
            bench.event(
                "info",
                f"{c.label} clipped {c.first_clipped_samples} samples at {where} at {c.scales_per_div[0]:g}{unit}/div; "
                f"re-acquired at {c.scales_per_div[-1]:g}{unit}/div without clipping",
                seq=seq, channel=c.channel, scales_per_div=list(c.scales_per_div))
