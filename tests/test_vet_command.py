"""`coreach vet` end to end: a trained decoder and the baselines through a suite, report and MLflow links."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import SMALL, cli_env
from mlflow.tracking import MlflowClient

COREACH = str(Path(sys.executable).parent / "coreach")


def run(args, cwd):
    return subprocess.run([COREACH, *args], cwd=cwd, capture_output=True, text=True, env=cli_env(), timeout=900)


@pytest.mark.slow
def test_vet_decoder_and_baselines(workdir):
    trained = run(["--json", "train", *SMALL, "+experiment=cvae_goal_entropy"], workdir)
    assert trained.returncode == 0, trained.stderr
    run_id = json.loads(trained.stdout)["runs"][0]["run_id"]

    res = run(["--json", "vet", f"candidates=[{run_id},direct]", "suite=goal-switch", "suite.episodes=3",
               "report_dir=rep"], workdir)  # fmt: skip
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    assert set(out["summaries"]) == {"cvae+goal_entropy", "direct"}
    s = out["summaries"]["cvae+goal_entropy"]
    assert s["success"]["n"] == 12  # 4 switch cells x 3 episodes
    assert 0.0 <= s["success"]["lo"] <= s["success"]["value"] <= s["success"]["hi"] <= 1.0
    assert set(s["recovery"]) == {"none", "0.2", "0.5", "0.8"}

    html = (workdir / "rep" / "report.html").read_text()
    assert html.count("data:image/png;base64,") >= 4
    assert not re.search(r'(src|href)="(?!data:)', html)  # self-contained
    assert "not a medical device" in html

    client = MlflowClient(f"sqlite:///{workdir / 'mlflow.db'}")
    vet_run = client.get_run(out["vet_runs"]["cvae+goal_entropy"])
    assert vet_run.data.tags["coreach.source_run"] == run_id
    assert vet_run.data.tags["coreach.stage"] == "vet"
    assert "success/value" in vet_run.data.metrics
    train_run = client.get_run(run_id)
    assert train_run.data.tags["coreach.vet.goal-switch"] == vet_run.info.run_id
    assert train_run.data.metrics["vet/goal-switch/success/value"] == s["success"]["value"]
    artifacts = {f.path for f in client.list_artifacts(vet_run.info.run_id, "report")}
    assert "report/report.html" in artifacts


@pytest.mark.parametrize(
    "args, needle",
    [
        (["candidates=[direct]", "suite=no-such-suite"], "no-such-suite"),
        (["candidates=[0123456789abcdef0123456789abcdef]"], "0123456789abcdef0123456789abcdef"),
        (["candidates=[direct]", "operator=sleepy"], "sleepy"),
    ],
    ids=["unknown suite", "unknown run", "unknown operator"],
)
def test_vet_bad_input_is_one_line(workdir, args, needle):
    res = run(["vet", *args, "suite.episodes=1"], workdir)
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip() and "INFO" not in ln]
    assert len(lines) == 1 and lines[0].startswith("coreach: error:") and needle in lines[0], res.stderr
    assert not (workdir / "reports").exists()
