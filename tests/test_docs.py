"""The docs cannot drift: every command and config key is documented, the README's
first screen holds the two commands, and CI runs the README's test command."""

from __future__ import annotations

import re
import shlex
from pathlib import Path

from monitor import config
from monitor.cli import build_parser

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()


def _subcommands() -> list[str]:
    parser = build_parser()
    for action in parser._actions:  # argparse keeps subparsers here
        if action.__class__.__name__ == "_SubParsersAction":
            return sorted(action.choices)
    raise AssertionError("no subcommands")


def test_every_command_is_documented_with_help():
    parser = build_parser()
    for name in _subcommands():
        assert f"segwatch {name}" in README, f"README does not document `segwatch {name}`"
        sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction").choices[name]
        assert sub.description and sub.epilog and "example:" in sub.epilog


def test_every_config_key_is_documented():
    keys = set(config._TOP_KEYS) | set(config._SOURCE_KEYS) | set(config._METRIC_KEYS)
    missing = [k for k in sorted(keys) if not re.search(rf"\b{re.escape(k)}:", README)]
    assert not missing, f"config keys missing from the README's reference: {missing}"


def test_first_screen_has_the_two_commands_and_they_name_real_files():
    first = README.split("---", 1)[0]
    lines = [ln.strip() for ln in first.splitlines() if ln.startswith("    ")]
    assert len(lines) == 2, lines
    demo, tests = lines
    assert "pip install" in demo and "segwatch backfill configs/demo.yaml" in demo
    for word in shlex.split(demo.replace("&&", " ")):
        if word.endswith((".py", ".yaml")):
            assert (ROOT / word).exists(), word
    assert "pytest" in tests
    venv = "python3 -m venv .venv && . .venv/bin/activate && "
    assert demo.startswith(venv) and tests.startswith(venv)  # a bare `pip install` is refused on many systems
    # above the commands: the title and one paragraph that states the job
    prose = [b for b in re.split(r"\n\s*\n", first) if b.strip() and not b.startswith(("#", "    "))]
    assert len(prose) == 1 and "segwatch" in prose[0]
    ci = (ROOT / ".ci" / "run").read_text()
    # CI runs the same test command as the README (pip quiet)
    assert tests.replace("pip install", "pip install -q") in ci


def test_cautions_are_in_the_readme():
    text = README.lower()
    for phrase in ("significance is not importance", "independence", "observational",
                   "qualified people", "local law"):
        assert phrase in text, phrase
