"""Surge and drop alerts over a live link graph of hourly counts.

Every node (a page, a service, a station) reports an hourly count. The engine keeps, per
node, a robust double-seasonal baseline on a variance-stabilised scale and fires an alert
when an hour lies beyond the expected band by thresholds the analyst sets in YAML. The
engine is pure: arrays in, plain records out; recordings, Redis and chat live in adapters.

Alerts are estimates from past behaviour. They say a count is unusual against the learned
baseline; they do not prove what caused it.
"""

from .baseline import BaselineState, SeasonalBaseline
from .compare import Comparison, compare_runs
from .config import Config, load_config, parse_config
from .engine import Engine, StepResult
from .errors import AlerterError, ConfigError, HourRangeError, LabelsError, RecordingError, UnknownNodeError
from .metrics import smape
from .records import Alert, NodeHour
from .replay import ReplayResult, replay
from .rules import RuleBook
from .scoring import Labels, Score, load_labels, score_alerts

__all__ = [
    "Alert",
    "AlerterError",
    "BaselineState",
    "Comparison",
    "Config",
    "ConfigError",
    "Engine",
    "HourRangeError",
    "Labels",
    "LabelsError",
    "NodeHour",
    "RecordingError",
    "ReplayResult",
    "RuleBook",
    "Score",
    "SeasonalBaseline",
    "StepResult",
    "UnknownNodeError",
    "compare_runs",
    "load_config",
    "load_labels",
    "parse_config",
    "replay",
    "score_alerts",
    "smape",
]
