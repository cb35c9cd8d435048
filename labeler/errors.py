"""One exception tree for the whole tool.

Every error says what was wrong, where (file, column, sample rows) and what to do. The CLI maps
these classes to exit codes at the edge; the library never calls ``sys.exit``.
"""
from __future__ import annotations


class LabelerError(ValueError):
    """Root of every error the tool raises on purpose."""

    exit_code = 2


class ConfigError(LabelerError):
    """A setting is unknown, mistyped or out of range."""


class InputError(LabelerError):
    """An input table breaks its column contract (missing column, bad value, empty file)."""

    def __init__(self, message: str, *, source: str | None = None, column: str | None = None,
                 sample: list | None = None, hint: str | None = None):
        parts = []
        if source:
            parts.append(f"{source}:")
        if column:
            parts.append(f"column '{column}':")
        parts.append(message)
        text = " ".join(parts)
        if sample:
            shown = "; ".join(str(s) for s in sample[:5])
            text += f" Offending rows (first {min(len(sample), 5)}): {shown}."
        if hint:
            text += f" {hint}"
        super().__init__(text)
        self.source, self.column, self.sample, self.hint = source, column, sample or [], hint


class ModelNotFoundError(LabelerError):
    """No embedding model could be resolved without network access."""


class ArtifactError(LabelerError):
    """An on-disk artifact (taxonomy, store) is missing, corrupt or from an unknown format."""


class RejectedError(LabelerError):
    """The run finished its checks and rejected something (a gate failed)."""

    exit_code = 1


class EngineError(LabelerError):
    """The engine failed while running (for example it ran out of memory)."""

    exit_code = 1


class LockedError(LabelerError):
    """Another run holds the lock."""

    exit_code = 3


def environment_error(exc: BaseException) -> "EngineError | None":
    """A clear error for a fault of the machine (a full disk, a read-only or forbidden folder), or
    None if ``exc`` is not one. Writers here write to temporary names and rename last, so such a
    fault leaves the previous outputs in force."""
    import errno
    import sqlite3
    if isinstance(exc, sqlite3.OperationalError) and "full" in str(exc).lower():
        return EngineError(f"disk full while writing the store ({exc}). Nothing was published: the previous "
                           "snapshot is still served. Free space and run again.")
    if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return EngineError(f"disk full while writing {exc.filename or 'an output'} ({exc.strerror}). Nothing was "
                           "committed: the previous outputs are intact. Free space and run again.")
    if isinstance(exc, OSError) and exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
        return EngineError(f"cannot write {exc.filename or 'an output'} ({exc.strerror}). Nothing was committed. "
                           "Point the output at a folder you can write to, or fix its permissions.")
    if isinstance(exc, sqlite3.OperationalError) and ("readonly" in str(exc).lower() or "unable to open" in str(exc)):
        return EngineError(f"cannot write the store ({exc}). Nothing was published. Check the store folder's "
                           "permissions and free space.")
    return None
