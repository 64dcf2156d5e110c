"""A tiny campaign whose solver ships in its template folder (``./solver.py``), for adapter tests.

The solver reads the rendered ``case.in`` (``key = value`` lines) and writes ``out.txt`` with
``lift = ramp_angle * mach``; it is a Python script with this interpreter in its shebang, so it
runs the same under the command adapter and on the local Slurm node.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import yaml

SOLVER = f"""#!{sys.executable} -S
import sys
values = {{}}
for line in open("case.in"):
    key, _, value = line.partition("=")
    if _:
        values[key.strip()] = float(value)
with open(sys.argv[1], "w") as out:
    out.write("lift = %r\\n" % (values["ramp_angle"] * values["mach"]))
"""

DECK = "ramp_angle = {{ ramp_angle }}\nmach = {{ mach }}\n"


def write_template(folder: Path, deck: str = DECK) -> Path:
    """A template folder holding the executable ``solver.py`` and the deck ``case.in``."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "solver.py").write_text(SOLVER)
    (folder / "solver.py").chmod(0o755)
    (folder / "case.in").write_text(deck)
    return folder


def write_campaign(folder: Path, *, deck: str = DECK, solver: dict[str, Any] | None = None, designs: int = 2,
                   name: str = "tiny") -> Path:
    """Write ``campaign.yaml`` and its ``template/`` into ``folder``; return the config path.

    ``solver`` entries replace the defaults (the command adapter running ``./solver.py out.txt``);
    an entry set to None removes that key.
    The plan is the baseline plus ``designs`` Latin-hypercube designs, at two conditions.
    """
    write_template(folder / "template", deck)
    config = {
        "campaign": {"name": name, "seed": 1},
        "parameters": {"ramp_angle": {"lower": 2.0, "upper": 14.0, "baseline": 8.0},
                       "fin_count": {"choices": [2, 3, 4], "baseline": 3}},
        "conditions": {"mach": [0.6, 1.1]},
        "solver": {key: value for key, value in {
            "adapter": "command", "template": "template", "command": ["./solver.py", "out.txt"], "timeout_s": 60,
            **(solver or {})}.items() if value is not None},
        "quantities": {"lift": {"file": "out.txt", "key": "lift"}},
        "goal": {"minimize": "max(lift)"},
        "plan": {"initial": {"method": "lhs", "designs": designs}},
        "budget": {"designs": designs + 1},
        "slots": 2,
    }
    path = folder / "campaign.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path
