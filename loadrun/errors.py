"""One exception tree for everything loadrun raises on purpose.

    LoadrunError                 base: the CLI prints "Type: message" and exits non-zero
    ├── UsageError               bad input from the user (profile, option, file): exit 2
    │   └── ProfileError         a profile file that does not load or validate
    ├── TargetError              the endpoint under test misbehaves or cannot be reached
    │   ├── TargetUnreachable    no connection could be made at all
    │   ├── ProtocolViolation    the server's bytes break HTTP, SSE or the chat protocol
    │   └── RequestFailed        one request failed; carries its Outcome (caught per request)
    ├── MeasurementError         loadrun could not record a value it measured
    └── StoreError               a run folder or history file could not be written or read

Third-party errors are translated where they enter (``raise ... from exc``); per-request
failures during a run are not exceptions at all but outcomes on a Record, so that a bad
request is counted and the run goes on.
"""

from __future__ import annotations


class LoadrunError(Exception):
    """Base of every error loadrun raises on purpose."""

    exit_code = 1


class UsageError(LoadrunError):
    """The user gave input that cannot be used."""

    exit_code = 2


class ProfileError(UsageError):
    """A profile file failed to load or validate."""


class TargetError(LoadrunError):
    """The endpoint under test cannot be used."""


class TargetUnreachable(TargetError):
    """No connection to the endpoint could be made."""


class ProtocolViolation(TargetError):
    """The server sent something that breaks HTTP, server-sent events or the chat protocol."""


class MeasurementError(LoadrunError):
    """A measured value could not be recorded."""


class StoreError(LoadrunError):
    """A result could not be written to or read from disk."""


class RequestFailed(TargetError):
    """One request failed in the transport; ``outcome`` names how (a record.Outcome value).

    Raised by transports and caught by the client, which writes it onto the request's
    Record: a failed request is counted, never fatal to the run.
    """

    def __init__(self, outcome: str, message: str) -> None:
        super().__init__(message)
        self.outcome = outcome
