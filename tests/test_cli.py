"""The ``trialdesk`` command: exit codes, messages, and the JSON contract (schema_version 1)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from numpy.testing import assert_allclose

from trialdesk.core import DEMO_SETTINGS, analyze, demo_fieldbook_path, read_fieldbook
from trialdesk.desktop.launcher import main

TRAIT_KEYS = {"trait", "n_plots", "n_missing", "grand_mean", "cv_percent", "residual_ms",
              "residual_df", "sed", "lsd", "anova", "entries", "comparisons", "warnings"}
ENTRY_KEYS = {"entry", "mean", "se", "n", "rank", "letters", "percent_of_check"}
PAIR_KEYS = {"entry_a", "entry_b", "difference", "se", "p_adjusted", "lower", "upper",
             "significant"}
ANOVA_KEYS = {"source", "df", "ss", "ms", "f", "p"}


def script() -> list[str]:
    exe = Path(sys.executable).with_name("trialdesk")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "trialdesk.desktop.launcher"]


def test_demo_prints_summary_with_cautions():
    done = subprocess.run([*script(), "demo", "--print"], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr
    out = " ".join(done.stdout.split())  # the summary wraps long sentences
    assert "grain_yield" in out and "CHK-1" in out and "Letters" in out
    assert "do not make it" in out  # the cautions
    assert "official variety-testing and registration rules" in out


def test_json_contract(capsys):
    path = demo_fieldbook_path()
    code = main(["analyze", str(path), "--check", "CHK-1", "--check", "CHK-2",
                 "--lower-is-better", "heading_days", "--json", "-"])
    assert code == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["schema_version"] == 1
    assert {"design", "method", "alpha", "traits"} <= doc.keys()
    assert doc["design"] == "rcbd" and doc["method"] == "tukey" and doc["alpha"] == 0.05
    expected = analyze(read_fieldbook(path), DEMO_SETTINGS)
    for trait, ref in zip(doc["traits"], expected.traits, strict=True):
        assert TRAIT_KEYS <= trait.keys()
        assert [a["source"] for a in trait["anova"]] == ["block", "entry", "residual", "total"]
        assert all(ANOVA_KEYS <= a.keys() for a in trait["anova"])
        assert all(ENTRY_KEYS <= e.keys() for e in trait["entries"])
        assert all(PAIR_KEYS <= c.keys() for c in trait["comparisons"])
        assert trait["trait"] == ref.trait
        assert_allclose(trait["lsd"], ref.lsd, rtol=1e-15)
        assert [e["letters"] for e in trait["entries"]] == [e.letters for e in ref.entries]
    yield_ = doc["traits"][0]
    assert yield_["n_plots"] == 100 and yield_["n_missing"] == 2
    assert len(yield_["comparisons"]) == 25 * 24 // 2


def test_json_file_and_summary(tmp_path, capsys):
    out = tmp_path / "result.json"
    assert main(["demo", "--print", "--json", str(out)]) == 0
    assert "grain_yield" in capsys.readouterr().out
    assert json.loads(out.read_text(encoding="utf-8"))["schema_version"] == 1
    assert [p.name for p in tmp_path.iterdir()] == ["result.json"]  # no temporary left behind


def test_dunnett_json_compares_with_checks(capsys):
    code = main(["analyze", str(demo_fieldbook_path()), "--method", "dunnett", "--check",
                 "CHK-1", "--check", "CHK-2", "--check-direction", "above", "--trait",
                 "grain_yield", "--json", "-"])
    assert code == 0
    trait = json.loads(capsys.readouterr().out)["traits"][0]
    assert {c["entry_b"] for c in trait["comparisons"]} == {"CHK-1", "CHK-2"}
    assert len(trait["comparisons"]) == 23 * 2
    assert all(c["upper"] is None for c in trait["comparisons"])  # one-sided: open above
    assert all(e["letters"] is None for e in trait["entries"])


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["analyze", "no-such-file.csv"], "no-such-file.csv"),
        (["analyze", "{demo}", "--trait", "yeild"], "yeild"),
        (["analyze", "{demo}", "--check", "CHK-9"], "CHK-9"),
        (["analyze", "{demo}", "--method", "dunnett"], "check"),
    ],
    ids=["missing file", "unknown trait", "unknown check", "dunnett without checks"],
)
def test_bad_input_exits_2_with_message_and_no_traceback(args, message):
    args = [a.replace("{demo}", str(demo_fieldbook_path())) for a in args]
    done = subprocess.run([*script(), *args], capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    assert message in done.stderr
    assert "Traceback" not in done.stderr
    assert done.stdout == ""
