"""Every command line in docs/command_line.md runs as documented, in the order it is documented.

Source: the documentation itself (each ``$ stein-torch ...`` line, the ``my_model.py`` it uses and
the error lines shown under a command); exit codes by the argparse / BSD sysexits convention (0
success, 2 usage error; common practice). The documented example model is a normal mean with
unknown sd; the run's output must also say how it went (steps, stop reason, KSD, R-hat, warnings).
"""

from __future__ import annotations

import pathlib
import re
import shlex

import pytest

from stein_torch.cli import main

DOC = pathlib.Path(__file__).resolve().parent.parent / "docs" / "command_line.md"
SLOW_WORDS = ("bench all", "stein-torch demo")  # a minute or more on 2 shared cores: run with -m slow


def documented():
    """(command, expected error line or None) for every '$ stein-torch' line, and the model file."""
    lines = DOC.read_text().splitlines()
    commands = []
    for i, line in enumerate(lines):
        match = re.fullmatch(r"\s*\$ (stein-torch .*)", line)
        if match:
            following = lines[i + 1].strip() if i + 1 < len(lines) else ""
            commands.append((match.group(1), following if following.startswith("stein-torch: error") else None))
    start = next(i for i, line in enumerate(lines) if line.strip() == "# my_model.py")
    block = []
    for line in lines[start:]:
        if line and not line.startswith("    "):
            break
        block.append(line[4:])
    return commands, "\n".join(block).strip() + "\n"


COMMANDS, MODEL = documented()


def _run_in_order(commands, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "my_model.py").write_text(MODEL)
    for command, error in commands:
        argv = shlex.split(command)[1:]
        code = main(argv)
        captured = capsys.readouterr()
        if error is not None:
            assert code == 2, command
            assert captured.err.strip() == error, command
            continue
        assert code == 0, f"{command}: exit {code}\n{captured.err}"
        if argv[0] == "run":
            for heading in ("steps run:", "stopped:", "warnings"):
                assert heading in captured.out, (command, heading)
            if "--method" not in argv:
                assert "final KSD per ensemble" in captured.out
            if "--ensembles" in argv:
                assert "R-hat across the" in captured.out
            out = argv[argv.index("--out") + 1] if "--out" in argv else "my_model.nc"
            assert (tmp_path / out).is_file()


def test_the_documentation_has_the_commands_it_promises():
    runs = [c for c, _ in COMMANDS if c.startswith("stein-torch run")]
    # every option of `run` appears in at least one documented command line
    for flag in ("--method", "--particles", "--ensembles", "--steps", "--no-stop", "--kernel", "--checkpoint",
                 "--resume", "--seed", "--out", "--draws", "--warmup"):
        assert any(flag in c.split() for c in runs), flag
    assert any(c == "stein-torch --version" for c, _ in COMMANDS)
    assert any(c.startswith("stein-torch bench all --quick") for c, _ in COMMANDS)


def test_documented_command_lines(tmp_path, monkeypatch, capsys):
    fast = [(c, e) for c, e in COMMANDS if not any(w in c for w in SLOW_WORDS)]
    _run_in_order(fast, tmp_path, monkeypatch, capsys)


@pytest.mark.slow
def test_documented_slow_command_lines(tmp_path, monkeypatch, capsys):
    slow = [(c, e) for c, e in COMMANDS if any(w in c for w in SLOW_WORDS)]
    assert slow
    _run_in_order(slow, tmp_path, monkeypatch, capsys)
