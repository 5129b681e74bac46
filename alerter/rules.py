"""Surge and drop rules, evaluated for all nodes at once.

The YAML rules are compiled once per node into threshold arrays (the first override whose
glob matches the node id wins), so a tick is a handful of vectorised comparisons. A node
fires when, for ``persistence`` consecutive observed hours, its observation is beyond the
forecast by ``z`` scales AND by ``min_excess`` visits AND by the factor ``min_ratio``, with
the expected volume at least ``min_expected``; then it is quiet for ``cooldown_hours``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .config import DirectionRule, RuleSettings

__all__ = ["RuleBook", "DIRECTIONS"]

DIRECTIONS = ("surge", "drop")
_FIELDS = ("enabled", "z", "min_excess", "min_ratio", "min_expected", "persistence", "cooldown_hours")


@dataclass
class _Thresholds:
    """Per-node thresholds of one direction plus its streak and cooldown state."""

    enabled: np.ndarray
    z: np.ndarray
    min_excess: np.ndarray
    min_ratio: np.ndarray
    min_expected: np.ndarray
    persistence: np.ndarray
    cooldown_hours: np.ndarray
    rule: np.ndarray  # index into RuleBook.rule_names
    streak: np.ndarray
    quiet_until: np.ndarray  # tick before which the node may not fire again

    @classmethod
    def empty(cls) -> _Thresholds:
        return cls(
            enabled=np.zeros(0, bool), z=np.zeros(0), min_excess=np.zeros(0),
            min_ratio=np.zeros(0), min_expected=np.zeros(0),
            persistence=np.zeros(0, np.int32), cooldown_hours=np.zeros(0, np.int64),
            rule=np.zeros(0, np.int16), streak=np.zeros(0, np.int32),
            quiet_until=np.zeros(0, np.int64),
        )

    def extend(self, rules: list[DirectionRule], rule_ids: list[int]) -> None:
        for name in _FIELDS:
            old = getattr(self, name)
            new = np.array([getattr(r, name) for r in rules], dtype=old.dtype)
            setattr(self, name, np.concatenate([old, new]))
        self.rule = np.concatenate([self.rule, np.array(rule_ids, np.int16)])
        self.streak = np.concatenate([self.streak, np.zeros(len(rules), np.int32)])
        low = np.iinfo(np.int64).min
        self.quiet_until = np.concatenate([self.quiet_until, np.full(len(rules), low, np.int64)])


class RuleBook:
    """Compiled rules and their per-node state.

    >>> import numpy as np
    >>> from alerter.config import RuleSettings
    >>> book = RuleBook(RuleSettings())
    >>> book.add_nodes(["/a", "/b"])
    >>> up, down = book.evaluate(np.array([500.0, 100.0]), np.array([100.0, 100.0]),
    ...                          np.array([9.0, 0.1]), np.array([True, True]), tick=0)
    >>> up.tolist(), down.tolist()
    ([True, False], [False, False])
    """

    def __init__(self, settings: RuleSettings) -> None:
        self.settings = settings
        self.rule_names = ["default"] + [o.name for o in settings.overrides]
        self.by_direction = {d: _Thresholds.empty() for d in DIRECTIONS}
        self.active: dict[str, np.ndarray] = {d: np.zeros(0, bool) for d in DIRECTIONS}
        # nodes that met the rule (streak included) this hour but were held back by cooldown
        self.suppressed: dict[str, np.ndarray] = {d: np.zeros(0, bool) for d in DIRECTIONS}

    @property
    def n(self) -> int:
        return int(self.by_direction["surge"].z.shape[0])

    def _resolve(self, node: str) -> tuple[int, DirectionRule, DirectionRule]:
        s = self.settings
        for k, override in enumerate(s.overrides, start=1):
            if override.matches(node):
                return k, override.surge.apply(s.surge), override.drop.apply(s.drop)
        return 0, s.surge, s.drop

    def add_nodes(self, ids: list[str]) -> None:
        """Compile thresholds for newly interned nodes (in index order)."""
        resolved = [self._resolve(node) for node in ids]
        ids_ = [r[0] for r in resolved]
        self.by_direction["surge"].extend([r[1] for r in resolved], ids_)
        self.by_direction["drop"].extend([r[2] for r in resolved], ids_)

    def z(self, direction: str) -> np.ndarray:
        return self.by_direction[direction].z

    def rule_name(self, direction: str, node: int) -> str:
        return self.rule_names_of(direction, np.array([node]))[0]

    def streak(self, direction: str, node: int) -> int:
        return int(self.by_direction[direction].streak[node])

    def rule_names_of(self, direction: str, nodes: np.ndarray) -> list[str]:
        """:meth:`rule_name` of each of ``nodes`` (indices)."""
        names = [f"{direction}:{name}" for name in self.rule_names]
        return [names[k] for k in self.by_direction[direction].rule[nodes].tolist()]

    def streaks_of(self, direction: str, nodes: np.ndarray) -> list[int]:
        """:meth:`streak` of each of ``nodes`` (indices)."""
        return self.by_direction[direction].streak[nodes].tolist()

    def evaluate(self, observed: np.ndarray, expected: np.ndarray, score: np.ndarray,
                 eligible: np.ndarray, tick: int, expected_drop: np.ndarray | None = None,
                 score_drop: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Masks of nodes firing a surge and a drop alert this hour.

        ``observed`` and ``expected`` are counts, ``score`` the signed residual in scales,
        ``eligible`` the nodes that may alert (observed, warm, not imputed). Drops may be
        judged against their own expectation and score (``expected_drop``, ``score_drop``).
        """
        exp_dn = expected if expected_drop is None else expected_drop
        sc_dn = score if score_drop is None else score_drop
        with np.errstate(invalid="ignore"):
            up = self._direction("surge", score, observed - expected, (observed + 1.0) / (expected + 1.0),
                                 expected, eligible, tick)
            down = self._direction("drop", -sc_dn, exp_dn - observed, (exp_dn + 1.0) / (observed + 1.0),
                                   exp_dn, eligible, tick)
        return up, down

    def _direction(self, direction: str, score: np.ndarray, excess: np.ndarray, ratio: np.ndarray,
                   expected: np.ndarray, eligible: np.ndarray, tick: int) -> np.ndarray:
        t = self.by_direction[direction]
        cond = eligible & t.enabled & (score >= t.z) & (excess >= t.min_excess)
        cond &= (ratio >= t.min_ratio) & (expected >= t.min_expected)
        self.active[direction] = cond
        t.streak = np.where(cond, t.streak + 1, 0).astype(np.int32)
        due = cond & (t.streak >= t.persistence)
        fire = due & (tick >= t.quiet_until)
        self.suppressed[direction] = due & ~fire
        t.quiet_until = np.where(fire, tick + t.cooldown_hours, t.quiet_until)
        return fire
