"""A slow analytic 'process' for the kill-and-resume test (standard library only, starts fast)."""

import math
import time


def slow_process(settings: dict) -> dict:
    time.sleep(0.4)
    t, c = settings["temperature"], settings["time"]
    return {"yield": 70 + 15 * math.exp(-((t - 65) / 20) ** 2 - ((c - 110) / 60) ** 2),
            "exotherm": 0.5 * t + 0.05 * c}
