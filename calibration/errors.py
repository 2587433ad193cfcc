"""The errors a user can cause, in one light module (no numpy, pandas or scipy at import).

The command line imports these to map them to exit codes before any numerical package
is loaded, so a bad argument or a missing file answers at once.
"""

from __future__ import annotations

from collections.abc import Sequence


class InputError(ValueError):
    """A data or spec file cannot be used; ``problems`` lists each finding."""

    def __init__(
        self, source: str, problems: Sequence[str], *, total: int | None = None, advice: Sequence[str] = ()
    ) -> None:
        self.source = source
        self.problems = list(problems)
        self.total = total if total is not None else len(self.problems)
        more = f"\n  ... and {self.total - len(self.problems)} more" if self.total > len(self.problems) else ""
        listing = "\n".join(f"  - {p}" for p in self.problems)
        hints = "".join(f"\n  {a}" for a in advice)  # what to do about the problems as a whole
        super().__init__(f"{source}: {self.total} problem(s)\n{listing}{more}{hints}")


class CalibrationInputError(ValueError):
    """The data cannot support a calibration (too few respondents or items, unknown group or anchor)."""


class UnknownGroup(ValueError):
    """Respondents whose group is not a group of the bundle (or who name none where one is needed).

    ``problems`` lists (0-based respondent position, group or None) for every such respondent;
    ``index`` and ``group`` are the first of them.
    """

    def __init__(self, message: str, *, problems: list[tuple[int, str | None]]) -> None:
        super().__init__(message)
        self.problems = problems
        self.index, self.group = problems[0]


class BundleError(Exception):
    """Base class of bundle and store errors."""


class BundleIntegrityError(BundleError):
    """A stored bundle is damaged, truncated, tampered with or not a bundle.

    ``str(exc)`` says what is wrong without naming where it is stored; ``location`` (a file
    path or a Redis key) is for operators and the command line, never for an API answer.
    """

    def __init__(self, message: str, *, location: str | None = None) -> None:
        super().__init__(message)
        self.location = location


class BundleNotFound(BundleError):
    """No bundle (or no such version or alias) under that name."""


class VersionConflict(BundleError):
    """That version already exists with other content."""


class InvalidReference(BundleError):
    """A bundle name, version or alias is malformed."""


class InvalidBundleDocument(BundleError):
    """A bundle offered for publishing is not acceptable (its stated hash does not match, ...)."""


class StoreUnavailable(BundleError):
    """The shared store cannot be reached (reads may still be served from a cache)."""


def redact_url(url: str) -> str:
    """A store URL fit for messages and logs: any user name and password replaced by ``***``."""
    from urllib.parse import urlsplit, urlunsplit

    try:
        parts = urlsplit(url)
    except ValueError:
        return "<unparsable store URL>"
    if parts.password is None and parts.username is None:
        return url
    host = parts.hostname or ""
    if ":" in host:
        host = f"[{host}]"
    netloc = "***@" + host + (f":{parts.port}" if parts.port else "")
    return urlunsplit((parts.scheme, netloc, parts.path, parts.query, parts.fragment))
