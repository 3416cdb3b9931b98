"""The one percentile rule of every bootstrap interval (unbin.models.percentile_limits): the
limits are order statistics found by sorting in the test, and the rule's own coverage when the
bootstrap distribution is exact (Davison & Hinkley 1997, ch. 5)."""

from __future__ import annotations

import numpy as np
import pytest

from unbin.models.percentile_limits import percentile_limits


@pytest.mark.parametrize(("b", "k"), [(39, 1), (199, 5), (999, 25)])
def test_percentile_limits_are_the_b_plus_1_alpha_ordered_replicates(b: int, k: int) -> None:
    """Where (B + 1) x 0.025 is a whole number k, the limits are the k-th smallest and the k-th
    largest replicate (Davison & Hinkley 1997, ch. 5), found here by sorting; numpy's default
    rule would go 0.95 of the way from the k-th to the (k + 1)-th for B = 199."""
    v = np.random.default_rng(b).normal(size=b)
    s = np.sort(v)
    assert percentile_limits(v) == (s[k - 1], s[b - k])
    both = percentile_limits(np.column_stack([v, 2 * v]), axis=0)
    np.testing.assert_array_equal(both, [[s[k - 1], 2 * s[k - 1]], [s[b - k], 2 * s[b - k]]])


def test_percentile_limits_cover_at_95_percent_with_100_replicates() -> None:
    """The rule's own coverage when the bootstrap distribution is exactly right (the estimate
    and each of B = 100 replicates independent N(0, 1) steps, numpy): 20,000 seeded trials
    cover the truth in 0.95 within 3.5 binomial SDs (0.0054); numpy's default quantile rule
    covers about 0.933 here, below that band."""
    rng = np.random.default_rng(8)
    est = rng.normal(size=20_000)
    boot = est[:, None] + rng.normal(size=(20_000, 100))
    lims = percentile_limits(boot.T, axis=0)
    cover = float(np.mean((lims[0] <= 0) & (0 <= lims[1])))
    assert abs(cover - 0.95) < 3.5 * np.sqrt(0.95 * 0.05 / 20_000), cover
    old = np.percentile(boot, [2.5, 97.5], axis=1)
    assert float(np.mean((old[0] <= 0) & (0 <= old[1]))) < 0.95 - 3.5 * np.sqrt(
        0.95 * 0.05 / 20_000)


def test_every_resampling_table_uses_the_one_rule() -> None:
    """The information, decision, confounding and imputed bootstrap intervals take their
    limits from percentile_limits (common practice: one rule, so one table's interval is read
    like another's): no module computes bootstrap limits with numpy's default quantile rule."""
    import inspect

    import unbin.pipeline.imputed as imputed
    import unbin.questions.confounding as confounding
    import unbin.questions.decision_resampling as decision_resampling
    import unbin.questions.kept as kept

    for module in (kept, imputed, confounding, decision_resampling):
        source = inspect.getsource(module)
        assert "percentile_limits(" in source, module.__name__
        assert "[0.025, 0.975]" not in source and "[2.5, 97.5]" not in source, module.__name__
