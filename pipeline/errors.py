"""One exception family for the tool.

Every user-caused failure raises a subclass of :class:`ShotsmithError` with a
one-line message that names the file or option and the reason. The CLI turns
these into ``error: <message>`` on stderr and exit code 1.
"""

from __future__ import annotations


class ShotsmithError(Exception):
    """Root of every error the tool reports to a user."""


class ParameterError(ShotsmithError, ValueError):
    """A bad argument value passed to a public function or option."""


class PresetError(ShotsmithError):
    """A preset file that cannot be read, or a key or value in it that is wrong.

    ``key`` is the setting at fault (``"render.peak_db"``) when there is one, so a
    caller that set it (the CLI, from an option) can say which of its inputs was wrong.
    """

    def __init__(self, message: str, *, key: str | None = None) -> None:
        super().__init__(message)
        self.key = key


class AudioError(ShotsmithError):
    """An audio file that cannot be used (undecodable, empty, silent, non-finite...)."""


class BankError(ShotsmithError):
    """A bank folder that is missing, incomplete or made with other settings."""


class ModelFileError(ShotsmithError):
    """A model file that is not a shotsmith model, is truncated, or is from a newer format."""


class OutputError(ShotsmithError):
    """An output that cannot be written: read-only folder, full disk, existing file."""


class TrainingError(ShotsmithError):
    """Training that cannot go on (for example a loss that turned non-finite)."""
