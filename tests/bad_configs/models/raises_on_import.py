"""A solver module whose import fails (a licence server that cannot be reached): must be one line."""

raise RuntimeError("no licence for the sled model on this host")


def forces(values: dict, condition: dict) -> dict:
    return {"lift": 0.0, "drag": 0.0}
