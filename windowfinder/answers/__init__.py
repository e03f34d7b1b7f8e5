"""Answers computed on the models: feasibility, the window, the trade-off, the test plan, influence.

``results`` and ``tradeofftable`` turn the coded-unit searches (``feasibility``, ``window``, ``tradeoff``)
into the natural-unit answers an engineer reads (:class:`ProcessWindow`, :class:`TradeoffTable`).
"""

from windowfinder.answers.results import (CAUTION_SAFETY, ProcessWindow, build_window,  # noqa: F401
                                          cautions, feasibility_of, limits_of, predicted_ranges)
from windowfinder.answers.tradeofftable import TradeoffTable, build_tradeoff, objectives_of  # noqa: F401

__all__ = ["CAUTION_SAFETY", "ProcessWindow", "TradeoffTable", "build_tradeoff", "build_window", "cautions",
           "feasibility_of", "limits_of", "objectives_of", "predicted_ranges"]
