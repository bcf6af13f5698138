"""The documentation's own examples work (README.md)."""
from __future__ import annotations

import re
from pathlib import Path

from sweep.config import parse_config

ROOT = Path(__file__).resolve().parents[1]


def test_readme_config_example_is_valid():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    block = re.search(r"```toml\n(.*?)```", text, re.S)
    assert block, "README.md has a TOML example"
    config = parse_config(block.group(1), source="README.md")
    assert config.operating_gain is not None


def test_readme_commands_name_shipped_files():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    for path in set(re.findall(r"configs/[\w-]+\.toml", text)):
        assert (ROOT / path).is_file(), path
