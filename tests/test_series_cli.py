"""``trialdesk analyze`` of a series: the summary, the JSON contract (schema_version 1, "kind":
"series"), several trial files, and bad input (exit 2, a message naming file and column, no
traceback).

Data: MASS ``immer`` (Immer, Hayes & Powers 1934; tests/data/immer.csv, source in
tests/data/README.md) and the invented plot-level series of tests/test_series.py. The numbers
themselves are checked against statsmodels and scipy in tests/test_series.py; here the command
line must give exactly what the core gives.
"""

from __future__ import annotations

import json
import subprocess
from pathlib import Path

import pytest
from numpy.testing import assert_allclose

from tests.test_cli import ANOVA_KEYS, ENTRY_KEYS, PAIR_KEYS, script
from tests.test_series import immer_csv, invented_plots, write
from trialdesk.core.cli import build_parser
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.importer import import_fieldbook
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.series import COMPONENT_METHODS, analyze_series, read_series
from trialdesk.desktop.launcher import main

TOP_KEYS = {"schema_version", "kind", "software_version", "source", "source_sha256", "sources",
            "design", "method", "alpha", "checks", "check_direction", "environments", "traits",
            "warnings", "notes", "cautions"}
SERIES_TRAIT_KEYS = {"trait", "higher_is_better", "decimals", "means_only", "grand_mean",
                     "cv_percent", "sed", "lsd", "environment_table", "combined_anova",
                     "entry_test_random", "entry_test_fixed", "bartlett", "weighted", "entries",
                     "comparisons", "family", "stability", "variance_components", "heritability",
                     "ranks", "cell_means", "warnings", "notes"}
STABILITY_KEYS = {"entry", "regression_slope", "slope_se", "deviation_ms", "ecovalence",
                  "shukla_variance"}
ENVIRONMENT_KEYS = {"environment", "location", "season", "n_entries", "mean", "cv_percent",
                    "error_ms", "error_df", "lsd"}
TEST_KEYS = {"label", "against", "f", "df1", "df2", "p"}


def run(capsys, *args: str) -> tuple[int, str, str]:
    code = main(["analyze", *map(str, args)])
    out = capsys.readouterr()
    return code, out.out, out.err


def trial_files(folder: Path) -> list[Path]:
    """The invented series as four trial files, one per environment (station and season set)."""
    frame = invented_plots()
    paths = []
    for (location, season), part in frame.groupby(["location", "season"], sort=False):
        csv = write(part[["block", "entry", "plot", "yield"]], folder, f"{location}{season}.csv")
        path = folder / f"{location}{season}.trial"
        import_fieldbook(read_fieldbook(csv), path, facts={"station": location, "season": season},
                         checks=("E3",))
        paths.append(path)
    return paths


def test_location_run_prints_the_series_summary(tmp_path, capsys):
    code, out, err = run(capsys, immer_csv(tmp_path), "--entry", "Var", "--location", "Loc",
                         "--season", "year", "--check", "M")
    assert code == 0, err
    text = " ".join(out.split())
    for part in ("series summary", "Environments (12): UF 1931", "Combined analysis of variance",
                 "Entry test, environments random", "Entry means over environments",
                 "Letters", "% check", "Stability over environments", "Heritability of entry "
                 "means", "H2 = s2G / (s2G + s2res/e)", "do not make it"):
        assert part in text, part


def test_plot_series_summary_has_bartlett_and_both_entry_tests(tmp_path, capsys):
    path = write(invented_plots(), tmp_path)
    code, out, err = run(capsys, path, "--location", "location", "--season", "season")
    assert code == 0, err
    text = " ".join(out.split())
    for part in ("Bartlett's test of equal error variances", "block within environment",
                 "pooled error", "environments fixed (against pooled error)",
                 "H2 = s2G / (s2G + s2GE/e + s2e/(r e))", "LSD(0.05)"):
        assert part in text, part


