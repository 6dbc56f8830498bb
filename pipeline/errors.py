"""Every error upwell raises on purpose, in one place.

Each class says when it is raised. Lower-level exceptions (pypdf, python-docx, LanceDB, OS) are
mapped to these at the boundary, so callers catch one family and the CLI can print one clear line
with a distinct exit code instead of a traceback.
"""

from __future__ import annotations

# Exit codes of the ``upwell`` command, in one table. An error carries its own ``exit_code``.
EXIT_OK = 0
EXIT_ERROR = 1
EXIT_USAGE = 2  # a usage error, or a confirmation that needed --yes
EXIT_PARTIAL = 3  # committed, but some documents failed
EXIT_LOCKED = 4  # another process is writing the index
EXIT_INCONSISTENT = 5  # verify found problems
EXIT_PAUSED = 6  # syncing is paused after rollback --pause


class UpwellError(Exception):
    """Base of every error upwell raises on purpose."""

    exit_code = EXIT_ERROR


class UsageError(UpwellError):
    """The command line or a setting is wrong."""

    exit_code = EXIT_USAGE


# --- extraction: a document that cannot be turned into text --------------------------------


class ExtractionError(UpwellError):
    """A document could not be extracted; the message is the reason shown in status."""


class EmptyDocument(ExtractionError):
    """The file has no bytes, or no text at all after extraction."""


class CorruptDocument(ExtractionError):
    """The file is damaged or is not what its suffix says (a .docx that is not a zip, ...)."""


class EncryptedDocument(ExtractionError):
    """The file is encrypted; upwell does not guess passwords."""


class UnsupportedDocument(ExtractionError):
    """The file's format, or a feature inside it (a DOCTYPE in OOXML), is not supported."""


class DocumentTooLarge(ExtractionError):
    """The file, or what it would inflate to, is larger than the configured limit."""


class NoTextLayer(ExtractionError):
    """A PDF whose pages carry no extractable text (scanned images)."""


class DocumentUnreadable(ExtractionError):
    """The file vanished or became unreadable between listing and reading."""


# --- sources ---------------------------------------------------------------------------------


class SourceError(UpwellError):
    """A source as a whole cannot be listed; never treated as an empty source."""

    source: str | None = None  # the source's name, set by the engine


class SourceUnreachable(SourceError):
    """The source root is missing, not a folder, or cannot be reached."""


class SourcePermission(SourceError):
    """The source root exists but cannot be read."""


# --- index -----------------------------------------------------------------------------------


class StoreError(UpwellError):
    """A problem with the index folder itself."""


class IndexLocked(StoreError):
    """Another writer holds the index lock."""

    exit_code = EXIT_LOCKED


class ModelMismatch(StoreError):
    """The index was built with another embedding model or chunking settings."""


class UnknownVersion(StoreError):
    """A commit id, version, tag or time does not name anything in the history."""


class IndexMissing(StoreError):
    """A read-only command was pointed at a folder that holds no upwell index."""


class SyncPaused(StoreError):
    """Syncing is paused after a rollback; ``upwell resume`` lifts it."""

    exit_code = EXIT_PAUSED


class ConfirmationRequired(UpwellError):
    """A destructive step needs confirmation and none was given (no terminal and no --yes)."""

    exit_code = EXIT_USAGE


# --- embedding -------------------------------------------------------------------------------


class EmbedderError(UpwellError):
    """The embedding model could not be loaded or failed to run."""


def first_line(exc: BaseException) -> str:
    """The first line of an exception's message (its type's name if it has none), for a log
    line or a status entry that must stay one line."""
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__
