"""Next runs: the batch that most sharpens the window or the trade-off front.

``suggestions`` (the acquisition and batch selection), ``windowgain`` (expected window growth one run
ahead), ``candidates`` (candidate settings and the single-pick rule).
"""

from windowfinder.nextruns.suggestions import Acquisition, Suggestions, suggest  # noqa: F401

__all__ = ["Acquisition", "Suggestions", "suggest"]
