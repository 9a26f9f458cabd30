"""Exit codes of the ``benchctl`` command, and the one map from an error to its code.

0 success; 1 a run that did not complete or a check that failed; 2 bad input (files,
parameters, options: nothing was enabled); 3 an instrument or database problem; 4 a run
that could not be checked or decided against its limits (missing data, a run that did not
complete, a BORDERLINE or SUSPECT verdict); 130 interrupted (128 + SIGINT, the shell's
convention for a command ended by a signal).
"""

from __future__ import annotations

from enum import IntEnum


class ExitCode(IntEnum):
    OK = 0
    FAILED = 1
    BAD_INPUT = 2
    INSTRUMENT = 3
    NOT_CHECKED = 4
    INTERRUPTED = 130


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
    errors are trouble with the bench or the database (3); an interrupt is 130; any other
    benchctl error is treated as bad input (2) and anything else as a failure (1).
    """
    from benchctl.errors import (BenchctlError, ConfigurationError, InstrumentError, ProcedureError, StoreError,
                                 UsageError)

    if isinstance(exc, KeyboardInterrupt):
        return ExitCode.INTERRUPTED
    if isinstance(exc, (ConfigurationError, ProcedureError, UsageError)):
        return ExitCode.BAD_INPUT
    if isinstance(exc, (InstrumentError, StoreError)):
        return ExitCode.INSTRUMENT
    if isinstance(exc, BenchctlError):
        return ExitCode.BAD_INPUT
    return ExitCode.FAILED
