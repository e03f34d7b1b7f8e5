"""Next runs: the batch that most sharpens the window or the trade-off front.

``suggestions`` (batch selection and stopping advice), ``acquisition`` (the scores of one model state,
kriging believer), ``windowgain`` (expected window growth one run ahead), ``candidates`` (candidate
settings and the single-pick rule).
"""

from windowfinder.nextruns.acquisition import Acquisition  # noqa: F401
from windowfinder.nextruns.suggestions import Suggestions, suggest  # noqa: F401

__all__ = ["Acquisition", "Suggestions", "suggest"]