def test_json_contract(tmp_path, capsys):
    path = write(invented_plots(), tmp_path)
    code, out, err = run(capsys, path, "--location", "location", "--season", "season",
                         "--check", "E3", "--json", "-")
    assert code == 0, err
    doc = json.loads(out)
    assert TOP_KEYS <= doc.keys()
    assert doc["schema_version"] == 1 and doc["kind"] == "series"
    assert [e["environment"] for e in doc["environments"]] == [
        "North 2025", "South 2025", "North 2026", "South 2026"]
    trait = doc["traits"][0]
    assert SERIES_TRAIT_KEYS <= trait.keys()
    assert all(ENVIRONMENT_KEYS <= e.keys() for e in trait["environment_table"])
    assert all(ANOVA_KEYS <= a.keys() for a in trait["combined_anova"])
    assert all(ENTRY_KEYS <= e.keys() for e in trait["entries"])
    assert all(PAIR_KEYS <= c.keys() for c in trait["comparisons"])
    assert all(STABILITY_KEYS <= s.keys() for s in trait["stability"])
    assert TEST_KEYS <= trait["entry_test_random"].keys() <= TEST_KEYS
    assert trait["entry_test_fixed"]["label"] == "environments fixed"
    assert trait["heritability"]["formula"] and trait["variance_components"]["method"] == "ANOVA"
    assert set(trait["ranks"]) == {e["entry"] for e in trait["entries"]}
    assert all(len(r) == 4 for r in trait["ranks"].values())
    # exactly what the core gives
    expected = analyze_series(read_series(path, location="location", season="season"),
                              AnalysisSettings(checks=("E3",))).traits[0]
    assert [e["entry"] for e in trait["entries"]] == [e.entry for e in expected.entries]
    assert [e["letters"] for e in trait["entries"]] == [e.letters for e in expected.entries]
    assert_allclose([e["mean"] for e in trait["entries"]], [e.mean for e in expected.entries],
                    rtol=1e-15)  # the same numbers, through JSON's shortest round-trip form
    assert [s["entry"] for s in trait["stability"]] == [s.entry for s in expected.stability]


def test_single_trial_json_says_kind_trial(capsys):
    from trialdesk.core.demo import demo_fieldbook_path

    code, out, _ = run(capsys, demo_fieldbook_path(), "--trait", "grain_yield", "--json", "-")
    assert code == 0 and json.loads(out)["kind"] == "trial"


def test_several_trial_files_make_a_series(tmp_path, capsys):
    paths = trial_files(tmp_path)
    code, out, err = run(capsys, *paths, "--json", "-")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["kind"] == "series" and len(doc["sources"]) == 4
    assert [e["environment"] for e in doc["environments"]] == [
        "North 2025", "South 2025", "North 2026", "South 2026"]
    assert [e["source"] for e in doc["environments"]] == [p.name for p in paths]
    assert doc["checks"] == ["E3"]  # saved in the trials
    assert len({s["sha256"] for s in doc["sources"]}) == 4
    code, out, err = run(capsys, *paths)
    assert code == 0 and "Environments (4): North 2025, South 2025" in out


def test_variance_components_by_reml(tmp_path, capsys):
    path = write(invented_plots(), tmp_path)
    code, out, err = run(capsys, path, "--location", "location", "--season", "season",
                         "--variance-components", "reml", "--json", "-")
    assert code == 0, err
    assert json.loads(out)["traits"][0]["variance_components"]["method"] == "REML"


def test_component_choices_are_the_cores():
    analyze = build_parser()._subparsers._group_actions[0].choices["analyze"]
    option = next(a for a in analyze._actions if a.dest == "variance_components")
    assert tuple(option.choices) == COMPONENT_METHODS


@pytest.mark.parametrize("args, words", [
    (["--location", "site"], ["column 'site'", "there is no such column"]),
    (["--location", "location", "--season", "season", "--trait", "nope"],
     ["column 'nope'", "there is no such column"]),
    (["--season", "season"], ["give the location column with --location"]),
    (["--location", "location", "--row", "row"], ["--row is not used in a series"]),
])
def test_bad_input_exits_2(tmp_path, capsys, args, words):
    path = write(invented_plots(), tmp_path)
    code, out, err = run(capsys, path, *args)
    assert code == 2 and "Traceback" not in err
    for word in words:
        assert word in err, err
    assert not (tmp_path / "out.xlsx").exists() and not (tmp_path / "out.pdf").exists()


def test_one_environment_exits_2_without_traceback(tmp_path):
    frame = invented_plots()
    path = write(frame[(frame["location"] == "North") & (frame["season"] == "2025")], tmp_path)
    done = subprocess.run([*script(), "analyze", str(path), "--location", "location"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert "a series needs at least two environments" in done.stderr
    assert str(path) in done.stderr and "column 'location'" in done.stderr


def test_field_books_together_are_refused(tmp_path, capsys):
    frame = invented_plots()
    a = write(frame[frame["season"] == "2025"], tmp_path, "a.csv")
    b = write(frame[frame["season"] == "2026"], tmp_path, "b.csv")
    code, _, err = run(capsys, a, b)
    assert code == 2 and "only as trial files" in err and "a.csv" in err


def test_location_with_trial_files_is_refused(tmp_path, capsys):
    paths = trial_files(tmp_path)
    code, _, err = run(capsys, *paths, "--location", "location")
    assert code == 2 and "--location reads the environments of one field book" in err


def test_one_trial_file_is_still_a_single_trial(tmp_path, capsys):
    path = trial_files(tmp_path)[0]
    code, out, err = run(capsys, path, "--json", "-")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["kind"] == "trial" and doc["source"] == path.name
