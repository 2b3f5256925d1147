"""Grain yield per area from plot weight, adjusted to a standard moisture.

The arithmetic is common practice:

- yield per area: Y = W / A, the plot's grain weight in kg over its harvested area in m2, in
  kg/m2; x 10 gives t/ha and x 10,000 kg/ha;
- bushels per acre: Y_bu/ac = Y_kg/ha x 0.40468564224 / (B x 0.45359237), with B the bushel test
  weight in lb/bu, 0.45359237 kg in a pound and 0.40468564224 ha in an acre (both exact by the
  definitions of the international pound and yard, 1959);
- standard moisture: Y_std = Y_obs x (100 - M_obs) / (100 - M_std), with M_obs the moisture
  measured on the plot's grain and M_std the standard it is reported at (both in percent). The
  dry matter is the same at either moisture, so the weight scales with 100 - M.

Standard moistures and bushel weights differ by country and market: :data:`CROP_DEFAULTS` gives
common values to start from, and a report states the ones it used.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from trialdesk.core.errors import TrialInputError

__all__ = ["CROP_DEFAULTS", "UNITS", "WEIGHT_UNITS", "CropDefaults", "grain_yield"]

#: Kilograms in one pound (international avoirdupois pound, exact by definition, 1959).
KG_PER_LB = 0.45359237
#: Hectares in one acre (4,840 square yards of 0.9144 m, exact by definition, 1959).
HA_PER_ACRE = 0.40468564224

#: Plot weight units, as kilograms per unit.
WEIGHT_UNITS: dict[str, float] = {"g": 0.001, "kg": 1.0}
#: Yield units, as multiples of kg/m2 (bu/ac depends on the bushel weight, see the module notes).
UNITS: dict[str, float | None] = {"t/ha": 10.0, "kg/ha": 10_000.0, "bu/ac": None}


@dataclass(frozen=True, slots=True, kw_only=True)
class CropDefaults:
    """The standard moisture and bushel test weight commonly used for a crop.

    Attributes
    ----------
    crop : str
        The crop's name.
    standard_moisture_pct : float
        Moisture (percent, wet basis) that yields are commonly reported at.
    bushel_weight_lb : float or None
        Test weight of a bushel (lb/bu) used to turn weight into bushels; None for a crop that is
        not commonly traded by the bushel.
    """

    crop: str
    standard_moisture_pct: float
    bushel_weight_lb: float | None


def _defaults(crop: str, moisture: float, bushel: float | None) -> CropDefaults:
    return CropDefaults(crop=crop, standard_moisture_pct=moisture, bushel_weight_lb=bushel)


_MAIZE = _defaults("maize", 15.5, 56.0)
_CANOLA = _defaults("canola", 9.0, 50.0)

#: Common practice; they differ by country and market. The values are from memory of common US
#: and EU practice (US grain standards for the bushel weights), not from one published table:
#: keep them editable, and show in a report which ones were used.
CROP_DEFAULTS: dict[str, CropDefaults] = {
    "wheat": _defaults("wheat", 13.5, 60.0),
    "durum": _defaults("durum", 13.5, 60.0),
    "barley": _defaults("barley", 14.5, 48.0),
    "oats": _defaults("oats", 14.0, 32.0),
    "rye": _defaults("rye", 14.0, 56.0),
    "rice": _defaults("rice", 14.0, 45.0),  # rough (paddy) rice
    "maize": _MAIZE,
    "corn": _MAIZE,
    "sorghum": _defaults("sorghum", 14.0, 56.0),
    "soybean": _defaults("soybean", 13.0, 60.0),
    "canola": _CANOLA,
    "rapeseed": _CANOLA,
    "sunflower": _defaults("sunflower", 10.0, None),  # traded by weight, not by the bushel
}


def grain_yield(
    weight: object,
    harvested_area_m2: object,
    *,
    weight_unit: str = "kg",
    unit: str = "t/ha",
    moisture: object = None,
    standard_moisture_pct: float | None = None,
    bushel_weight_lb: float | None = None,
) -> np.ndarray:
    """Yield per area from plot weight, adjusted to a standard moisture where it was measured.

    Parameters
    ----------
    weight : float or array-like
        Grain weight of each plot, NaN where missing.
    harvested_area_m2 : float or array-like
        Harvested area of each plot (or of every plot), in square metres; must be positive.
    weight_unit : {"kg", "g"}
        Unit of ``weight``.
    unit : {"t/ha", "kg/ha", "bu/ac"}
        Unit of the result; "bu/ac" needs ``bushel_weight_lb``.
    moisture : float or array-like, optional
        Grain moisture (percent) measured on each plot, NaN where it was not measured.
    standard_moisture_pct : float, optional
        The moisture (percent) to report the yield at; needed when ``moisture`` is given.
    bushel_weight_lb : float, optional
        Bushel test weight (lb/bu), for "bu/ac"; see :data:`CROP_DEFAULTS`.

    Returns
    -------
    numpy.ndarray
        Yield of each plot in ``unit``, at full precision; NaN where the weight is missing. The
        shape is that of the inputs broadcast together (0-d for scalars).

    Raises
    ------
    TrialInputError
        An area that is not positive, an unknown unit, a moisture (measured or standard) outside
        0 to below 100 %, a measured moisture without a standard, "bu/ac" without a bushel weight,
        or inputs whose lengths do not match.

    Notes
    -----
    A plot whose moisture was not measured (NaN) is **not** adjusted: its yield is at whatever
    moisture the grain had when weighed. Give a moisture for every plot to report every plot at
    the standard. A standard given without any moisture readings changes nothing.

    Examples
    --------
    5.40 kg from 6.0 m2 at 18 % moisture, reported at 13.5 %:

    >>> y = grain_yield(5.40, 6.0, moisture=18.0, standard_moisture_pct=13.5)
    >>> round(float(y), 4)
    8.5318
    >>> grain_yield([5400, float("nan")], 6.0, weight_unit="g").tolist()
    [9.0, nan]
    """
    per_kg = _choice(weight_unit, WEIGHT_UNITS, "weight unit")
    per_kg_m2 = _choice(unit, UNITS, "yield unit")
    weights = _numbers(weight, "the plot weights")
    areas = _numbers(harvested_area_m2, "the harvested areas")
    if np.any(~(areas > 0)) or not np.all(np.isfinite(areas)):
        raise TrialInputError(
            "the harvested area must be a positive number of square metres for every plot"
        )
    per_area = weights * per_kg / _broadcast(areas, weights)  # kg/m2
    if per_kg_m2 is None:
        per_area = per_area * _bushels_per_acre_per_kg_m2(bushel_weight_lb)
    else:
        per_area = per_area * per_kg_m2
    if moisture is None:
        return np.asarray(per_area)  # arithmetic on 0-d arrays gives NumPy scalars
    standard = _standard_moisture(standard_moisture_pct)
    readings = _numbers(moisture, "the moisture readings")
    impossible = np.flatnonzero(~np.isnan(readings) & ~((readings >= 0) & (readings < 100)))
    if len(impossible):
        k = int(impossible[0])
        which = f" (value {k + 1} of {readings.size})" if readings.size > 1 else ""
        raise TrialInputError(
            f"a moisture reading of {readings.flat[k]:g} %{which} is impossible; readings are "
            "percentages from 0 up to (not including) 100"
        )
    readings = _broadcast(readings, per_area)
    # Y_std = Y_obs x (100 - M_obs) / (100 - M_std): same dry matter (common practice).
    factor = np.where(np.isfinite(readings), (100.0 - readings) / (100.0 - standard), 1.0)
    return np.asarray(np.broadcast_to(per_area, factor.shape) * factor)


def _choice(value: object, choices: dict[str, float | None], what: str) -> float | None:
    if not isinstance(value, str) or value not in choices:
        raise TrialInputError(
            f"unknown {what} {value!r}; use {', '.join(repr(c) for c in choices)}"
        )
    return choices[value]


def _numbers(values: object, what: str) -> np.ndarray:
    """The values as floats; text and true/false are refused rather than read as numbers."""
    try:
        raw = np.asarray(values)
        if raw.dtype.kind in "iuf" or (raw.dtype.kind == "O" and not any(
                isinstance(v, str | bool | np.bool_) for v in raw.flat)):
            return raw.astype(np.float64)
    except (TypeError, ValueError):
        pass
    raise TrialInputError(f"{what} must be numbers (NaN where missing), not {values!r}")


def _broadcast(values: np.ndarray, like: np.ndarray) -> np.ndarray:
    try:
        return np.broadcast_arrays(values, like)[0]
    except ValueError as exc:
        raise TrialInputError(
            f"the inputs do not fit together: {values.size} values against {like.size} plots; "
            "give one value per plot, or one for every plot"
        ) from exc


def _bushels_per_acre_per_kg_m2(bushel_weight_lb: object) -> float:
    bushel = _setting(
        bushel_weight_lb, lambda b: 0 < b < math.inf,
        absent="yield in bu/ac needs the bushel test weight (lb/bu), for example 56 for maize "
        "or 60 for wheat and soybean (common practice)",
        wrong="the bushel test weight must be one positive number of lb/bu",
    )
    # kg/m2 -> kg/ha (x 10,000) -> bu/ha (/ kg per bushel) -> bu/ac (x ha per acre)
    return 10_000.0 * HA_PER_ACRE / (bushel * KG_PER_LB)


def _standard_moisture(standard_moisture_pct: object) -> float:
    return _setting(
        standard_moisture_pct, lambda m: 0 <= m < 100,
        absent="moisture readings were given, but no standard moisture to adjust the yield to; "
        "give the standard (for example 15.5 % for maize, 13.5 % for wheat: common practice)",
        wrong="the standard moisture must be one percentage from 0 up to (not including) 100",
    )


def _setting(value: object, fits: Callable[[float], bool], *, absent: str, wrong: str) -> float:
    """One number the conversion needs, such as the bushel weight; refused when missing or wrong."""
    if value is None:
        raise TrialInputError(absent)
    try:
        number = _numbers(value, "it")
        usable = number.ndim == 0 and fits(float(number))
    except TrialInputError:  # text or true/false: refused below, as any value that does not fit
        usable = False
    if not usable:
        raise TrialInputError(f"{wrong}, not {value!r}")
    return float(number)
