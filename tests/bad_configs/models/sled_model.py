"""A tiny in-process sled model for the broken-config corpus (invented data)."""

import math


def forces(values: dict, condition: dict) -> dict:
    angle = math.radians(values["ramp_angle"])
    return {"lift": condition["mach"] * math.sin(angle), "drag": 0.02 + angle**2}
