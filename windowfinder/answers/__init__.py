"""Answers computed on the models: feasibility, the window, the trade-off, the test plan, influence.

``results`` turns the coded-unit searches (``feasibility``, ``window``, ``tradeoff``) into the
natural-unit answers an engineer reads (:class:`ProcessWindow`, :class:`TradeoffTable`).
"""

from windowfinder.answers.results import (CAUTION_SAFETY, ProcessWindow, TradeoffTable,  # noqa: F401
                                          build_tradeoff, build_window, cautions, feasibility_of,
                                          limits_of, objectives_of, predicted_ranges)

__all__ = ["CAUTION_SAFETY", "ProcessWindow", "TradeoffTable", "build_tradeoff", "build_window", "cautions",
           "feasibility_of", "limits_of", "objectives_of", "predicted_ranges"]
