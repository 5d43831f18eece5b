"""The README's "Querying the store from a script" examples run as written on a filled store."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

from campaign_support import campaign_job, store_with_demos_and_skill

from compliant_demo.campaign import run_campaign
from compliant_demo.perturbation import PERTURBATION_KINDS
from compliant_demo.store import DemoStore

ROOT = Path(__file__).resolve().parents[1]
SECTION = "## Querying the store from a script"


def _examples() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split(SECTION, 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", section, re.S)
    assert len(blocks) >= 4
    return "\n".join(blocks)


def test_readme_store_examples_run_and_print_what_they_say(tmp_path):
    store = tmp_path / "store.sqlite"
    skill_id = store_with_demos_and_skill(store)
    with DemoStore(store, durable=False) as opened:
        run_campaign(opened, campaign_job(n_scenarios=14), skill_id=skill_id, workers=0)
    script = tmp_path / "examples.py"
    script.write_text(_examples(), encoding="utf-8")
    env = dict(os.environ, COMPLIANT_DEMO_STORE=str(store),
               PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    result = subprocess.run([sys.executable, str(script)], cwd=tmp_path, env=env,
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert out.count("operator_a") == 3  # one line per stored demonstration
    assert "('shoulder', 'elbow') (" in out and "peak torque [N*m]:" in out
    # the default plant has no damping input: the check flags the skill as under-damped
    assert "schedule ok: False" in out and "'under_damped'" in out and "end [rad]: [0.2" in out
    for kind in PERTURBATION_KINDS:
        assert re.search(rf"^{kind}\s+2 scenarios, median peak deviation", out, re.M), kind
    assert "scenarios left the joint limits" in out and "worst:" in out
