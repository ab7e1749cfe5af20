"""A deep tanh stack's plan names its mean-field phase and offers the critical pair.

Outside reference: for tanh with sigma_b = 0 the order-to-chaos transition is at sigma_w = 1
(Poole et al. 2016; Schoenholz et al. 2017 [from memory]); LeCun's scale std = gain /
sqrt(fan_in) (LeCun et al. 1998) gives sigma_w = gain, so gain 1 is the critical point.
"""

from __future__ import annotations

import re

from seedbed.core.meanfield import mean_field
from seedbed.core.plan import build_plan


def tanh_stack(depth: int, **extra: object) -> dict[str, object]:
    return {
        "seed": 11,
        "layers": [
            {
                "name": f"ridge.{i}",
                "kind": "dense",
                "n_in": 128,
                "n_out": 128,
                "activation": "tanh",
                **extra,
            }
            for i in range(depth)
        ],
    }


def test_the_plan_offers_the_critical_pair() -> None:
    (warning,) = [w for w in build_plan(tanh_stack(16)).warnings if "Mean field" in w]
    assert "chaotic" in warning and "sigma_w = 1 " in warning
    assert '{"method": "lecun", "gain": 1}' in warning
    xi = float(re.search(r"decorrelate over about ([0-9.]+) layers", warning).group(1))
    assert 1 < xi < 100


def test_the_offered_override_is_critical() -> None:
    plan = build_plan(tanh_stack(16, init={"method": "lecun", "gain": 1}))
    w = plan.tensor("ridge.3.weight")
    sigma_w2 = 128 * w.std**2
    assert abs(sigma_w2 - 1.0) < 1e-12
    assert mean_field("tanh", sigma_w2, 0.0).phase == "critical"


def test_short_stacks_get_no_offer() -> None:
    assert not [w for w in build_plan(tanh_stack(4)).warnings if "Mean field" in w]
