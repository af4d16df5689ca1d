import math
import re

import pytest

from adaptkit.train.optim import OptimSettings
from adaptkit.train.schedules import (LR_SCHEDULES, WEIGHT_SCHEDULES, constant, cosine, dann_anneal, dann_ramp,
                                      lr_schedule, parameters, weight_schedule)


@pytest.mark.parametrize("p", [0.0, 0.25, 0.5, 1.0])
def test_schedules_against_their_formulas(p):
    # Ganin et al., JMLR 2016, §5.2.2: λ_p = 2/(1+exp(−γp)) − 1 with γ = 10, and μ_p = μ0/(1+αp)^β with α = 10,
    # β = 0.75
    assert dann_ramp(p) == pytest.approx(2 / (1 + math.exp(-10 * p)) - 1)
    assert dann_anneal(p) == pytest.approx((1 + 10 * p) ** -0.75)
    # the same formulas at other parameter values
    assert dann_ramp(p, gamma=3.0) == pytest.approx(2 / (1 + math.exp(-3 * p)) - 1)
    assert dann_anneal(p, alpha=5.0, beta=0.5) == pytest.approx((1 + 5 * p) ** -0.5)
    # cosine decay without restarts (Loshchilov & Hutter, ICLR 2017, Eq. 5 with η_min = 0, η_max = 1)
    assert cosine(p) == pytest.approx(0.5 * (1 + math.cos(math.pi * p)))
    assert constant(p) == 1.0


def test_ramp_endpoints():
    assert dann_ramp(0) == 0.0 and dann_ramp(1) == pytest.approx(0.9999092, abs=1e-7)  # 2/(1+e^-10)-1


def test_two_tables_and_the_papers_default_parameters():
    assert set(LR_SCHEDULES) == {"constant", "cosine", "dann_anneal"}
    assert set(WEIGHT_SCHEDULES) == {"constant", "dann_ramp"}
    # Ganin et al., JMLR 2016, §5.2.2: γ = 10; α = 10, β = 0.75
    assert parameters(dann_ramp) == {"gamma": 10.0}
    assert parameters(dann_anneal) == {"alpha": 10.0, "beta": 0.75}
    assert parameters(constant) == parameters(cosine) == {}


def test_unknown_schedule_lists_choices():
    with pytest.raises(ValueError, match="must be one of"):
        lr_schedule("step")


def test_each_table_refuses_the_others_schedules_naming_the_right_parameter():
    with pytest.raises(ValueError, match=re.escape("The 'schedule' parameter of optim must be one of {'constant', "
                                                   "'cosine', 'dann_anneal'}. Got 'dann_ramp' instead.")):
        lr_schedule("dann_ramp")
    with pytest.raises(ValueError, match=re.escape("The 'schedule' parameter of optim must be one of")):
        OptimSettings.from_dict({"schedule": "dann_ramp"})
    with pytest.raises(ValueError, match=re.escape(
            "The 'weight_schedule' parameter of method 'dann' must be one of {'constant', 'dann_ramp'}. "
            "Got 'dann_anneal' instead.")):
        weight_schedule("dann_anneal", "method 'dann'")


def test_parameters_are_taken_from_settings_by_name():
    settings = {"gamma": 3.0, "weight": 2.0, "disc_hidden": [4]}  # a method's options: only gamma is dann_ramp's
    ramp = weight_schedule("dann_ramp", "method 'x'", settings)
    assert ramp(0.4) == pytest.approx(2 / (1 + math.exp(-3 * 0.4)) - 1)
    assert weight_schedule("dann_ramp", "method 'x'", {"weight": 2.0})(0.4) == pytest.approx(
        2 / (1 + math.exp(-10 * 0.4)) - 1)  # no gamma given: the paper's 10
    assert weight_schedule("constant", "method 'x'", settings)(0.4) == 1.0
    anneal = lr_schedule("dann_anneal", settings={"alpha": 5.0, "beta": 0.5, "lr": 0.01})
    assert anneal(0.6) == pytest.approx((1 + 5 * 0.6) ** -0.5)
    assert lr_schedule("dann_anneal")(0.6) == pytest.approx((1 + 10 * 0.6) ** -0.75)
