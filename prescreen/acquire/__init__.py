"""prescreen.acquire: which candidates to compute next, and when to stop.

Three layers, kept apart (see ``STYLE.md``): *measures* score each candidate
(:mod:`~prescreen.acquire.measures`), *selectors* pick a batch under a core-hour budget
(:mod:`~prescreen.acquire.selectors`), *strategies* join the two with one signature
(:mod:`~prescreen.acquire.strategies`). :mod:`~prescreen.acquire.cost` predicts
core-hours, :mod:`~prescreen.acquire.stopping` says what is left in the pool and
:mod:`~prescreen.acquire.replay` replays campaigns on labelled data.
"""

from __future__ import annotations

from prescreen.acquire.cost import CostModel
from prescreen.acquire.measures import PoolView, expected_hits
from prescreen.acquire.stopping import StopEstimate, stop_estimate
from prescreen.acquire.strategies import (
    Proposal,
    Strategy,
    TwoPhase,
    expected_hits_per_core_hour,
    explore_distance,
    explore_spread,
    greedy_probability,
    random_selection,
    thompson_sampling,
    two_phase,
    upper_confidence_bound,
)

__all__ = [
    "CostModel",
    "PoolView",
    "Proposal",
    "Strategy",
    "TwoPhase",
    "StopEstimate",
    "expected_hits",
    "stop_estimate",
    "greedy_probability",
    "expected_hits_per_core_hour",
    "upper_confidence_bound",
    "thompson_sampling",
    "explore_spread",
    "explore_distance",
    "random_selection",
    "two_phase",
]
