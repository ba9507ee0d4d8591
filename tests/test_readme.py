"""The README stays true: its config reference is the schema's, its commands exist."""

from __future__ import annotations

import re
import runpy

from tests.common import ROOT

README = (ROOT / "README.md").read_text(encoding="utf-8")


def test_config_reference_matches_the_schema() -> None:
    reference = runpy.run_path(str(ROOT / "scripts" / "config_reference.py"))["reference"]()
    block = README.split("<!-- config-reference:start -->\n", 1)[1].split("<!-- config-reference:end -->", 1)[0]
    assert block == reference, "README config reference is stale: run python scripts/config_reference.py"


def test_two_commands_exist_and_ci_runs_the_test_command() -> None:
    commands = re.findall(r"^bash (scripts/\S+)", README, flags=re.M)
    assert commands[:2] == ["scripts/bakeoff.sh", "scripts/test.sh"]
    for script in commands[:2]:
        assert (ROOT / script).exists()
    assert "bash scripts/test.sh" in (ROOT / ".ci" / "run").read_text()


def test_readme_carries_the_cautions() -> None:
    text = README.lower()
    for phrase in ("representative", "per-class", "per group", "person in the loop", "law"):
        assert phrase in text, phrase
