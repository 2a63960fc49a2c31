"""Exception classes of twinpass.

Every error a user can meet derives from :class:`TwinpassError`. Messages name the
file, the place (key, byte offset, sample index) and what to do about it.
"""

from __future__ import annotations


class TwinpassError(Exception):
    """Base class of every twinpass error."""


class ConfigError(TwinpassError, ValueError):
    """The configuration file is invalid (unknown key, wrong type, inconsistent values)."""


class SpecError(TwinpassError, ValueError):
    """The requested overall response cannot be designed as given."""


class DesignError(SpecError):
    """A design was produced but fails a check (unstable, badly conditioned, spec missed)."""


class KernelError(TwinpassError, ValueError):
    """A block window does not fit the kernel's requirements (too short, wrong shape)."""


class InputError(TwinpassError):
    """An input recording cannot be used. ``path`` names the file when known; ``remedy``,
    when given, is what to do, as the message's last clause (after "; "), for a fix that is
    not in the file itself (its sidecar, say)."""

    def __init__(self, message: str, path: str | None = None, remedy: str | None = None) -> None:
        super().__init__(message)
        self.path = path
        self.remedy = remedy


class UnsupportedFormatError(InputError):
    """No reader can open the file, or the encoding is not supported."""


class CorruptInputError(InputError):
    """The file's header or data are damaged or contradict each other."""


class DamagedInputError(CorruptInputError):
    """Part of a file's data cannot be decoded, and reading that part alone fails again (a
    damaged chunk of a Zarr array): a block is not retried for it, since a retry reads the same."""


class ArchiveError(TwinpassError):
    """Discovery, grouping into streams/segments or planning failed."""

    def __init__(self, message: str, path: str | None = None) -> None:
        super().__init__(message)
        self.path = path


class OverlapError(ArchiveError):
    """Two files of one stream overlap in time."""


class StoreError(TwinpassError):
    """The output store cannot be used (locked, unsafe path, full disk...)."""


class StoreLockedError(StoreError):
    """Another run holds the lock on the output store."""


class RunNotRecordedError(StoreError):
    """The run's blocks ended but its record could not be written to the store (the store's
    file system went read-only or full meanwhile, say). ``result`` is the run's outcome
    (a :class:`twinpass.job.RunResult`), for the command to show before the error."""

    def __init__(self, message: str, result: object = None) -> None:
        super().__init__(message)
        self.result = result


class UnsafePathError(StoreError):
    """A name derived from an input path would escape the store, or the store overlaps the inputs."""


class PrefectServerError(TwinpassError):
    """The temporary local Prefect server did not start or did not answer in time."""


class BlockFailedError(TwinpassError):
    """A block kept failing after its retries."""


class ChecksFailedError(BlockFailedError):
    """Blocks ran and were written, but their checks failed: running them again gives the same
    figures, so the segment is not retried. Inspect the figures (``twinpass status``/report)."""


class RunStoppedError(BlockFailedError):
    """The run was stopped (Ctrl-C, a run no flow run took over) before these blocks finished:
    they are recorded as not done and the segment is not retried; rerun to finish them."""

    @classmethod
    def before_start(cls, segment_id: str) -> "RunStoppedError":
        """For a segment whose task came after the run began to stop: it must not start."""
        return cls(f"segment {segment_id}: the run was stopped before this segment started; rerun to finish it")


class FlowRunCancelledError(TwinpassError):
    """The run's Prefect flow run was cancelled from the server (the dashboard's Cancel,
    ``prefect flow-run cancel``): the run was stopped before its end, as by Ctrl-C."""


class ReportNotWrittenError(TwinpassError):
    """The HTML report could not be written after a run whose outputs and records stand.

    ``exit_status`` is the run's own exit status (0, 1 or 3), which the command keeps: the
    report is made from the store and can be written again later (``twinpass report``).
    """

    def __init__(self, message: str, exit_status: int) -> None:
        super().__init__(message)
        self.exit_status = exit_status


class InjectedFault(TwinpassError):
    """Raised by the fault-injection switch (tests only)."""


CONFIG_FAILED = "a configuration error: every run fails these files alike until the configuration is fixed"
"""Said after the message of a :class:`ConfigError` that failed files (a layout no block fits,
say): running again without changing the configuration fails them the same way."""


def failure_text(error: BaseException) -> str:
    """How ``error`` is recorded as the reason files failed: twinpass's own errors by their
    message, which names the place and what to do (a :class:`ConfigError` followed by
    :data:`CONFIG_FAILED`); any other with its type's name, which the message alone may not
    make clear (``KeyError: 'x'``)."""
    if isinstance(error, ConfigError):
        return f"{error} ({CONFIG_FAILED})"
    if isinstance(error, TwinpassError):
        return str(error)
    return f"{type(error).__name__}: {error}"
