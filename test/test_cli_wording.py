"""What the command line and the README say agrees with the code: help on every store option,
the report's plant default, times in ISO 8601, the estimate's latency, the demonstration length
and README examples that neither create stores by accident nor leave the joints' range."""

from __future__ import annotations

import argparse
import re

import numpy as np
import pytest
import yaml
from campaign_support import store_with_demos_and_skill
from cli_support import run_cli
from store_support import REPO, add_demo

from compliant_demo.cli import _build
from compliant_demo.estimation import SlidingStiffnessEstimator
from compliant_demo.exceptions import NotFoundError
from compliant_demo.plant import load_plant
from compliant_demo.store import DemoStore
from compliant_demo.teaching import cork_seat_scenario

README = (REPO / "README.md").read_text(encoding="utf-8")
STORE_COMMANDS = ("list", "show", "import", "export", "merge", "delete", "mark", "skills",
                  "verify")  # fmt: skip


def _flowing(text: str) -> str:
    return " ".join(text.split())


def _help_text(command: str) -> str:
    return _flowing(_build()[1][command].format_help())


@pytest.mark.parametrize("command", STORE_COMMANDS)
def test_every_store_option_and_argument_has_help(command):
    parser = _build()[1][command]
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction):
            continue
        assert action.help, f"{command} {action.option_strings or action.dest} has no help"


def test_report_help_names_the_campaigns_plant_as_default():
    text = _help_text("report")
    assert "default: the plant the campaign ran on" in text
    assert "default: the cork_seat bench arm on the ideal" not in text


def test_only_the_tour_seeds_a_campaign():
    assert "and of the campaign" in _help_text("tour")
    assert "campaign" not in _help_text("simulate-teaching").split("--seed SEED", 1)[1].split(
        "--out", 1)[0]


def test_show_gives_times_in_iso_8601_utc(tmp_path, capsys):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo = add_demo(store, start_time=1_796_000_000.0)
    status, out, _ = run_cli(capsys, "show", demo[:8], "--store", path)
    assert status == 0
    assert "start_time       1796000000.000 s (2026-11-30T00:53:20Z)" in out.splitlines()
    assert "1.796e+09" not in out
    status, out, _ = run_cli(capsys, "list", "--store", path)
    assert "2026-11-30T00:53:20Z" in out


def test_readme_and_help_give_the_estimators_true_latency():
    settings = yaml.safe_load((REPO / "config" / "recorder.yaml").read_text())
    params = next(iter(settings.values()))["ros__parameters"]
    estimator = SlidingStiffnessEstimator(
        2, window_s=params["estimator_window_s"], rate_hz=1000.0,
        noise_variance_ratio=params["estimator_noise_variance_ratio"],
        band_hz=(params["estimator_band_low_hz"], params["estimator_band_high_hz"]),
    )  # fmt: skip
    shown = f"{estimator.latency_s:.2f} s"
    assert shown == "0.31 s"  # half the 0.5 s window plus the 4.8-12.8 Hz band-pass delay
    assert _flowing(README).count(f"({shown} with the defaults") == 2
    assert "by about the estimator's window" not in README
    assert f"{shown} with its defaults" in _help_text("report")


def test_readme_gives_the_scenarios_demonstration_length():
    nominal = cork_seat_scenario().duration_s
    assert f"about {nominal:g} s at 1 kHz" in _flowing(README)
    assert not re.search(r"about 7 s", README)


def _readme_block(section: str, needle: str) -> str:
    body = README.split(section, 1)[1].split("\n## ", 1)[0]
    return next(b for b in re.findall(r"```python\n(.*?)```", body, re.S) if needle in b)


def test_the_skill_example_opens_an_existing_store_and_stays_in_range(tmp_path, monkeypatch):
    code = _readme_block("## Skills", "learn_skill(")
    monkeypatch.chdir(tmp_path)
    with pytest.raises(NotFoundError):  # no store here: it says so instead of creating one
        exec(compile(code, "README-skills", "exec"), {})
    assert not (tmp_path / "demos.sqlite").exists()
    store_with_demos_and_skill(tmp_path / "demos.sqlite", with_skill=False)
    namespace: dict = {}
    exec(compile(code, "README-skills", "exec"), namespace)
    position = namespace["rollout"].position
    for j, joint in enumerate(load_plant(None).for_joints(["shoulder", "elbow"])):
        assert joint.lower_limit < position[:, j].min() <= position[:, j].max() < joint.upper_limit
    assert np.allclose(position[-1], [0.2, 0.5], atol=0.02)


def test_the_store_example_says_it_creates_its_file():
    code = _readme_block("## Demonstration store", "begin_demonstration(")
    assert re.search(r'DemoStore\("bench_a\.sqlite"\) as store: +# creates the file', code)
