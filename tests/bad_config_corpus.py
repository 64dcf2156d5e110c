"""The broken-config corpus: every case, and running one through the real ``sortie check``.

Static cases live in ``tests/bad_configs/NN-name.yaml``; each file starts with a comment saying
what is wrong and a ``# error: <prefix>`` line, the start of the one error line ``sortie check``
must print (``{file}`` stands for the path given on the command line). Cases too big to commit
(a 50 MB file, 100,000 levels of nesting, an alias bomb, a 900 kB value) and cases that are not
files at all (a folder, a FIFO, a device) are made at run time by :func:`generated_cases`.

Shared by ``tests/test_bad_configs.py`` (the assertions) and ``benchmarks/bad_configs.py`` (the
measured time and memory of each case).
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

CORPUS = Path(__file__).resolve().parent / "bad_configs"
SORTIE = Path(sys.executable).parent / "sortie"
_ERROR = re.compile(r"^# error: (?P<key>.*)$", re.MULTILINE)


@dataclass(frozen=True)
class Case:
    """One bad config: where it is (relative to ``cwd``), and how its error line must start."""

    name: str
    path: str
    key: str
    cwd: Path


@dataclass(frozen=True)
class Outcome:
    """What ``sortie check`` did: exit code, output, wall time, CPU time and the child's own peak RSS.

    CPU time (user + system) is the figure to trust on a busy machine: wall time there is
    mostly waiting for a core.
    """

    returncode: int
    stdout: str
    stderr: str
    wall_s: float
    cpu_s: float
    max_rss_mb: float
    killed: bool


def static_cases() -> list[Case]:
    """The committed corpus, in file order."""
    cases = []
    for path in sorted(CORPUS.glob("*.yaml")):
        head = path.read_text(encoding="utf-8")[:1000]
        found = _ERROR.search(head)
        if not head.startswith("# ") or found is None:
            raise ValueError(f"{path.name} must start with '# what is wrong' and a '# error: <prefix>' line")
        cases.append(Case(path.stem, path.name, found["key"], CORPUS))
    return cases


def _base_text() -> str:
    """A valid corpus config (the demo with its template beside the corpus)."""
    text = (CORPUS / "01-campaign-missing-name.yaml").read_text(encoding="utf-8")
    return text.replace("campaign:\n", "campaign:\n  name: sled-aftbody\n", 1)


def generated_cases(folder: Path) -> list[Case]:
    """Write the cases too big to commit, or that are not regular files, into ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "cases").mkdir(exist_ok=True)
    template = folder / "cases" / "template"
    if not template.exists():
        template.symlink_to(CORPUS / "cases" / "template")
    base = _base_text()
    made: dict[str, tuple[str, bytes | None]] = {}

    def write(name: str, key: str, data: bytes | None) -> None:
        made[name] = (key, data)

    write("huge-file-50mb", "{file}: the file is 5", base.encode() + b"# " + b"x" * (50 << 20) + b"\n")
    write("nesting-100k-flow", "{file} line", ("campaign: " + "[" * 100_000 + "]" * 100_000 + "\n").encode())
    write("nesting-100k-mappings", "{file} line", ("campaign: " + "{a: " * 100_000 + "1" + "}" * 100_000 + "\n").encode())
    laughs = ['a: &a ["lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol"]']
    laughs += [f"{b}: &{b} [{', '.join([f'*{a}'] * 9)}]" for a, b in zip("abcdefgh", "bcdefghi", strict=True)]
    write("alias-bomb", "{file} line", (base + "\n".join(laughs) + "\n").encode())
    write("value-of-900kb", "campaign.name", base.replace("name: sled-aftbody", "name: " + "sled/" * 180_000, 1).encode())
    choices = ", ".join(str(i) for i in range(9_000))
    write("choices-9000-values", "parameters.fin_count",
          base.replace("{choices: [2, 3, 4], baseline: 3}", f"{{choices: [{choices}], baseline: -1}}", 1).encode())
    write("not-utf8", "{file} line 4: is not UTF-8", base.replace("sled-aftbody", "sled-\udce9", 1).encode("utf-8", "surrogateescape"))
    write("nul-bytes", "{file}", base.encode() + b"\x00\x00\x00\n")
    write("empty-file", "{file}: is empty", b"")
    write("a-folder", "{file}: is a folder", None)
    cases = []
    for name, (key, data) in made.items():
        path = folder / f"{name}.yaml"
        if data is None:
            path.mkdir(exist_ok=True)
        else:
            path.write_bytes(data)
        cases.append(Case(f"gen-{name}", path.name, key, folder))
    cases.append(Case("gen-missing-file", "no-such-config.yaml", "{file}: no such config file", folder))
    fifo = folder / "a-fifo.yaml"
    if not fifo.exists():
        os.mkfifo(fifo)
    cases.append(Case("gen-fifo", fifo.name, "{file}: is not a regular file", folder))
    cases.append(Case("gen-device", "/dev/zero", "{file}: is not a regular file", folder))
    if os.geteuid() != 0:  # root reads every file whatever its mode
        locked = folder / "no-permission.yaml"
        locked.write_text(base, encoding="utf-8")
        locked.chmod(0)
        cases.append(Case("gen-no-permission", locked.name, "{file}: cannot be read (permission denied)", folder))
    return cases


# A child forked from a large process (pytest, or this module holding a 50 MB case) starts with
# the parent's pages counted in its peak RSS, so ``sortie check`` is started by this small
# launcher, which measures it with ``os.wait4`` and writes "peak-RSS-kB user-s system-s".
_LAUNCHER = """
import os, subprocess, sys
child = subprocess.Popen(sys.argv[2:])
_, status, usage = os.wait4(child.pid, 0)
with open(sys.argv[1], "w") as out:
    out.write(f"{usage.ru_maxrss} {usage.ru_utime} {usage.ru_stime}")
sys.exit(os.waitstatus_to_exitcode(status) % 256)
"""


def run_check(case: Case, *, kill_after_s: float = 60.0) -> Outcome:
    """Run ``sortie check`` on ``case`` and measure its wall time, CPU time and its own peak RSS."""
    with tempfile.TemporaryDirectory() as tmp:
        return _run_in(case, Path(tmp), kill_after_s)


def _run_in(case: Case, tmp: Path, kill_after_s: float) -> Outcome:
    out, err, usage_file = tmp / "stdout", tmp / "stderr", tmp / "usage"
    with open(out, "wb") as stdout, open(err, "wb") as stderr:
        start = time.perf_counter()
        proc = subprocess.Popen([sys.executable, "-I", "-S", "-c", _LAUNCHER, str(usage_file), str(SORTIE), "check", case.path],
                                cwd=case.cwd, stdout=stdout, stderr=stderr, stdin=subprocess.DEVNULL, start_new_session=True,
                                env={**os.environ, "NO_COLOR": "1", "COLUMNS": "200"})
        killed = threading.Event()

        def _kill() -> None:
            killed.set()
            os.killpg(proc.pid, signal.SIGKILL)

        timer = threading.Timer(kill_after_s, _kill)
        timer.start()
        try:
            returncode = proc.wait()
        finally:
            timer.cancel()
        wall = time.perf_counter() - start
    text_out = out.read_text(encoding="utf-8", errors="replace")
    text_err = err.read_text(encoding="utf-8", errors="replace")
    rss_kb, user_s, system_s = (float(v) for v in (usage_file.read_text().split() if usage_file.exists() else (0, 0, 0)))
    return Outcome(returncode, text_out, text_err, wall, user_s + system_s, rss_kb / 1024.0, killed.is_set())
