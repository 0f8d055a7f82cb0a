"""The alarm state machine: normal -> alert -> danger and back, with persistence and hysteresis.

Pure logic. A state is the current level plus the window of the last ``n`` readings of the rule's
metric. :func:`step` takes one new reading and returns the new state and, when the level changed,
a :class:`Transition`. One noisy reading neither raises nor clears an alarm when ``k >= 2``.
"""

from __future__ import annotations

from dataclasses import dataclass

from .rules import LEVEL_RANK, LEVELS, RuleSpec


@dataclass(frozen=True, slots=True)
class Reading:
    """One value of a metric with the levels that applied to it (zone-based levels vary by record)."""

    value: float
    alert: float
    danger: float

    def to_list(self) -> list[float]:
        return [self.value, self.alert, self.danger]

    @classmethod
    def from_list(cls, item) -> Reading:
        return cls(float(item[0]), float(item[1]), float(item[2]))


@dataclass(frozen=True, slots=True)
class Transition:
    from_level: str
    to_level: str
    value: float
    level_value: float  # the threshold that was crossed (raise) or the clearing level (clear)

    @property
    def escalation(self) -> bool:
        return LEVEL_RANK[self.to_level] > LEVEL_RANK[self.from_level]


def _beyond(rule: RuleSpec, value: float, level: float) -> bool:
    return value >= level if rule.direction == "above" else value <= level


def _clear_level(rule: RuleSpec, level: float) -> float:
    if rule.direction == "above":
        return level * (1.0 - rule.hysteresis) if level > 0 else level - abs(level) * rule.hysteresis
    return level * (1.0 + rule.hysteresis) if level > 0 else level + abs(level) * rule.hysteresis


def _threshold(reading: Reading, level: str) -> float:
    return reading.alert if level == "alert" else reading.danger


def raised(rule: RuleSpec, window: list[Reading], level: str) -> bool:
    """At least k of the last n readings are beyond ``level``."""
    hits = sum(_beyond(rule, r.value, _threshold(r, level)) for r in window[-rule.n :])
    return hits >= rule.k


def cleared(rule: RuleSpec, window: list[Reading], level: str) -> bool:
    """At least k of the last n readings are back inside the clearing level of ``level``."""
    inside = sum(
        not _beyond(rule, r.value, _clear_level(rule, _threshold(r, level))) for r in window[-rule.n :]
    )
    return inside >= rule.k


def step(rule: RuleSpec, level: str, window: list[Reading], reading: Reading):
    """Add ``reading`` and return ``(new_level, new_window, transition_or_None)``."""
    window = [*window, reading][-rule.n :]
    new = level
    for candidate in ("danger", "alert"):
        if LEVEL_RANK[candidate] > LEVEL_RANK[level] and raised(rule, window, candidate):
            new = candidate
            break
    if new == level:
        while new != "normal" and cleared(rule, window, new):
            below = LEVELS[LEVEL_RANK[new] - 1]
            new = below
            if below != "normal" and raised(rule, window, below):
                break
    if new == level:
        return level, window, None
    if LEVEL_RANK[new] > LEVEL_RANK[level]:
        crossed = _threshold(reading, new)
    else:
        crossed = _clear_level(rule, _threshold(reading, level))
    return new, window, Transition(level, new, reading.value, crossed)


def run(rule: RuleSpec, values: list[float]) -> list[str]:
    """Levels after each value of a sequence (fixed levels); handy for checks and for the docs."""
    level, window, out = "normal", [], []
    for value in values:
        alert, danger = rule.levels()
        level, window, _ = step(rule, level, window, Reading(value, alert, danger))
        out.append(level)
    return out
