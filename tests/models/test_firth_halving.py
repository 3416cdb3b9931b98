"""The step halving shared by the Firth logistic and Firth Cox fits."""

from __future__ import annotations

import numpy as np

from unbin.models.firth import Evaluation, halving_failed, improving_step


def _quadratic(theta: np.ndarray) -> Evaluation | None:
    # a concave objective with its maximum at 1: a long step overshoots and must be halved
    value = -float(np.sum((theta - 1.0) ** 2))
    return value, value, np.zeros_like(theta), np.eye(theta.size)


def test_halving_stops_at_the_first_step_that_does_not_lower_the_objective() -> None:
    # Brute force: the steps 8, 4, 2 from 0 give objectives -49, -9, -1, all below -0.5, and
    # the step 1 reaches the maximum 0, so three halvings and the point 1 (by hand).
    at, pll = np.zeros(1), -0.5
    found = improving_step(_quadratic, at, np.array([8.0]), pll)
    assert found is not None
    point, ev = found
    np.testing.assert_array_equal(point, [1.0])
    assert ev[1] == 0.0


def test_halving_gives_up_after_thirty_tries_and_skips_points_it_cannot_evaluate() -> None:
    tried: list[float] = []

    def nowhere(theta: np.ndarray) -> Evaluation | None:
        tried.append(float(theta[0]))
        return None

    assert improving_step(nowhere, np.zeros(1), np.array([1.0]), 0.0) is None
    assert tried == [2.0 ** -k for k in range(30)]
    assert halving_failed("log-likelihood").startswith(
        "step halving could not improve the penalised log-likelihood;")
