"""A CPU-only mock of a continuous-batching LLM inference server, over real HTTP/1.1.

It speaks the chat-completions protocol (streaming and not), paces tokens by a simple
engine model (``engine``), and knows its own analytic steady state (``ground_truth``), so
load-testing code can be checked with no GPU and no network. It can also misbehave on
purpose, counting what it did (``faults``), and imitate real servers' quirks (``quirks``).
For checks against queueing theory it can run as an M/M/c queue instead (``queueing``).
"""

from mock_server.config import ConfigError, load_config, preset_names
from mock_server.engine import Engine, EngineConfig, GroundTruth, ground_truth
from mock_server.faults import FaultPlan, FaultSettings
from mock_server.launch import MockStartError, RunningMock, ServingMock, serve, start_subprocess
from mock_server.queueing import QueueingConfig, QueueingEngine
from mock_server.quirks import Quirks
from mock_server.scheduler import AdmissionRejected
from mock_server.simulate import SimulationResult, simulate_closed_loop
from mock_server.text import count_tokens

__all__ = [
    "AdmissionRejected",
    "ConfigError",
    "Engine",
    "EngineConfig",
    "FaultPlan",
    "FaultSettings",
    "GroundTruth",
    "MockStartError",
    "QueueingConfig",
    "QueueingEngine",
    "Quirks",
    "RunningMock",
    "ServingMock",
    "SimulationResult",
    "count_tokens",
    "ground_truth",
    "load_config",
    "preset_names",
    "serve",
    "simulate_closed_loop",
    "start_subprocess",
]
