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
from loadrun.frontier import (
    Frontier,
    FrontierPoint,
    MeasuredTarget,
    blended_cost,
    mixture_percentiles_us,
    routing_frontier,
)
from loadrun.gate import GateReport, GateSettings, Rule, Verdict, gate_folder, gate_measure, gate_summary
from loadrun.generator_health import CpuMeter, assess_generator
from loadrun.history import History, HistoryRun, MetricPercentile, RunFilter
from loadrun.metrics import HistogramSet, LatencyHistogram
from loadrun.pipeline import (
    PipelineProfile,
    PipelineResult,
    PipelineSettings,
    load_pipeline_profile,
    run_pipeline,
    run_pipeline_async,
)
from loadrun.profile import LoadSpec, Profile, PromptSet, RequestSpec, Session, SharedPrefix, load_profile
from loadrun.prompts import Calibration, TokenFit, calibrate_tokens, synthesize
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record, TokenSource
from loadrun.recorder import Recorder
from loadrun.report.html import write_report
from loadrun.retry import RetryPolicy, parse_retry_after
from loadrun.routing import (
    RoutedProfile,
    RoutedResult,
    RouteSettings,
    load_routed_profile,
    run_routed,
    run_routed_async,
)
from loadrun.runner import MeasureSettings, RunResult, measure, measure_async
from loadrun.scale import measure_scaled
from loadrun.shard_merge import merge_summaries
from loadrun.shards import ShardSpec, split_settings
from loadrun.slo import Slo
from loadrun.sse import EventStreamParser, ServerSentEvent
from loadrun.target import Target
from loadrun.target_pool import LevelOverrides
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
    "CpuMeter",
    "Distribution",
    "ErrorShareSlo",
    "EventStreamParser",
    "Frontier",
    "FrontierPoint",
    "GateOutputs",
    "GateReport",
    "GateSettings",
    "HistogramSet",
    "History",
    "HistoryRun",
    "JsonSchemaCheck",
    "LatencyHistogram",
    "LevelOverrides",
    "LoadSpec",
    "LoadrunError",
    "MeasureSettings",
    "MeasuredTarget",
    "MeasurementError",
    "MetricPercentile",
    "OpenLoopPlan",
    "Outcome",
    "PercentileSlo",
    "PipelineProfile",
    "PipelineResult",
    "PipelineSettings",
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
    "RouteSettings",
    "RoutedProfile",
    "RoutedResult",
    "Rule",
    "RunFilter",
    "RunResult",
    "SearchBudget",
    "ServerSentEvent",
    "Session",
    "ShardSpec",
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
    "assess_generator",
    "blended_cost",
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
    "load_pipeline_profile",
    "load_profile",
    "load_routed_profile",
    "load_targets",
    "load_trace",
    "make_arrivals",
    "mean_time_in_system_s",
    "mean_wait_s",
    "measure",
    "measure_async",
    "measure_scaled",
    "merge_summaries",
    "mixture_percentiles_us",
    "parse_retry_after",
    "post_webhook",
    "routing_frontier",
    "run_closed_loop",
    "run_open_loop",
    "run_pipeline",
    "run_pipeline_async",
    "run_routed",
    "run_routed_async",
    "service_level",
    "split_settings",
    "synthesize",
    "wait_longer_than",
    "write_report",
]
