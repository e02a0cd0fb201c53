"""loadrun: benchmark and load-test chat-completions endpoints, honestly measured."""

from loadrun._version import __version__
from loadrun.alerts import GateOutputs, deliver, post_webhook
from loadrun.answers import Answer, AnswerTap, collecting_answer
from loadrun.arrivals import (
    BurstyArrivals,
    ConstantArrivals,
    PoissonArrivals,
    TraceArrivals,
    TraceEntry,
    load_trace,
    make_arrivals,
)
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
from loadrun.checks import ChoiceCheck, JsonSchemaCheck, RegexCheck
from loadrun.class_tally import ClassTally
from loadrun.client import ChatClient
from loadrun.compare import CompareSettings, ComparisonResult, compare, compare_async
from loadrun.cost import ReplicaPrice, TokenPrices
from loadrun.distributions import Distribution
from loadrun.driver import ClosedLoopPlan, OpenLoopPlan, run_closed_loop, run_open_loop
from loadrun.erlang import erlang_c, mean_time_in_system_s, mean_wait_s, service_level, wait_longer_than
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
from loadrun.profile import LoadSpec, Profile, PromptSet, RequestSpec, Session, SharedPrefix, load_profile
from loadrun.prompts import Calibration, TokenFit, calibrate_tokens, synthesize
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
from loadrun.workload import Conversation, Workload

__all__ = [
    "AdviceSettings",
    "Answer",
    "AnswerTap",
    "BurstyArrivals",
    "Calibration",
    "CapacityResult",
    "CapacitySettings",
    "ChatClient",
    "ChatRequest",
    "ChoiceCheck",
    "ClassTally",
    "ClosedLoopPlan",
    "CompareSettings",
    "ComparisonResult",
    "ConstantArrivals",
    "Conversation",
    "Distribution",
    "ErrorShareSlo",
    "EventStreamParser",
    "GateOutputs",
    "GateReport",
    "GateSettings",
    "HistogramSet",
    "History",
    "HistoryRun",
    "JsonSchemaCheck",
    "LatencyHistogram",
    "LoadSpec",
    "LoadrunError",
    "MeasureSettings",
    "MeasurementError",
    "MetricPercentile",
    "OpenLoopPlan",
    "Outcome",
    "PercentileSlo",
    "PoissonArrivals",
    "Prices",
    "Profile",
    "ProfileError",
    "PromptSet",
    "ProtocolViolation",
    "Record",
    "Recorder",
    "RegexCheck",
    "ReplicaPrice",
    "RequestFailed",
    "RequestSpec",
    "RetryPolicy",
    "Rule",
    "RunFilter",
    "RunResult",
    "SearchBudget",
    "ServerSentEvent",
    "Session",
    "SharedPrefix",
    "Slo",
    "StepPolicy",
    "StoreError",
    "Target",
    "TargetError",
    "TargetSpec",
    "TargetUnreachable",
    "TargetsFile",
    "Timeouts",
    "TokenFit",
    "TokenPrices",
    "TokenSource",
    "TraceArrivals",
    "TraceEntry",
    "UsageError",
    "UslFit",
    "Verdict",
    "Workload",
    "__version__",
    "calibrate_tokens",
    "collecting_answer",
    "compare",
    "compare_async",
    "deliver",
    "erlang_c",
    "export_folder",
    "find_capacity",
    "find_capacity_async",
    "fit_usl",
    "gate_folder",
    "gate_measure",
    "gate_summary",
    "load_profile",
    "load_targets",
    "load_trace",
    "make_arrivals",
    "mean_time_in_system_s",
    "mean_wait_s",
    "measure",
    "measure_async",
    "parse_retry_after",
    "post_webhook",
    "run_closed_loop",
    "run_open_loop",
    "service_level",
    "synthesize",
    "wait_longer_than",
    "write_report",
]
