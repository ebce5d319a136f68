"""The exception tree of report-kit.

Every error the library raises on purpose derives from :class:`ReportKitError`.
The command line catches that base class once and maps it to an exit code:

=========================  =========  ==========================================
class                      exit code  raised when
=========================  =========  ==========================================
``SpecError``              1          ``design.yaml`` is missing, unreadable or invalid
``DataError``              1          an input table is missing, unreadable or invalid
``DesignError``            1          data and design disagree (e.g. a cluster split across arms)
``ArchiveError``           1          an archive is unsafe, too large once unpacked, or not a report-kit archive
``OutputError``            1          a run folder or file cannot be written (path named)
``UsageError``             2          a command was called the wrong way (bad path, bad option)
``VerificationError``      3          ``verify`` found a difference
=========================  =========  ==========================================

Library misuse from Python (an argument of the wrong type or out of range)
raises plain ``TypeError`` or ``ValueError``, not ``UsageError``; the command
line validates its own options and maps the errors they cause to exit code 2.

Degenerate-but-computable situations warn with :class:`ReportKitWarning`
instead of failing.
"""

from __future__ import annotations


class ReportKitError(Exception):
    """Base class of every error report-kit raises on purpose."""

    exit_code: int = 1


class SpecError(ReportKitError):
    """The design spec is invalid; the message names file, key path and expectation."""


class DataError(ReportKitError):
    """An input table is invalid; the message names file, row/id and column."""


class DesignError(ReportKitError):
    """Data and design disagree, or a design cannot support the requested analysis."""


class ArchiveError(ReportKitError):
    """An archive was refused: unsafe members, too large unpacked, or not a report-kit archive."""


class OutputError(ReportKitError):
    """The tool cannot write its output; the message names the path and what to do."""


class UsageError(ReportKitError):
    """A command was called the wrong way."""

    exit_code = 2


class VerificationError(ReportKitError):
    """A re-run or a checksum disagreed with the recorded run."""

    exit_code = 3


class ReportKitWarning(UserWarning):
    """Degenerate but computable input (e.g. a zero-variance arm)."""
