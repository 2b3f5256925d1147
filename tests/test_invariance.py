"""Property tests: the analysis must not depend on things that cannot matter.

Shuffling the plot rows changes nothing; adding a constant to every value shifts the means and
nothing else; a change of units (scaling) scales sums of squares by the square of the factor and
leaves every p-value and letter alone. (These are properties of least squares; no outside
reference is needed beyond the algebra.)
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from trialdesk.core.analysis import analyze
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.results import AnalysisSettings


def trial(seed: int, t: int, b: int, n_missing: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame([(f"E{i:02d}", str(j + 1)) for j in range(b) for i in range(t)],
                         columns=["entry", "block"])
    frame["yield"] = (4 + rng.normal(0, 0.6, t)[frame.index % t]
                      + rng.normal(0, 0.3, b)[frame.index // t] + rng.normal(0, 0.25, len(frame)))
    drop = rng.choice(len(frame), size=n_missing, replace=False)
    frame.loc[drop, "yield"] = np.nan
    return frame


def run(frame: pd.DataFrame, path, method: str):
    frame.to_csv(path, index=False, float_format="%.17g")
    return analyze(read_fieldbook(path), AnalysisSettings(method=method)).trait("yield")


def by_entry(result):
    return {e.entry: e for e in result.entries}


def by_pair(result):
    return {frozenset((c.entry_a, c.entry_b)): c for c in result.comparisons}


cases = st.tuples(
    st.integers(0, 10_000), st.integers(3, 7), st.integers(3, 4), st.integers(0, 2),
    st.sampled_from(["tukey", "lsd", "holm", "snk", "duncan", "bh", "scheffe"]),
)
tolerant = settings(max_examples=25, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])


@tolerant
@given(case=cases, order_seed=st.integers(0, 10_000))
def test_shuffling_plots_changes_nothing(tmp_path, case, order_seed):
    seed, t, b, n_missing, method = case
    frame = trial(seed, t, b, n_missing)
    base = run(frame, tmp_path / "a.csv", method)
    shuffled = frame.sample(frac=1, random_state=order_seed).reset_index(drop=True)
    other = run(shuffled, tmp_path / "b.csv", method)
    # rtol 1e-9: the same least-squares problem with its rows permuted.
    assert_allclose([r.ss for r in base.anova], [r.ss for r in other.anova], rtol=1e-9)
    for entry, e in by_entry(base).items():
        o = by_entry(other)[entry]
        assert_allclose(e.mean, o.mean, rtol=1e-10)
        assert e.letters == o.letters and e.rank == o.rank
    for key, c in by_pair(base).items():
        assert_allclose(c.p_adjusted, by_pair(other)[key].p_adjusted, rtol=1e-7, atol=1e-12)


@tolerant
@given(case=cases, shift=st.floats(-50, 50), scale=st.floats(0.01, 1000))
def test_shift_and_scale(tmp_path, case, shift, scale):
    seed, t, b, n_missing, method = case
    frame = trial(seed, t, b, n_missing)
    base = run(frame, tmp_path / "a.csv", method)
    moved = frame.assign(**{"yield": frame["yield"] * scale + shift})
    other = run(moved, tmp_path / "b.csv", method)
    assert_allclose([r.ss for r in other.anova], [r.ss * scale**2 for r in base.anova],
                    rtol=1e-7)
    for row, orow in zip(base.anova, other.anova, strict=True):
        if row.p is not None:
            assert_allclose(orow.p, row.p, rtol=1e-6, atol=1e-12)
    for entry, e in by_entry(base).items():
        o = by_entry(other)[entry]
        assert_allclose(o.mean, e.mean * scale + shift, rtol=1e-8, atol=1e-8 * abs(shift))
        assert e.letters == o.letters
    for key, c in by_pair(base).items():
        assert_allclose(by_pair(other)[key].p_adjusted, c.p_adjusted, rtol=1e-6, atol=1e-10)
