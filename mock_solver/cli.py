"""Command-line front end of the mock solver: ``sortie-mock-solver INPUT OUTPUT``.

It behaves like a real solver executable so that the orchestrator's process handling is tested
for real: it reads a deck, writes an output file atomically, and reports failure only through
exit codes, stderr and (when asked) a shared run log. It can also misbehave on purpose — crash,
hang, write garbage or NaN, fail meshing, leave child processes behind — with outcomes that are
reproducible for a given seed and case.

Exit codes:
    0  output written (also for the 'garbage' and 'nan' outcomes: the solver does not notice)
    1  internal error of the mock itself (a bug; still one line on stderr, no traceback)
    2  bad command line, unreadable deck or bad value (one sentence on stderr)
    3  injected crash (configurable with ``crash_exit_code``)
    4  injected mesh-generation failure (``mesh_fail_region``)
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from . import physics
from .deck import Case, DeckError, build_case, in_region, parse_deck

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
EXIT_MESH_FAIL = 4

HEADER = "# sortie mock solver: rocket-sled aft body"
USAGE = (
    "usage: sortie-mock-solver INPUT OUTPUT\n"
    "  INPUT   deck of 'key = value' lines: ramp_angle, boattail_length, diffuser_angle,\n"
    "          strut_thickness, skirt_gap, fin_count, mach (plus optional knobs)\n"
    "  OUTPUT  file to write lift, drag and convergence into\n"
    "Knobs (deck keys, or SORTIE_MOCK_<KEY> environment variables, which win): run_time_s,\n"
    "noise, seed, crash_rate, hang_rate, garbage_rate, nan_rate, crash_exit_code,\n"
    "mesh_fail_region, log, spawn_children.\n"
)


@dataclass(frozen=True)
class Fate:
    """Outcome and noise of one run, fixed by the seed and the physics inputs."""

    outcome: str  # ok, crash, hang, garbage or nan
    noise_lift: float
    noise_drag: float


def decide_fate(case: Case) -> Fate:
    """Draw the outcome from a generator seeded by seed + sorted physics values + Mach.

    The draws are made in a fixed order whatever the rates are, so raising one rate never changes
    the noise another case receives, and re-running a case reproduces its outcome exactly.
    """
    parts = [f"seed={case.knobs.seed}"]
    parts += [f"{k}={case.params[k]!r}" for k in sorted(case.params)]
    parts.append(f"mach={case.mach!r}")
    digest = hashlib.sha256("|".join(parts).encode()).digest()
    rng = np.random.default_rng(int.from_bytes(digest, "big"))
    u_crash, u_hang, u_garbage, u_nan = rng.random(4)
    z_lift, z_drag = rng.standard_normal(2)
    k = case.knobs
    if u_crash < k.crash_rate:
        outcome = "crash"
    elif u_hang < k.hang_rate:
        outcome = "hang"
    elif u_garbage < k.garbage_rate:
        outcome = "garbage"
    elif u_nan < k.nan_rate:
        outcome = "nan"
    else:
        outcome = "ok"
    return Fate(outcome, k.noise * float(z_lift), k.noise * float(z_drag))


def _log_line(path: str | None, text: str) -> None:
    """Append one line with a single O_APPEND write so concurrent runs never interleave."""
    if path is None:
        return
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, (text + "\n").encode())
    finally:
        os.close(fd)


def _format_output(mach: float, lift: float, drag: float, converged: bool) -> str:
    # repr() gives the shortest text that reads back as the identical float.
    return (
        f"{HEADER}\n"
        f"mach = {mach!r}\n"
        f"lift = {lift!r}\n"
        f"drag = {drag!r}\n"
        f"converged = {'yes' if converged else 'no'}\n"
    )


def write_atomically(path: str, text: str) -> None:
    """Write via a temporary file in the same folder and ``os.replace`` it into place.

    A reader (or a kill mid-write) can then only ever see no file or the complete file.
    """
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".mock-solver-", suffix=".tmp")
    try:
        # mkstemp creates 0600; give the file the permissions an ordinary open() would.
        umask = os.umask(0)
        os.umask(umask)
        os.fchmod(fd, 0o666 & ~umask)
        with os.fdopen(fd, "w", encoding="utf-8") as handle:
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _write_garbage(path: str, mach: float) -> None:
    # Deliberately not atomic and not numeric: this is what a solver dying mid-write leaves.
    with open(path, "w", encoding="utf-8") as handle:
        handle.write(f"{HEADER}\nmach = {mach!r}\nlift = ******\ndrag = -0.1.2e+\n")


class _Children:
    """A child ``sleep`` that starts its own grandchild ``sleep``, for process-group tests.

    Both stay in the solver's process group (no new session), so a caller that kills only the
    solver's pid leaks them, while a caller that kills the group cleans up. When the solver ends
    on its own it removes them, so normal runs leave nothing behind.
    """

    def __init__(self) -> None:
        self.child = subprocess.Popen(
            ["sh", "-c", "sleep 1000 & echo $!; exec sleep 1000"],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.PIPE,
            stderr=subprocess.DEVNULL,
        )
        assert self.child.stdout is not None
        line = self.child.stdout.readline().decode().strip()
        self.child.stdout.close()
        self.grandchild = int(line) if line.isdigit() else None
        print(
            f"mock solver: spawned child pid {self.child.pid} and grandchild pid "
            f"{self.grandchild}",
            file=sys.stderr,
        )

    def stop(self) -> None:
        if self.grandchild is not None:
            with contextlib.suppress(ProcessLookupError):
                os.kill(self.grandchild, signal.SIGKILL)
        self.child.kill()
        self.child.wait()


def _read_deck(path: str) -> dict[str, str]:
    try:
        with open(path, encoding="utf-8") as handle:
            text = handle.read()
    except FileNotFoundError:
        raise DeckError(f"the input deck {path!r} does not exist; pass an existing file.") from None
    except IsADirectoryError:
        raise DeckError(
            f"the input deck {path!r} is a folder; pass the path of a deck file."
        ) from None
    except (OSError, UnicodeDecodeError) as err:
        raise DeckError(
            f"the input deck {path!r} cannot be read ({err}); pass a readable UTF-8 text file."
        ) from None
    return parse_deck(text, source=f"the input deck {path!r}")


def run(argv: Sequence[str], environ: dict[str, str] | None = None) -> int:
    """Run one case; returns the exit code (or never returns, for the 'hang' outcome)."""
    env = dict(os.environ if environ is None else environ)
    if len(argv) == 1 and argv[0] in ("-h", "--help"):
        sys.stdout.write(USAGE)
        return EXIT_OK
    if len(argv) != 2:
        raise DeckError(
            f"the solver takes exactly two arguments, INPUT and OUTPUT, but got {len(argv)}; "
            "run it as 'sortie-mock-solver INPUT OUTPUT'."
        )
    input_path, output_path = argv
    deck = _read_deck(input_path)
    case = build_case(deck, env, source=f"the input deck {input_path!r}")
    out_folder = os.path.dirname(os.path.abspath(output_path))
    if not os.path.isdir(out_folder):
        raise DeckError(
            f"the output file {output_path!r} is in the folder {out_folder!r}, which does not "
            "exist; create the folder first."
        )
    if case.ignored_keys:
        print(f"mock solver: ignored keys: {', '.join(case.ignored_keys)}", file=sys.stderr)
    if case.warnings:
        print(
            "mock solver: outside the calibrated design box: " + "; ".join(case.warnings),
            file=sys.stderr,
        )

    ident = f"{os.getpid()} {os.path.abspath(input_path)}"
    knobs = case.knobs
    _log_line(knobs.log, f"start {ident}")
    children: _Children | None = None
    outcome = "error"  # replaced on every normal path; kept if something unexpected escapes
    try:
        if knobs.spawn_children:
            children = _Children()
        values = {**case.params, "mach": case.mach}
        if in_region(knobs.mesh_fail_region, values):
            region = " and ".join(str(c) for c in knobs.mesh_fail_region)
            print(f"mesh generation failed: the case lies in the region {region}.", file=sys.stderr)
            outcome = "meshfail"
            return EXIT_MESH_FAIL
        fate = decide_fate(case)
        if fate.outcome == "hang":
            outcome = "hang"
            children = None  # leave them running: the caller must kill the whole group
            while True:
                time.sleep(3600)
        if knobs.run_time_s > 0:
            time.sleep(knobs.run_time_s)
        if fate.outcome == "crash":
            print(
                f"mock solver crashed (injected, crash_rate = {knobs.crash_rate:g}); "
                "no output written.",
                file=sys.stderr,
            )
            outcome = "crash"
            return knobs.crash_exit_code
        if fate.outcome == "garbage":
            _write_garbage(output_path, case.mach)
            outcome = "garbage"
            return EXIT_OK
        forces = physics.evaluate(case.params, case.mach)
        lift = forces["lift"] + fate.noise_lift
        drag = forces["drag"] + fate.noise_drag
        if fate.outcome == "nan":
            lift = float("nan")
        write_atomically(output_path, _format_output(case.mach, lift, drag, converged=True))
        outcome = fate.outcome  # "ok" or "nan"
        return EXIT_OK
    except KeyboardInterrupt:
        outcome = "interrupted"
        raise
    finally:
        if children is not None:
            children.stop()
        _log_line(knobs.log, f"finish {ident} {outcome}")


def main(argv: Sequence[str] | None = None, environ: dict[str, str] | None = None) -> int:
    """Console-script entry point: turn every user error into one line and exit code 2.

    ``argv`` and ``environ`` default to the process's own; tests pass them to run in-process.
    """
    args = list(sys.argv[1:] if argv is None else argv)
    try:
        return run(args, environ)
    except DeckError as err:
        print(f"mock solver: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        return 130
    except Exception as err:  # a bug in the mock: still no traceback for the caller to parse
        print(f"mock solver internal error: {type(err).__name__}: {err}", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    raise SystemExit(main())
