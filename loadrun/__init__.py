"""loadrun: benchmark and load-test chat-completions endpoints, honestly measured."""

from loadrun._version import __version__
from loadrun.alerts import GateOutputs, deliver, post_webhook
from loadrun.capacity import (
    AdviceSettings,
    CapacityResult,
    CapacitySettings,
    SearchBudget,
    StepPolicy,
    find_capacity,
    find_capacity_async,
)
from loadrun.capacity_steps import ErrorShareSlo, PercentileSlo
from loadrun.client import ChatClient
from loadrun.compare import CompareSettings, ComparisonResult, compare, compare_async
from loadrun.cost import ReplicaPrice, TokenPrices
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
from loadrun.export import export_folder
from loadrun.fits import UslFit, fit_usl
from loadrun.gate import GateReport, GateSettings, Rule, Verdict, gate_folder, gate_measure, gate_summary
from loadrun.history import History, HistoryRun, MetricPercentile, RunFilter
from loadrun.metrics import HistogramSet, LatencyHistogram
from loadrun.profile import LoadSpec, Profile, RequestSpec, load_profile
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record, TokenSource
from loadrun.recorder import Recorder
from loadrun.report.html import write_report
from loadrun.retry import RetryPolicy, parse_retry_after
from loadrun.runner import MeasureSettings, RunResult, measure, measure_async
from loadrun.slo import Slo
from loadrun.sse import EventStreamParser, ServerSentEvent
from loadrun.target import Target
from loadrun.targets import Prices, TargetsFile, TargetSpec, load_targets
from loadrun.timeouts import Timeouts

__all__ = [
    "AdviceSettings",
    "CapacityResult",
    "CapacitySettings",
    "ChatClient",
    "ChatRequest",
    "ClosedLoopPlan",
    "CompareSettings",
    "ComparisonResult",
    "ErrorShareSlo",
    "EventStreamParser",
    "GateOutputs",
    "GateReport",
    "GateSettings",
    "HistogramSet",
    "History",
    "HistoryRun",
    "LatencyHistogram",
    "LoadSpec",
    "LoadrunError",
    "MeasureSettings",
    "MeasurementError",
    "MetricPercentile",
    "Outcome",
    "PercentileSlo",
    "Prices",
    "Profile",
    "ProfileError",
    "ProtocolViolation",
    "Record",
    "Recorder",
    "ReplicaPrice",
    "RequestFailed",
    "RequestSpec",
    "RetryPolicy",
    "Rule",
    "RunFilter",
    "RunResult",
    "SearchBudget",
    "ServerSentEvent",
    "Slo",
    "StepPolicy",
    "StoreError",
    "Target",
    "TargetError",
    "TargetSpec",
    "TargetUnreachable",
    "TargetsFile",
    "Timeouts",
    "TokenPrices",
    "TokenSource",
    "UsageError",
    "UslFit",
    "Verdict",
    "__version__",
    "compare",
    "compare_async",
    "deliver",
    "export_folder",
    "find_capacity",
    "find_capacity_async",
    "fit_usl",
    "gate_folder",
    "gate_measure",
    "gate_summary",
    "load_profile",
    "load_targets",
    "measure",
    "measure_async",
    "parse_retry_after",
    "post_webhook",
    "run_closed_loop",
    "write_report",
]
