"""loadrun: benchmark and load-test chat-completions endpoints, honestly measured."""

from loadrun._version import __version__
from loadrun.client import ChatClient
from loadrun.driver import ClosedLoopPlan, run_closed_loop
from loadrun.errors import (
    LoadrunError,
    MeasurementError,
    ProfileError,
    ProtocolViolation,
    RequestFailed,
    StoreError,
    TargetError,
    TargetUnreachable,
    UsageError,
)
from loadrun.metrics import HistogramSet, LatencyHistogram
from loadrun.profile import LoadSpec, Profile, RequestSpec, load_profile
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record, TokenSource
from loadrun.recorder import Recorder
from loadrun.runner import MeasureSettings, RunResult, measure, measure_async
from loadrun.slo import Slo
from loadrun.sse import EventStreamParser, ServerSentEvent
from loadrun.target import Target

__all__ = [
    "ChatClient",
    "ChatRequest",
    "ClosedLoopPlan",
    "EventStreamParser",
    "HistogramSet",
    "LatencyHistogram",
    "LoadSpec",
    "LoadrunError",
    "MeasureSettings",
    "MeasurementError",
    "Outcome",
    "Profile",
    "ProfileError",
    "ProtocolViolation",
    "Record",
    "Recorder",
    "RequestFailed",
    "RequestSpec",
    "RunResult",
    "ServerSentEvent",
    "Slo",
    "StoreError",
    "Target",
    "TargetError",
    "TargetUnreachable",
    "TokenSource",
    "UsageError",
    "__version__",
    "load_profile",
    "measure",
    "measure_async",
    "run_closed_loop",
]
