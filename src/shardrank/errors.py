"""The one error tree of shardrank.

Library code raises these; only the CLI prints them (an ``error:`` line and a ``hint:`` line)
and turns them into an exit code. Anything else that escapes is a bug and keeps its traceback.

::

    ShardrankError                exit 1   base class; never raised directly
    +-- BadInputError             exit 2   the user's input or options are wrong
    +-- NotConvergedError         exit 3   the run stopped at --max-iter before reaching --tol
    +-- DamagedDataError          exit 4   a store, run or checkpoint failed verification
    +-- GuardFailedError          exit 5   a refresh result failed a publishing guard
    +-- EngineLostError           exit 6   the distributed engine lost its cluster; resumable
    +-- BusyError                 exit 75  another process holds the lock (EX_TEMPFAIL)
"""

from __future__ import annotations


class ShardrankError(Exception):
    """Base of every error shardrank raises on purpose."""

    exit_code = 1

    def __init__(self, message: str, hint: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint

    def __str__(self) -> str:
        return self.message if not self.hint else f"{self.message} (hint: {self.hint})"


class BadInputError(ShardrankError):
    """The input files or the options are wrong; nothing was written."""

    exit_code = 2


class NotConvergedError(ShardrankError):
    """The iteration reached --max-iter with an error bound above --tol; the run is saved."""

    exit_code = 3


class DamagedDataError(ShardrankError):
    """A file of a store, run or checkpoint does not match its manifest."""

    exit_code = 4


class GuardFailedError(ShardrankError):
    """A freshly computed result failed a publishing guard; it was kept but not published."""

    exit_code = 5


class EngineLostError(ShardrankError):
    """The distributed engine lost its scheduler or workers mid-run; the checkpoints are intact."""

    exit_code = 6


class BusyError(ShardrankError):
    """Another shardrank process holds the lock; try again later."""

    exit_code = 75


EXIT_CODES: dict[int, str] = {
    0: "success",
    1: "unexpected internal error (a bug: please report it with the traceback)",
    2: "bad input or options: nothing was written",
    3: "not converged within --max-iter: the run is saved with its error bound",
    4: "damaged data: a store, run or checkpoint failed verification",
    5: "a refresh result failed a publishing guard: kept, not published",
    6: "the distributed engine lost its cluster: restart it, then `shardrank resume RUN`",
    75: "busy: another process holds the lock; try again later",
    130: "interrupted (Ctrl-C): resume with `shardrank resume RUN`",
}
