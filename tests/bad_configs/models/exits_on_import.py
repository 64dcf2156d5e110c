"""A solver module that ends the interpreter when imported (a script's habit): must be one line."""

import sys

sys.exit(0)


def forces(values: dict, condition: dict) -> dict:
    return {"lift": 0.0, "drag": 0.0}
