import math

import pytest

from adaptkit.train.schedules import constant, cosine, dann_anneal, dann_ramp, get_schedule


@pytest.mark.parametrize("p", [0.0, 0.25, 0.5, 1.0])
def test_schedules_against_their_formulas(p):
    # Ganin et al., JMLR 2016, §5.2.2: λ_p = 2/(1+exp(−10p)) − 1 and μ_p = μ0/(1+10p)^0.75
    assert dann_ramp(p) == pytest.approx(2 / (1 + math.exp(-10 * p)) - 1)
    assert dann_anneal(p) == pytest.approx((1 + 10 * p) ** -0.75)
    # cosine decay without restarts (Loshchilov & Hutter, ICLR 2017, Eq. 5 with η_min = 0, η_max = 1)
    assert cosine(p) == pytest.approx(0.5 * (1 + math.cos(math.pi * p)))
    assert constant(p) == 1.0


def test_ramp_endpoints():
    assert dann_ramp(0) == 0.0 and dann_ramp(1) == pytest.approx(0.9999092, abs=1e-7)  # 2/(1+e^-10)-1


def test_unknown_schedule_lists_choices():
    with pytest.raises(ValueError, match="must be one of"):
        get_schedule("step")
