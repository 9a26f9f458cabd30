"""Exit codes of the ``benchctl`` command, and the one map from an error to its code.

0 success; 1 a run that did not complete or a check that failed; 2 bad input (files,
parameters, options: nothing was enabled); 3 an instrument or database problem; 4 a run
that could not be checked or decided against its limits (missing data, a run that did not
complete, a BORDERLINE or SUSPECT verdict); 128 + the signal's number when a termination
signal stopped it: 130 SIGINT (Ctrl-C), 143 SIGTERM, 129 SIGHUP (the shell's convention for a
command ended by a signal; the numbers are POSIX.1-2017's on Linux, from memory). The
outputs were switched off and the run stored before any of these is returned.
"""

from __future__ import annotations

from enum import IntEnum


class ExitCode(IntEnum):
    OK = 0
    FAILED = 1
    BAD_INPUT = 2
    INSTRUMENT = 3
    NOT_CHECKED = 4
    INTERRUPTED = 130  # SIGINT (Ctrl-C)
    HUNG_UP = 129  # SIGHUP
    TERMINATED = 143  # SIGTERM

    @classmethod
    def for_signal(cls, signal_name: str) -> "ExitCode":
        """128 + the signal's number for the signals a run catches; INTERRUPTED for any other."""
        return {"SIGINT": cls.INTERRUPTED, "SIGHUP": cls.HUNG_UP, "SIGTERM": cls.TERMINATED}.get(
            signal_name, cls.INTERRUPTED)


EXIT_OK = ExitCode.OK
EXIT_FAILED = ExitCode.FAILED
EXIT_BAD_INPUT = ExitCode.BAD_INPUT
EXIT_INSTRUMENT = ExitCode.INSTRUMENT
EXIT_NOT_CHECKED = ExitCode.NOT_CHECKED
EXIT_INTERRUPTED = ExitCode.INTERRUPTED


def exit_code_for_error(exc: BaseException) -> ExitCode:
    """The exit code of a command that ended with ``exc`` (the only such map in benchctl).

    Configuration and procedure errors, and a caller's bad argument (:class:`UsageError`), are
    the user's input (2); instrument and store
    errors are trouble with the bench or the database (3); a signal is 128 + its number; any other
    benchctl error is treated as bad input (2) and anything else as a failure (1).
    """
    from benchctl.errors import (BenchctlError, ConfigurationError, InstrumentError, ProcedureError, StoreError,
                                 UsageError)

    if isinstance(exc, KeyboardInterrupt):
        # benchctl.termination.StopSignal names the signal; a bare KeyboardInterrupt is Ctrl-C.
        return ExitCode.for_signal(str(getattr(exc, "signal_name", "SIGINT")))
    if isinstance(exc, (ConfigurationError, ProcedureError, UsageError)):
        return ExitCode.BAD_INPUT
    if isinstance(exc, (InstrumentError, StoreError)):
        return ExitCode.INSTRUMENT
    if isinstance(exc, BenchctlError):
        return ExitCode.BAD_INPUT
    return ExitCode.FAILED
