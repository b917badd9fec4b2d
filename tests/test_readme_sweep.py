"""The README's sweep file examples (issue 16, item 4: "the sweep file format with an example
of every axis kind") are valid sweep files and expand as the README says.

The reference is the README text itself: its examples are read out of it, their base set to
configs/demo.toml (which the README names), and expanded with ``load_sweep``; the expected run
counts follow from the README's own rules (grid = product of the axis lengths; list = one run
per [[combination]]; a terminal axis gives one run per generated site).
"""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path

from dwell.sweep import load_sweep

ROOT = Path(__file__).resolve().parents[1]


def _examples() -> list[str]:
    readme = (ROOT / "README.md").read_text()
    section = readme.split("### The sweep file", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```toml\n(.*?)```", section, flags=re.S)


def test_every_axis_kind_has_an_example():
    text = "\n".join(_examples())
    for kind in ("scenario.", "link.", "constellation.", "terminal.tannery-row.canyon.",
                 "policy.*.", 'key = "policy"', 'key = "terminal"', "latitude-band",
                 "random-region", 'kind = "list"', "[[combination]]", "[overrides]",
                 'mode = "grid"', 'mode = "list"'):
        assert kind in text, kind


def test_readme_sweep_examples_expand_as_described(tmp_path):
    examples = _examples()
    assert len(examples) == 3
    for i, text in enumerate(examples):
        path = tmp_path / f"example{i}.toml"
        demo = ROOT / "configs" / "demo.toml"
        path.write_text(text.replace('base = "demo.toml"', f'base = "{demo}"'))
        plan = load_sweep(path)
        raw = tomllib.loads(text)
        if raw["sweep"].get("mode", "grid") == "list":
            assert len(plan.runs) == len(raw["combination"])
        elif any(a["key"] == "terminal" for a in raw["axis"]):
            assert len(plan.runs) == raw["axis"][0]["sites"]["count"]
            assert [r.params["terminal"] for r in plan.runs][:2] == ["lat+000.0", "lat+010.0"]
        else:
            assert len(plan.runs) == math.prod(len(a["values"]) for a in raw["axis"])
