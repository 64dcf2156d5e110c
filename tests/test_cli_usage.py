"""Usage errors at the command line: one line with a hint, exit code 2, never a traceback.

Most cases call ``sortie.cli.main`` in this process (the same function the ``sortie`` script
runs), so they take milliseconds; a few run the installed script as a subprocess to prove the
entry point itself behaves.
"""

from __future__ import annotations

import importlib.metadata
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

from sortie import cli
from tests.conftest import BIN, branin_config, write_config


def run_main(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    """Call the entry point with these arguments; return (exit code, stdout, stderr)."""
    monkeypatch.setattr(sys, "argv", ["sortie", *args])
    code = 0
    try:
        cli.main()
    except SystemExit as exited:
        code = int(exited.code or 0)
    out, err = capsys.readouterr()
    return code, out, err


def assert_one_line(err: str, *fragments: str) -> None:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("error: ") and "Traceback" not in err
    for fragment in fragments:
        assert fragment in lines[0], lines[0]


@pytest.mark.parametrize(("args", "fragments"), [
    (("bogus",), ("no such command 'bogus'", "run 'sortie --help' for the commands")),
    (("status",), ("missing argument 'DIR'", "run 'sortie status --help'")),
    (("export", "somewhere"), ("missing option '--to'", "run 'sortie export --help'")),
    (("export", "somewhere", "--to"), ("option '--to' requires an argument", "run 'sortie export --help'")),
    (("run", "x.yaml", "--bogus"), ("no such option: --bogus", "run 'sortie run --help'")),
    (("check",), ("missing argument 'CONFIG'", "run 'sortie check --help'")),
    (("--bogus",), ("no such option: --bogus", "run 'sortie --help'")),
])
def test_usage_errors_are_one_line_with_a_hint_and_exit_2(monkeypatch, capsys, args, fragments) -> None:
    code, out, err = run_main(monkeypatch, capsys, *args)
    assert code == 2
    assert_one_line(err, *fragments)
    assert out == ""


def test_no_command_prints_the_help_on_stdout_and_exits_2(monkeypatch, capsys) -> None:
    code, out, err = run_main(monkeypatch, capsys)
    assert code == 2
    assert out.startswith("Usage: sortie") and "Commands:" in out and "run" in out
    assert_one_line(err, "no command given")


def test_version_prints_the_installed_version(monkeypatch, capsys) -> None:
    code, out, err = run_main(monkeypatch, capsys, "--version")
    assert code == 0 and err == ""
    assert out.strip() == f"sortie {importlib.metadata.version('sortie')}"


@pytest.mark.parametrize("command", ["run", "status", "export", "report"])
def test_help_shows_defaults_and_no_type_after_flags(monkeypatch, capsys, command: str) -> None:
    code, out, _ = run_main(monkeypatch, capsys, command, "--help")
    assert code == 0
    assert "<bool>" not in out, "a flag takes no value, so no type is shown"
    expected = {"run": "[default: (campaigns/<name>)]", "export": "[default: designs]", "report": "[default: (DIR/report)]",
                "status": "--watch"}[command]
    assert expected in " ".join(out.split()), out


def test_config_that_is_missing_or_a_folder_is_one_line(monkeypatch, capsys, tmp_path: Path) -> None:
    code, _, err = run_main(monkeypatch, capsys, "check", str(tmp_path / "missing.yaml"))
    assert code == 2
    assert_one_line(err, "missing.yaml", "no such config file")
    code, _, err = run_main(monkeypatch, capsys, "run", str(tmp_path))
    assert code == 2
    assert_one_line(err, str(tmp_path), "is a folder")


def _unprivileged() -> list[str] | None:
    """A command prefix that runs without root's power to read anything, or None if impossible."""
    if os.geteuid() != 0:
        return []
    setpriv = shutil.which("setpriv")
    return [setpriv, "--reuid=65534", "--regid=65534", "--clear-groups"] if setpriv else None


def test_config_without_read_permission_is_one_line(tmp_path: Path) -> None:
    prefix = _unprivileged()
    if prefix is None:
        pytest.skip("running as root without setpriv: a permission bit cannot stop a read")
    folder = Path(tempfile.mkdtemp(prefix="sortie-noread-"))  # pytest's own tmp_path is closed to other users
    try:
        folder.chmod(0o755)
        config = write_config(folder, branin_config())
        config.chmod(0o000)  # the folder can be listed, the file cannot be read
        result = subprocess.run([*prefix, sys.executable, "-c", "import sortie.cli; sortie.cli.main()", "check", str(config)],
                                capture_output=True, text=True, timeout=60, env={**os.environ, "HOME": str(folder)})
    finally:
        shutil.rmtree(folder)
    if "Permission denied" in result.stderr and "error:" not in result.stderr:
        pytest.skip(f"the unprivileged user cannot start this interpreter ({result.stderr.strip()[:120]})")
    assert result.returncode == 2, result.stderr
    assert_one_line(result.stderr, "campaign.yaml: cannot be read", "permission denied")


@pytest.mark.parametrize(("args", "code", "fragment"), [
    ((), 2, "no command given"),
    (("bogus",), 2, "no such command 'bogus'"),
    (("--version",), 0, None),
])
def test_the_installed_script_behaves_the_same(tmp_path: Path, args: tuple[str, ...], code: int, fragment: str | None) -> None:
    result = subprocess.run([str(BIN / "sortie"), *args], capture_output=True, text=True, timeout=60, cwd=tmp_path)
    assert result.returncode == code, result.stderr
    if fragment is None:
        assert result.stdout.startswith("sortie ") and result.stderr == ""
    else:
        assert_one_line(result.stderr, fragment)
