"""Tests of grain yield from plot weight: units, moisture adjustment, crop defaults, bad input.

Expected values are worked by hand from the definitions in the module docstring (the arithmetic
is written beside each one). The conversions are a few multiplications and one division, so
results agree with the hand arithmetic to rounding: rtol=1e-12 throughout unless said otherwise.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from trialdesk.core.errors import TrialInputError
from trialdesk.core.yield_conversion import CROP_DEFAULTS, CropDefaults, grain_yield

RTOL = 1e-12  # a handful of float operations each way


def test_worked_example_with_moisture_adjustment() -> None:
    # 5.40 kg / 6.0 m2 = 0.9 kg/m2 = 9.0 t/ha at 18 % moisture;
    # at 13.5 %: 9.0 x (100 - 18) / (100 - 13.5) = 9.0 x 82 / 86.5 = 8.531791907514451 t/ha.
    y = grain_yield(5.40, 6.0, moisture=18.0, standard_moisture_pct=13.5)
    assert_allclose(y, 8.531791907514451, rtol=RTOL)
    assert isinstance(y, np.ndarray) and y.shape == ()


@pytest.mark.parametrize(
    ("weight", "weight_unit", "unit", "expected"),
    [
        (5.40, "kg", "t/ha", 9.0),       # 0.9 kg/m2 x 10
        (5.40, "kg", "kg/ha", 9000.0),   # 0.9 kg/m2 x 10,000
        (5400.0, "g", "t/ha", 9.0),      # 5400 g = 5.4 kg
        (5400.0, "g", "kg/ha", 9000.0),
    ],
    ids=["kg to t/ha", "kg to kg/ha", "g to t/ha", "g to kg/ha"],
)
def test_units_without_moisture(weight: float, weight_unit: str, unit: str,
                                expected: float) -> None:
    assert_allclose(grain_yield(weight, 6.0, weight_unit=weight_unit, unit=unit), expected,
                    rtol=RTOL)


def test_maize_rule_of_thumb_for_bushels_per_acre() -> None:
    # 1 t/ha of maize at 56 lb/bu: 1000 kg/ha x 0.40468564224 ha/ac / (56 x 0.45359237 kg/bu)
    # = 404.68564224 / 25.40117272 = 15.931770028923292 bu/ac.
    one_t_per_ha = grain_yield(1.0, 10.0, unit="bu/ac", bushel_weight_lb=56.0)  # 0.1 kg/m2
    assert_allclose(one_t_per_ha, 15.931770028923292, rtol=RTOL)
    # The rule of thumb "1 t/ha of maize is 15.93 bu/ac" (common practice) is quoted to two
    # decimals, hence atol=0.005.
    assert_allclose(one_t_per_ha, 15.93, atol=0.005, rtol=0)


def test_maize_plot_in_bushels_at_standard_moisture() -> None:
    # 8.0 kg from 8.0 m2 = 1 kg/m2 = 10,000 kg/ha at 20 % moisture;
    # at 15.5 %: 10,000 x 80 / 84.5 = 9467.455621301775 kg/ha;
    # / (56 x 0.45359237 = 25.40117272 kg/bu) = 372.7172648941294 bu/ha;
    # x 0.40468564224 ha/ac = 150.83332571761696 bu/ac.
    maize = CROP_DEFAULTS["maize"]
    y = grain_yield(8.0, 8.0, unit="bu/ac", moisture=20.0,
                    standard_moisture_pct=maize.standard_moisture_pct,
                    bushel_weight_lb=maize.bushel_weight_lb)
    assert_allclose(y, 150.83332571761696, rtol=RTOL)


def test_wheat_bushels() -> None:
    # 1 t/ha of wheat at 60 lb/bu: 404.68564224 / (60 x 0.45359237 = 27.2155422)
    # = 14.869652026995073 bu/ac (the rule of thumb "about 14.87", common practice).
    assert_allclose(grain_yield(1.0, 10.0, unit="bu/ac", bushel_weight_lb=60.0),
                    14.869652026995073, rtol=RTOL)


def test_per_plot_moisture_and_missing_values() -> None:
    weights = [5.40, np.nan, 6.00, 4.50]
    areas = [6.0, 6.0, 6.0, 5.0]
    moisture = [18.0, 14.0, np.nan, 13.5]
    y = grain_yield(weights, areas, moisture=moisture, standard_moisture_pct=13.5)
    assert_allclose(y, [
        9.0 * 82 / 86.5,  # 8.531791907514451: adjusted from 18 %
        np.nan,           # no weight: no yield, whatever the moisture
        10.0,             # 6.0 / 6.0 x 10; no moisture reading, so not adjusted
        9.0,              # 4.5 / 5.0 x 10, already at the standard
    ], rtol=RTOL)


def test_moisture_below_the_standard_raises_the_yield() -> None:
    # 9.0 t/ha at 10 %, reported at 13.5 %: 9.0 x 90 / 86.5 = 9.364161849710984.
    assert_allclose(grain_yield(5.40, 6.0, moisture=10.0, standard_moisture_pct=13.5),
                    9.364161849710984, rtol=RTOL)


def test_adjusting_there_and_back_is_the_identity() -> None:
    # Same dry matter: from 18 % to 13.5 %, then from 13.5 % back to 18 %.
    there = grain_yield(5.40, 6.0, moisture=18.0, standard_moisture_pct=13.5)
    back = there * (100 - 13.5) / (100 - 18.0)
    assert_allclose(back, 9.0, rtol=RTOL)


def test_accepts_pandas_columns_and_keeps_full_precision() -> None:
    weights = pd.Series([1.2345678901234, 2.0])
    y = grain_yield(weights, 1.0, weight_unit="kg", unit="kg/ha")
    assert_allclose(y, [12345.678901234, 20000.0], rtol=RTOL)  # no rounding in the core


def test_standard_without_readings_changes_nothing() -> None:
    assert_allclose(grain_yield(5.40, 6.0, standard_moisture_pct=13.5), 9.0, rtol=RTOL)


def test_crop_defaults() -> None:
    # Common practice, from memory of US/EU practice (see the module): the values the program
    # starts from, checked here so that a change to them is deliberate.
    expected = {"maize": (15.5, 56.0), "wheat": (13.5, 60.0), "soybean": (13.0, 60.0),
                "barley": (14.5, 48.0), "oats": (14.0, 32.0)}
    for crop, (moisture, bushel) in expected.items():
        assert CROP_DEFAULTS[crop].standard_moisture_pct == moisture
        assert CROP_DEFAULTS[crop].bushel_weight_lb == bushel
    assert CROP_DEFAULTS["corn"] is CROP_DEFAULTS["maize"]
    assert CROP_DEFAULTS["rapeseed"] is CROP_DEFAULTS["canola"]
    for name in ("durum", "rice", "sorghum", "canola", "sunflower"):
        assert name in CROP_DEFAULTS
    for defaults in CROP_DEFAULTS.values():
        assert isinstance(defaults, CropDefaults)
        assert 0 < defaults.standard_moisture_pct < 100
        assert defaults.bushel_weight_lb is None or defaults.bushel_weight_lb > 0
    with pytest.raises(AttributeError):
        CROP_DEFAULTS["wheat"].standard_moisture_pct = 14.0  # type: ignore[misc]


@pytest.mark.parametrize(
    ("arguments", "says"),
    [
        ({"harvested_area_m2": 0.0}, "harvested area must be a positive number"),
        ({"harvested_area_m2": -6.0}, "harvested area must be a positive number"),
        ({"harvested_area_m2": [6.0, np.nan]}, "harvested area must be a positive number"),
        ({"unit": "t/acre"}, "unknown yield unit 't/acre'"),
        ({"weight_unit": "lb"}, "unknown weight unit 'lb'"),
        ({"unit": "bu/ac"}, "needs the bushel test weight"),
        ({"unit": "bu/ac", "bushel_weight_lb": 0.0}, "bushel test weight must be one positive"),
        ({"moisture": 18.0}, "no standard moisture"),
        ({"moisture": 18.0, "standard_moisture_pct": 100.0}, "standard moisture must be one"),
        ({"moisture": 18.0, "standard_moisture_pct": -1.0}, "standard moisture must be one"),
        ({"moisture": 18.0, "standard_moisture_pct": 140.0}, "standard moisture must be one"),
        ({"moisture": [18.0, 100.0], "standard_moisture_pct": 13.5},
         "reading of 100 % (value 2 of 2) is impossible"),
        ({"weight": [1.0, 2.0, 3.0], "harvested_area_m2": [6.0, 6.0]}, "do not fit together"),
        ({"weight": "5.4"}, "plot weights must be numbers"),
        ({"weight": True}, "plot weights must be numbers"),
    ],
    ids=["zero area", "negative area", "missing area", "unknown unit", "unknown weight unit",
         "bushels without a bushel weight", "zero bushel weight", "moisture without standard",
         "standard of 100 %", "negative standard", "standard above 100 %",
         "impossible reading", "lengths differ", "text weight", "true/false weight"],
)
def test_bad_arguments(arguments: dict, says: str) -> None:
    call = {"weight": 5.40, "harvested_area_m2": 6.0, **arguments}
    with pytest.raises(TrialInputError) as info:
        grain_yield(**call)
    assert says in str(info.value)
