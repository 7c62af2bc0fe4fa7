"""Domain errors. Each names what it is about (file, row, key) and how to fix it.

Only the CLI turns them into messages and exit codes: 2 for bad usage or config,
1 for a run that failed.
"""

from __future__ import annotations


class DigestError(Exception):
    """Base class for every error the tool raises on purpose."""

    exit_code = 1


class ConfigError(DigestError):
    """The configuration (TOML, recipients, templates) is wrong. One line per problem."""

    exit_code = 2

    def __init__(self, problems: list[str] | str) -> None:
        self.problems = [problems] if isinstance(problems, str) else list(problems)
        super().__init__("\n".join(self.problems))


class HierarchyError(ConfigError):
    """units.csv cannot form one reporting hierarchy."""


class DataError(DigestError):
    """The input data cannot be used for a run (e.g. too many rejected rows)."""


class StageError(DigestError):
    """A pipeline stage failed; later stages did not run."""

    def __init__(self, stage: str, cause: BaseException) -> None:
        self.stage = stage
        self.cause = cause
        super().__init__(f"stage {stage!r} failed: {type(cause).__name__}: {cause}")


class DeliveryError(DigestError):
    """A message could not be handed to the relay."""

    def __init__(self, message: str, *, permanent: bool, code: int | None = None) -> None:
        self.permanent = permanent
        self.code = code
        super().__init__(message)
