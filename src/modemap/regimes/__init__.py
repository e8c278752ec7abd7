"""Regime discovery: HMM proposal, Viterbi, hard-EM switching regression, choice of K."""

from __future__ import annotations

from modemap.regimes.finder import RegimeFinder
from modemap.regimes.viterbi import viterbi, viterbi_runs

__all__ = ["RegimeFinder", "viterbi", "viterbi_runs"]
