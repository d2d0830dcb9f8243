"""From datasheet figures to consistent Gummel-Poon parameters.

An engineer enters what a transistor datasheet states: current gain h_FE (min / typ / max) at a
test current and V_CE, optionally h_FE at a high current (the fall-off) and at a low current (the
roll-off), V_CE(sat) at a stated I_C / I_B, V_BE(sat) there, V_BE(on) at a current, I_CBO at a
V_CB, and the ratings (V_(BR)CEO, I_C max, power, T_j max, theta_JA, theta_JC). A few class
figures that datasheets rarely give (Early voltage, reverse gain, temperature exponent of the
gain) have typical defaults. :func:`fit_datasheet` derives model parameters that reproduce every
stated figure; :meth:`FittedDevice.forward_beta_for_hfe` maps a sampled h_FE onto the model's
ideal forward gain so that the model's h_FE at the test point equals the sample.

Which parameter each figure sets:

========================  ============================  ======================================
figure                    parameter                     condition (25 degC)
========================  ============================  ======================================
vbe_on at its I_C, V_CE   saturation_current            V_BE of the model (at typical h_FE)
hfe_high_min at its I_C   knee_current                  h_FE(I_high) at h_FE(test) = hfe_min
hfe_low_min at its I_C    be_leakage_current            h_FE(I_low) at h_FE(test) = hfe_min
vce_sat_max at I_C, I_B   collector_resistance          V_CE at the forced gain, hfe_min unit
vbe_sat_max at I_C, I_B   base_resistance               V_BE at the forced gain, hfe_min unit
vbe_sat_typ               base_resistance (per sample)  the unit's own V_BE(sat), see parameters
vbe_on_min, vbe_on_max    saturation_current (per       the unit's own V_BE(on), see parameters
                          sample), base_resistance      (vbe_sat_max met by the highest one)
hfe at the test point     forward_beta (per sample)     closed form, see forward_beta_for_hfe
icbo_max at V_CB          cbo_leakage (per sample)      generation term of the model
iceo_max at V_CE          be_leakage_emission           base open, hfe_max unit at icbo_max
icbo_hot_max at its T     leakage_doubling              I_CBO at that temperature, icbo_max unit
========================  ============================  ======================================

The conditions are coupled weakly; they are solved in turn (each a one-dimensional bracketed
root, ``scipy.optimize.brentq``) and the sweep is repeated until no parameter moves by more
than 1e-9 relative. The maximum figures (V_CE(sat), V_BE(sat)) are met by the minimum-gain unit
(the least overdriven one, so the model is conservative for the saturation check), V_BE(on) by
the typical unit. With a V_BE(on) spread (``vbe_on_min``, ``vbe_on_max``) V_BE(sat) max is met
by the minimum-gain unit whose junction lies at ``vbe_on_max``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields, replace

import numpy as np

from tolerance.models.newton import newton_solve
from tolerance.models.transistor import (
    REFERENCE_TEMPERATURE,
    TransistorParameters,
    junction_currents,
    terminal_offsets,
    thermal_voltage,
)

__all__ = [
    "CLASS_DEFAULTS",
    "DATASHEET_FIGURES",
    "Datasheet",
    "DatasheetError",
    "FittedDevice",
    "fit_datasheet",
    "model_figures",
    "hfe_at",
    "icbo_at",
    "iceo_at",
    "saturation_at",
]


class DatasheetError(ValueError):
    """Inconsistent or impossible device data; ``key`` names the offending figure."""

    def __init__(self, key: str, message: str, related: tuple[str, ...] = ()):
        self.key = key
        self.message = message
        #: other figures the conflict involves (a study that gave one of them, not ``key``,
        #: is told about its own)
        self.related = tuple(related)
        super().__init__(f"{key}: {message}")


#: Datasheet figures: name -> (unit for tolerance.units, description). Figures marked with a
#: trailing '*' in the description are required.
DATASHEET_FIGURES: dict[str, tuple[str, str]] = {
    "hfe_min": ("1", "minimum DC current gain at the test point*"),
    "hfe_typ": ("1", "typical DC current gain at the test point"),
    "hfe_max": ("1", "maximum DC current gain at the test point*"),
    "hfe_current": ("A", "collector current of the h_FE test point*"),
    "hfe_vce": ("V", "collector-emitter voltage of the h_FE test point*"),
    "hfe_high_current": ("A", "high collector current where h_FE has fallen off"),
    "hfe_high_min": ("1", "minimum h_FE at hfe_high_current"),
    "hfe_low_current": ("A", "low collector current where h_FE has rolled off"),
    "hfe_low_min": ("1", "minimum h_FE at hfe_low_current"),
    "vce_sat_max": ("V", "maximum collector-emitter saturation voltage*"),
    "vce_sat_ic": ("A", "collector current of the V_CE(sat) figure*"),
    "vce_sat_ib": ("A", "base current of the V_CE(sat) figure*"),
    "vbe_sat_max": ("V", "maximum base-emitter voltage at the V_CE(sat) point"),
    "vbe_sat_typ": ("V", "typical base-emitter voltage at the V_CE(sat) point"),
    "vbe_on": ("V", "typical base-emitter on voltage*"),
    "vbe_on_current": ("A", "collector current of the V_BE(on) figure*"),
    "vbe_on_vce": ("V", "collector-emitter voltage of the V_BE(on) figure*"),
    "vbe_on_min": ("V", "lowest base-emitter on voltage at the V_BE(on) test point"),
    "vbe_on_max": ("V", "highest base-emitter on voltage at the V_BE(on) test point"),
    "icbo_max": ("A", "maximum collector-base cut-off current at 25 degC*"),
    "icbo_vcb": ("V", "collector-base voltage of the I_CBO figure*"),
    "iceo_max": ("A", "maximum collector-emitter cut-off current, base open, at 25 degC"),
    "iceo_vce": ("V", "collector-emitter voltage of the I_CEO figure"),
    "icbo_hot_max": ("A", "maximum I_CBO at icbo_hot_temperature (the same V_CB)"),
    "icbo_hot_temperature": ("temperature", "temperature of the hot I_CBO figure"),
    "breakdown_vceo": ("V", "collector-emitter breakdown voltage, base open*"),
    "ic_max": ("A", "maximum continuous collector current*"),
    "power_rating": ("W", "total dissipation at 25 degC ambient, free air*"),
    "power_rating_case": ("W", "total dissipation at 25 degC case (a power package's P_tot)"),
    "tj_max": ("temperature", "maximum junction temperature*"),
    "theta_ja": ("K/W", "thermal resistance junction to ambient*"),
    "theta_jc": ("K/W", "thermal resistance junction to case"),
    # class figures, rarely on a datasheet: defaults in CLASS_DEFAULTS
    "early_voltage": ("V", "forward Early voltage (class figure)"),
    "reverse_beta": ("1", "reverse current gain (class figure)"),
    "beta_exponent": ("1", "temperature exponent of the current gain (class figure)"),
    "emitter_resistance": ("ohm", "emitter series resistance (class figure)"),
    "leakage_doubling": ("K", "temperature rise that doubles I_CBO"),
    "icbo_spread": ("1", "ratio of I_CBO max to the lowest I_CBO sampled"),
}

#: Class figures used when the device entry does not give them (typical class values, from
#: memory): Early voltage 100 V, reverse gain 4, gain rising as (T/T0)^1.5, no emitter
#: resistance, I_CBO doubling every 10 K, I_CBO spread over a factor 30 (common practice, no
#: source).
CLASS_DEFAULTS: dict[str, float] = {
    "early_voltage": 100.0,
    "reverse_beta": 4.0,
    "beta_exponent": 1.5,
    "emitter_resistance": 0.0,
    "leakage_doubling": 10.0,
    "icbo_spread": 30.0,
}

#: the temperature a P_tot is stated at, ambient or case (datasheet practice) [K]
RATING_TEMPERATURE = 298.15

#: lowest temperature of a hot I_CBO figure: 25 K above the 25 degC one [K]
HOT_LEAKAGE_LOWEST = 323.15

#: the range of ``leakage_doubling`` the model accepts, entered or fitted [K]
DOUBLING_RANGE = (4.0, 20.0)

#: the widest V_BE(on) spread (vbe_on_max - vbe_on_min) the model takes as one junction
#: type's [V]: units of one type spread by tens of millivolts, datasheets state up to about
#: 0.15 V between their limits (from memory); wider is another unit or two junctions
JUNCTION_SPREAD_MAX = 0.3

REQUIRED = tuple(k for k, (_, d) in DATASHEET_FIGURES.items() if d.endswith("*"))


@dataclass(frozen=True)
class Datasheet:
    """Figures of one transistor class or part, SI units (temperatures in kelvin).

    ``polarity`` is ``"npn"`` or ``"pnp"``; every other field is named in
    :data:`DATASHEET_FIGURES`. Optional figures are ``None``.
    """

    polarity: str
    hfe_min: float
    hfe_max: float
    hfe_current: float
    hfe_vce: float
    vce_sat_max: float
    vce_sat_ic: float
    vce_sat_ib: float
    vbe_on: float
    vbe_on_current: float
    vbe_on_vce: float
    icbo_max: float
    icbo_vcb: float
    breakdown_vceo: float
    ic_max: float
    power_rating: float
    tj_max: float
    theta_ja: float
    hfe_typ: float | None = None
    hfe_high_current: float | None = None
    hfe_high_min: float | None = None
    hfe_low_current: float | None = None
    hfe_low_min: float | None = None
    iceo_max: float | None = None
    iceo_vce: float | None = None
    icbo_hot_max: float | None = None
    icbo_hot_temperature: float | None = None
    vbe_sat_max: float | None = None
    vbe_sat_typ: float | None = None
    vbe_on_min: float | None = None
    vbe_on_max: float | None = None
    theta_jc: float | None = None
    power_rating_case: float | None = None
    early_voltage: float = CLASS_DEFAULTS["early_voltage"]
    reverse_beta: float = CLASS_DEFAULTS["reverse_beta"]
    beta_exponent: float = CLASS_DEFAULTS["beta_exponent"]
    emitter_resistance: float = CLASS_DEFAULTS["emitter_resistance"]
    leakage_doubling: float = CLASS_DEFAULTS["leakage_doubling"]
    icbo_spread: float = CLASS_DEFAULTS["icbo_spread"]

    @classmethod
    def from_figures(cls, figures: dict) -> "Datasheet":
        """Build from a dict of SI values (``polarity`` a string); checks the figures."""
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(figures) - names)
        if unknown:
            raise DatasheetError(unknown[0], "is not a datasheet figure")
        if "polarity" not in figures:
            raise DatasheetError("polarity", "is required (npn or pnp)")
        missing = [k for k in REQUIRED if figures.get(k) is None]
        if missing:
            raise DatasheetError(missing[0], "is required but missing")
        ds = cls(**{k: v for k, v in figures.items() if v is not None})
        ds.check()
        return ds

    @property
    def sign(self) -> int:
        return 1 if self.polarity == "npn" else -1

    @property
    def junction_headroom(self) -> float:
        """How far the highest unit's V_BE(on) lies above the typical one [V] (0 without a
        spread)."""
        return 0.0 if self.vbe_on_max is None else self.vbe_on_max - self.vbe_on

    @property
    def hfe_median(self) -> float:
        """Median gain of the spread: the typical value, else the geometric mean."""
        if self.hfe_typ is not None:
            return self.hfe_typ
        return math.sqrt(self.hfe_min * self.hfe_max)

    def figures(self) -> dict:
        """The figures as a dict (None for absent optional ones)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    def _together(self, first: str, second: str) -> None:
        """Refuse one of two figures that make one datasheet line without the other, named
        by the figure that was given (the study's table has no other)."""
        if (getattr(self, first) is None) != (getattr(self, second) is None):
            given, missing = ((first, second) if getattr(self, second) is None
                              else (second, first))
            raise DatasheetError(given, f"needs {missing} as well: {first} and {second} go "
                                        f"together")

    def _above_icbo(self, key: str, why: str) -> None:
        """Refuse a leakage figure ``key`` that is not above ``icbo_max``, saying ``why``."""
        value = getattr(self, key)
        if value <= self.icbo_max:
            raise DatasheetError(key, f"{value:g} A is not above icbo_max ({self.icbo_max:g} "
                                      f"A): {why}", related=("icbo_max",))

    def check(self) -> None:
        """Raise :class:`DatasheetError` naming the first inconsistent figure."""
        if self.polarity not in ("npn", "pnp"):
            raise DatasheetError("polarity", f"'{self.polarity}' is not npn or pnp")
        for f in fields(self):
            v = getattr(self, f.name)
            if f.name == "polarity" or v is None:
                continue
            if not (isinstance(v, (int, float)) and math.isfinite(v)):
                raise DatasheetError(f.name, f"expected a finite number, got {v!r}")
            if f.name in ("emitter_resistance", "beta_exponent"):
                if v < 0:
                    raise DatasheetError(f.name, f"must not be negative, got {v:g}")
            elif v <= 0:
                what = ("a leakage current" if f.name in ("icbo_max", "iceo_max", "icbo_hot_max")
                        else "this figure")
                raise DatasheetError(f.name, f"{what} must be positive, got {v:g}")
        for name in ("hfe_min", "hfe_typ", "hfe_max", "hfe_high_min", "hfe_low_min"):
            gain = getattr(self, name)
            if gain is not None and gain <= 1.0:
                raise DatasheetError(name, f"{gain:g} is not a transistor's current gain (I_C / "
                                           f"I_B above 1)")
        # plausible class figures (from memory: X_TB of silicon transistors 1 to 2.5; I_CBO
        # doubles every 6 to 12 K); outside these the temperature laws become nonsense
        if self.beta_exponent > 4.0:
            raise DatasheetError("beta_exponent", f"{self.beta_exponent:g} is outside 0 .. 4 "
                                                  f"(silicon transistors: about 1 to 2.5)")
        if not DOUBLING_RANGE[0] <= self.leakage_doubling <= DOUBLING_RANGE[1]:
            raise DatasheetError("leakage_doubling", f"{self.leakage_doubling:g} K is outside "
                                                     f"4 .. 20 K (silicon: about 6 to 12 K)")
        for name in ("hfe_current", "vce_sat_ic", "vbe_on_current"):
            if getattr(self, name) > self.ic_max * (1 + 1e-9):
                raise DatasheetError("ic_max", f"{self.ic_max:g} A is below the test point "
                                               f"{name} = {getattr(self, name):g} A: a "
                                               f"datasheet's test points lie within its "
                                               f"rating; check the units", related=(name,))
        if self.hfe_min > self.hfe_max:
            raise DatasheetError("hfe_min", f"hfe_min ({self.hfe_min:g}) is above hfe_max "
                                            f"({self.hfe_max:g})")
        if self.hfe_typ is not None and not self.hfe_min <= self.hfe_typ <= self.hfe_max:
            raise DatasheetError("hfe_typ", f"{self.hfe_typ:g} lies outside hfe_min..hfe_max")
        for cur, gain in (("hfe_high_current", "hfe_high_min"), ("hfe_low_current", "hfe_low_min")):
            if (getattr(self, cur) is None) != (getattr(self, gain) is None):
                raise DatasheetError(gain if getattr(self, gain) is None else cur,
                                     f"{cur} and {gain} go together")
        if self.hfe_high_current is not None:
            if self.hfe_high_current <= self.hfe_current:
                raise DatasheetError("hfe_high_current", "must be above hfe_current")
            if self.hfe_high_min >= self.hfe_min:
                raise DatasheetError("hfe_high_min", "must be below hfe_min (the gain falls off "
                                                     "at high current)")
        if self.hfe_low_current is not None:
            if self.hfe_low_current >= self.hfe_current:
                raise DatasheetError("hfe_low_current", "must be below hfe_current")
            if self.hfe_low_min >= self.hfe_min:
                raise DatasheetError("hfe_low_min", "must be below hfe_min (the gain rolls off "
                                                    "at low current)")
        self._together("iceo_max", "iceo_vce")
        if self.iceo_max is not None:
            # a datasheet's I_CEO is measured with the collector junction well reverse-biased,
            # at volts to tens of volts (common practice, no source); below a volt the base
            # floats up towards the collector and the figure is no open-base leakage
            if self.iceo_vce < 1.0:
                raise DatasheetError("iceo_vce", f"{self.iceo_vce:g} V is below 1 V: an I_CEO "
                                                 f"figure is measured at volts, with the "
                                                 f"collector junction reverse-biased")
            if self.hfe_low_current is None:
                raise DatasheetError("iceo_max", "needs hfe_low_current and hfe_low_min: the "
                                                 "fit sets the gain's roll-off between them and "
                                                 "the open-base leakage")
            if self.iceo_vce > self.breakdown_vceo:
                raise DatasheetError("iceo_vce", f"{self.iceo_vce:g} V is above breakdown_vceo "
                                                 f"({self.breakdown_vceo:g} V)")
            # with the base open the collector-base leakage flows on through the emitter,
            # multiplied by 1 + the gain at that current (common practice, no source)
            self._above_icbo("iceo_max", "with the base open the leakage is 1 + h_FE times "
                                         "I_CBO")
        self._together("icbo_hot_max", "icbo_hot_temperature")
        if self.icbo_hot_max is not None:
            # the doubling is read from the rise between the two figures; datasheets state
            # the hot one at 100 to 150 degC (common practice, no source), and a rise of
            # under 25 K would amplify the figures' rounding into the doubling
            if not HOT_LEAKAGE_LOWEST <= self.icbo_hot_temperature <= self.tj_max + 1e-9:
                raise DatasheetError("icbo_hot_temperature",
                                     f"{self.icbo_hot_temperature - 273.15:g} degC is outside "
                                     f"{HOT_LEAKAGE_LOWEST - 273.15:g} degC .. tj_max "
                                     f"({self.tj_max - 273.15:g} degC): the hot figure must lie "
                                     f"at least 25 K above the 25 degC icbo_max and within "
                                     f"the part's rating")
            self._above_icbo("icbo_hot_max", "the leakage rises with temperature")
            if self.icbo_hot_max >= self.ic_max:
                raise DatasheetError("icbo_hot_max", f"{self.icbo_hot_max:g} A is not below "
                                                     f"ic_max ({self.ic_max:g} A): check the "
                                                     f"figure's unit")
        forced = self.vce_sat_ic / self.vce_sat_ib
        if forced >= self.hfe_min:
            raise DatasheetError("vce_sat_ib", f"the forced gain I_C/I_B = {forced:g} of the "
                                               f"V_CE(sat) figure must be below hfe_min")
        if self.vce_sat_max >= self.breakdown_vceo:
            raise DatasheetError("vce_sat_max", "must be below breakdown_vceo")
        if self.vbe_on >= 1.5:
            raise DatasheetError("vbe_on", f"{self.vbe_on:g} V is not a single junction voltage")
        self._together("vbe_on_min", "vbe_on_max")
        if self.vbe_on_min is not None:
            if not self.vbe_on_min < self.vbe_on < self.vbe_on_max:
                key = "vbe_on_min" if self.vbe_on_min >= self.vbe_on else "vbe_on_max"
                raise DatasheetError(key, f"vbe_on ({self.vbe_on:g} V, the typical unit's) "
                                          f"must lie between vbe_on_min "
                                          f"({self.vbe_on_min:g} V) and vbe_on_max "
                                          f"({self.vbe_on_max:g} V)", related=("vbe_on",))
            # (an allowance for rounding: 0.8 - 0.5 is 0.30000000000000004)
            if self.vbe_on_max - self.vbe_on_min > JUNCTION_SPREAD_MAX + 1e-9:
                raise DatasheetError("vbe_on_max", f"{self.vbe_on_max - self.vbe_on_min:.3g} V "
                                                   f"between vbe_on_min and vbe_on_max is "
                                                   f"wider than one junction type spreads "
                                                   f"(at most {JUNCTION_SPREAD_MAX:g} V; "
                                                   f"datasheets state up to about 0.15 V)",
                                     related=("vbe_on_min",))
        if self.vbe_sat_max is not None and self.vbe_sat_max <= self.vce_sat_max:
            raise DatasheetError("vbe_sat_max", "must be above vce_sat_max")
        if self.vbe_sat_typ is not None:
            if self.vbe_sat_max is None:
                raise DatasheetError("vbe_sat_typ", "needs vbe_sat_max as well: the units "
                                                    "spread between the two")
            if not self.vce_sat_max < self.vbe_sat_typ < self.vbe_sat_max:
                raise DatasheetError("vbe_sat_typ", f"{self.vbe_sat_typ:g} V must lie between "
                                                    f"vce_sat_max ({self.vce_sat_max:g} V) and "
                                                    f"vbe_sat_max ({self.vbe_sat_max:g} V)",
                                     related=("vbe_sat_max",))
        if self.icbo_spread < 1:
            raise DatasheetError("icbo_spread", "must be at least 1")
        if self.power_rating_case is not None:
            if self.power_rating_case < self.power_rating:
                raise DatasheetError("power_rating_case", f"{self.power_rating_case:g} W is "
                                                          f"below the free-air power_rating "
                                                          f"({self.power_rating:g} W)")
        if self.theta_jc is not None and self.theta_jc >= self.theta_ja:
            raise DatasheetError("theta_jc", f"{self.theta_jc:g} K/W must be below theta_ja "
                                             f"({self.theta_ja:g} K/W): the case lies on the "
                                             "junction's way to the air")


def _logistic(x: float) -> float:
    """1 / (1 + exp(-x)) without overflow at either end."""
    if x >= 0:
        return 1.0 / (1.0 + math.exp(-x))
    e = math.exp(x)
    return e / (1.0 + e)


@dataclass(frozen=True)
class FittedDevice:
    """Model parameters derived from a datasheet.

    Attributes
    ----------
    datasheet : Datasheet
        The figures.
    template : TransistorParameters
        Parameters of the minimum-gain unit (h_FE = hfe_min at the test point) with the
        median ``cbo_leakage`` (geometric mean of its spread); :meth:`parameters` makes any
        other unit.
    iterations : int
        Sweeps the fit took.

    Notes
    -----
    Units differ by their base current: a unit of gain h has the whole base-current curve of
    the minimum unit scaled by hfe_min / h, so the non-ideal (recombination) current scales
    with it and the shape of h_FE(I_C) is common to all units (a common working assumption,
    no source). The ideal forward gain then follows in closed form
    (:func:`forward_beta_for_hfe`).
    """

    datasheet: Datasheet
    template: TransistorParameters
    iterations: int = 0
    _cache: dict = field(default_factory=dict, compare=False, repr=False)

    def _leakage(self, hfe):
        return self.template.be_leakage_current * (self.datasheet.hfe_min / hfe)

    def junction_factors(self, vbe_on):
        """Factors on the saturation currents of units whose V_BE(on) at the datasheet's
        test point is ``vbe_on`` [V] (as the typical-gain unit would have it): (on I_S, on
        I_SE), 1 for None.

        A unit's junction lies dV = vbe_on - the typical V_BE(on) above the fitted one: its
        transport saturation current is I_S exp(-dV / (n_F V_T)) and its recombination
        current's I_SE exp(-dV / (n_E V_T)) (25 degC), so at any collector current both
        currents, and with them the whole h_FE(I_C) curve, stay as fitted, while V_BE moves
        by dV (by dV T / T_0 at T): a uniform shift of the junction law, as an emitter of
        another area or doping would give (common practice, no source).
        """
        if vbe_on is None:
            return 1.0, 1.0
        t = self.template
        vt0 = float(thermal_voltage(REFERENCE_TEMPERATURE))
        shift = np.asarray(vbe_on, dtype=float) - self.datasheet.vbe_on
        return (np.exp(-shift / (t.forward_emission * vt0)),
                np.exp(-shift / (t.be_leakage_emission * vt0)))

    def forward_beta_for_hfe(self, hfe, icbo=None, vbe_on=None) -> np.ndarray:
        """Ideal forward gain whose model h_FE at the datasheet test point equals ``hfe``.

        Parameters
        ----------
        hfe : array_like
            DC current gain I_C / I_B at ``hfe_current``, ``hfe_vce``, 25 degC [1].
        icbo : array_like, optional
            The unit's I_CBO at 25 degC [A] (the generation current flows out of the base and
            so enters the gain); default the fit's median leakage.
        vbe_on : array_like, optional
            The unit's V_BE(on) [V] (:meth:`junction_factors`); default the typical one.

        Returns
        -------
        ndarray
            ``forward_beta`` [1] of the unit (its non-ideal base current scaled as in the class
            Notes).
        """
        hfe = np.atleast_1d(np.asarray(hfe, dtype=float))
        icbo = self.template.cbo_leakage if icbo is None else icbo
        icbo = np.broadcast_to(np.asarray(icbo, dtype=float), hfe.shape)
        von = np.broadcast_to(np.asarray(self.datasheet.vbe_on if vbe_on is None else vbe_on,
                                         dtype=float), hfe.shape)
        ds = self.datasheet
        if (hfe.size > 1 and np.all(hfe == hfe[0]) and np.all(icbo == icbo[0])
                and np.all(von == von[0])):
            return np.full(hfe.shape, self.forward_beta_for_hfe(hfe[:1], icbo[:1], von[:1])[0])
        if hfe.size == 1:
            key = (float(hfe[0]), float(icbo[0]), float(von[0]))
            if key in self._cache:
                return np.array([self._cache[key]])
        k_s, k_se = self.junction_factors(None if vbe_on is None else von)
        q = replace(self.template, saturation_current=self.template.saturation_current * k_s,
                    be_leakage_current=self._leakage(hfe) * k_se, cbo_leakage=np.array(icbo))
        out = forward_beta_for_hfe(q, hfe, ds.hfe_current, ds.hfe_vce)
        if hfe.size == 1:
            self._cache[key] = float(out[0])
        return out

    @property
    def intrinsic_vbe_sat(self) -> float | None:
        """The minimum-gain unit's V_BE at the V_CE(sat) point with no base resistance, for
        the highest junction (``vbe_on_max``, else the typical one) [V]: the lowest
        V_BE(sat) every unit can have (None without a vbe_sat_max figure)."""
        ds = self.datasheet
        if ds.vbe_sat_max is None:
            return None
        return float(ds.vbe_sat_max - self.template.base_resistance * ds.vce_sat_ib)

    def parameters(self, hfe, icbo=None, vbe_sat=None, vbe_on=None) -> TransistorParameters:
        """Per-sample parameters for gains ``hfe`` [1], leakages ``icbo`` [A], base-emitter
        saturation voltages ``vbe_sat`` [V] and on voltages ``vbe_on`` [V].

        ``icbo`` None keeps the fit's median leakage; ``vbe_on`` None the typical junction
        (:meth:`junction_factors`); ``vbe_sat`` None the fitted base resistance, which meets
        ``vbe_sat_max`` with the highest junction (the typical one without a V_BE(on)
        spread). A unit's ``vbe_sat`` is its V_BE at the V_CE(sat) test point as the
        minimum-gain unit would have it: with the currents forced there, the terminal V_BE
        is the junction's plus I_B r_B, and the unit's junction lies dV above the typical
        one, whose unit meets vbe_sat_max less the headroom h = vbe_on_max - vbe_on, so the
        unit's base resistance is the fit's less (vbe_sat_max - h + dV - vbe_sat) / I_B
        (never below zero).
        """
        hfe = np.asarray(hfe, dtype=float)
        icbo = self.template.cbo_leakage if icbo is None else np.asarray(icbo, dtype=float)
        beta = self.forward_beta_for_hfe(hfe, icbo, vbe_on)
        extra = {}
        ds = self.datasheet
        if vbe_sat is not None and ds.vbe_sat_max is not None:
            shift = 0.0 if vbe_on is None else np.asarray(vbe_on, dtype=float) - ds.vbe_on
            gap = (ds.vbe_sat_max - ds.junction_headroom + shift
                   - np.asarray(vbe_sat, dtype=float))
            extra["base_resistance"] = np.maximum(self.template.base_resistance
                                                  - gap / ds.vce_sat_ib, 0.0)
        k_s, k_se = self.junction_factors(vbe_on)
        return replace(self.template, forward_beta=beta.reshape(np.shape(beta) if hfe.ndim
                                                                 else ()),
                       saturation_current=self.template.saturation_current * k_s,
                       be_leakage_current=self._leakage(hfe) * k_se, cbo_leakage=icbo, **extra)


class _PointSystem:
    """Two equations fixing an operating point of one transistor (25 degC).

    kind ``ic_vce``: I_C = a, V_CE(terminal) = b.  ``ic_ib``: I_C = a, I_B = b.
    ``open_vcb``: emitter open (I_C + I_B = 0), V_CB(terminal) = b.
    ``open_vce``: base open (I_B = 0), V_CE(terminal) = b.
    ``beta_map``: I_C = a, and V_CE = b with I_B = a / h (h per sample) in the emitter drop;
    the parameters then carry an infinite forward_beta.
    Values a, b are in the NPN sense (the polarity multiplies them).
    """

    def __init__(self, scaled, kind, a, b, h=None):
        self.p = scaled
        self.kind = kind
        self.a = a
        self.b = b
        self.h = h

    def subset(self, idx):
        pick = lambda v: v[idx] if np.ndim(v) > 0 and np.size(v) > 1 else v  # noqa: E731
        return _PointSystem(self.p.subset(idx), self.kind, pick(self.a), pick(self.b),
                            None if self.h is None else pick(self.h))

    def limit(self, x_new, x_old):
        return x_new

    def residual(self, x):
        p = self.p
        pol = p.polarity
        vbe, vbc = x[:, 0], x[:, 1]
        c = junction_currents(p, vbe, vbc)
        s = x.shape[0]
        f = np.empty((s, 2))
        j = np.empty((s, 2, 2))
        a = pol * self.a
        b = pol * self.b
        g = 1e-3  # voltage equations scaled to currents: 1 nV <-> 1 pA
        if self.kind in ("ic_vce", "ic_ib", "beta_map"):
            f[:, 0] = c.collector - a
            j[:, 0, 0] = c.dcollector_dvbe
            j[:, 0, 1] = c.dcollector_dvbc
        if self.kind == "ic_ib":
            f[:, 1] = c.base - b
            j[:, 1, 0] = c.dbase_dvbe
            j[:, 1, 1] = c.dbase_dvbc
        elif self.kind == "ic_vce":
            o = terminal_offsets(p, vbe, vbc, c)
            f[:, 1] = g * (o.collector - b)
            j[:, 1, 0] = g * o.dcollector_dvbe
            j[:, 1, 1] = g * o.dcollector_dvbc
        elif self.kind == "beta_map":
            # V_CE = v_be - v_bc + I_C r_C + I_C (1 + 1/h) r_E at the target currents
            drop = a * p.collector_resistance + a * (1.0 + 1.0 / self.h) * p.emitter_resistance
            f[:, 1] = g * (vbe - vbc + drop - b)
            j[:, 1, 0] = g
            j[:, 1, 1] = -g
        elif self.kind == "open_vce":
            # base open (I_B = 0), V_CE(terminal) = b
            o = terminal_offsets(p, vbe, vbc, c)
            f[:, 0] = c.base
            j[:, 0, 0] = c.dbase_dvbe
            j[:, 0, 1] = c.dbase_dvbc
            f[:, 1] = g * (o.collector - b)
            j[:, 1, 0] = g * o.dcollector_dvbe
            j[:, 1, 1] = g * o.dcollector_dvbc
        elif self.kind == "open_vcb":
            o = terminal_offsets(p, vbe, vbc, c)
            f[:, 0] = c.collector + c.base
            j[:, 0, 0] = c.dcollector_dvbe + c.dbase_dvbe
            j[:, 0, 1] = c.dcollector_dvbc + c.dbase_dvbc
            f[:, 1] = g * (o.collector - o.base - b)
            j[:, 1, 0] = g * (o.dcollector_dvbe - o.dbase_dvbe)
            j[:, 1, 1] = g * (o.dcollector_dvbc - o.dbase_dvbc)
        # relative test against the prescribed currents only: the device currents of a wild
        # iterate must not loosen it
        scale = np.abs(a) + (np.abs(b) if self.kind == "ic_ib" else 0.0)
        return f, j, scale


def _guess(scaled, kind, a, b, n):
    pol = scaled.polarity
    nvt = 1.0 / np.broadcast_to(scaled.inv_forward_nvt, (n,))
    i_s = np.broadcast_to(scaled.saturation_current, (n,))
    if kind == "open_vcb":
        vbe = np.zeros(n)
        vbc = -np.broadcast_to(np.abs(b), (n,)).astype(float)
    elif kind == "open_vce":
        # the base floats a few tenths of a volt up, where the leakage's recombination and
        # ideal currents balance the collector-base leakage
        vbe = np.full(n, 0.3)
        vbc = vbe - np.broadcast_to(np.abs(b), (n,)).astype(float)
    else:
        cur = np.abs(np.broadcast_to(a, (n,)))
        vbe = nvt * np.log1p(cur / i_s)
        # in high injection I_C ~ sqrt(I_S I_KF) exp(V_BE / 2 n V_T): take the larger estimate
        with np.errstate(divide="ignore"):
            vbe = np.maximum(vbe, 2.0 * nvt * np.log(cur / np.sqrt(i_s / np.broadcast_to(
                scaled.inv_knee, (n,)))))
        if kind == "ic_ib":
            vbc = vbe - 0.1
        else:
            vbc = vbe - np.abs(np.broadcast_to(b, (n,)))
    return np.stack([pol * vbe, pol * vbc], axis=1)


def _solve_point(params: TransistorParameters, kind, a, b, h=None, temperature=None, n=None):
    if temperature is None:
        temperature = REFERENCE_TEMPERATURE
    sizes = [np.size(v) for v in (a, b, h, temperature) if v is not None]
    sizes += [np.size(getattr(params, f.name)) for f in fields(params) if f.name != "polarity"]
    n = max(sizes) if n is None else n
    scaled = params.at_temperature(np.broadcast_to(np.asarray(temperature, float), (n,)).copy())
    bc = lambda v: None if v is None else np.broadcast_to(np.asarray(v, float), (n,)).copy()  # noqa
    system = _PointSystem(scaled.subset(np.arange(n)) if n > 1 else scaled, kind, bc(a), bc(b),
                          bc(h))
    res = newton_solve(system, _guess(scaled, kind, bc(a), bc(b), n), max_iterations=100)
    vbe, vbc = res.x[:, 0], res.x[:, 1]
    c = junction_currents(system.p, vbe, vbc)
    return system.p, vbe, vbc, c, res.converged


def forward_beta_for_hfe(template: TransistorParameters, hfe, current, vce) -> np.ndarray:
    """Ideal forward gain beta_F giving the model h_FE ``hfe`` at (``current``, ``vce``), 25 C.

    See :meth:`FittedDevice.forward_beta_for_hfe`. ``current`` and ``vce`` are magnitudes
    [A], [V]; the template's polarity applies.
    """
    hfe = np.atleast_1d(np.asarray(hfe, dtype=float))
    p_inf = replace(template, forward_beta=np.inf)
    scaled, vbe, vbc, c, ok = _solve_point(p_inf, "beta_map", current, vce, h=hfe, n=hfe.size)
    pol = template.polarity
    vbe_n = pol * vbe
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        i_f = scaled.saturation_current * np.expm1(vbe_n * scaled.inv_forward_nvt)
        ideal_base = current / hfe - pol * c.base  # I_C/h_FE minus the non-ideal base current
        beta = np.where((ideal_base > 0) & ok, i_f / ideal_base, np.nan)
    return beta


def hfe_at(params: TransistorParameters, current, vce, temperature=None):
    """Model DC gain I_C / I_B at collector current ``current`` and terminal V_CE ``vce``.

    ``current`` [A] and ``vce`` [V] are magnitudes; returns (hfe [1], V_BE magnitude [V]).
    """
    scaled, vbe, vbc, c, ok = _solve_point(params, "ic_vce", current, vce, temperature=temperature)
    o = terminal_offsets(scaled, vbe, vbc, c)
    hfe = np.where(ok, c.collector / c.base, np.nan)
    return hfe, np.where(ok, np.abs(o.base), np.nan)


def saturation_at(params: TransistorParameters, ic, ib, temperature=None):
    """Model terminal (V_CE, V_BE) magnitudes [V] at forced collector and base currents [A]."""
    scaled, vbe, vbc, c, ok = _solve_point(params, "ic_ib", ic, ib, temperature=temperature)
    o = terminal_offsets(scaled, vbe, vbc, c)
    return (np.where(ok, np.abs(o.collector), np.nan), np.where(ok, np.abs(o.base), np.nan))


def icbo_at(params: TransistorParameters, vcb, temperature=None):
    """Model collector current magnitude [A] with the emitter open at |V_CB| = ``vcb`` [V]."""
    scaled, vbe, vbc, c, ok = _solve_point(params, "open_vcb", 0.0, vcb, temperature=temperature)
    return np.where(ok, np.abs(c.collector), np.nan)


def iceo_at(params: TransistorParameters, vce, temperature=None):
    """Model collector current magnitude [A] with the base open at |V_CE| = ``vce`` [V]."""
    scaled, vbe, vbc, c, ok = _solve_point(params, "open_vce", 0.0, vce, temperature=temperature)
    return np.where(ok, np.abs(c.collector), np.nan)


def _scalar(x) -> float:
    return float(np.asarray(x).ravel()[0])


def _root_log(fun, lo, hi):
    """Root of fun(exp(u)) for u in [ln lo, ln hi] (fun increasing or decreasing)."""
    from scipy import optimize  # here: a worker evaluating chunks never fits

    return math.exp(optimize.brentq(lambda u: fun(math.exp(u)), math.log(lo), math.log(hi),
                                    xtol=1e-12, rtol=1e-12))


def _fit_open_base(ds, state, f_knee, f_phi, build, unit, solve):
    """Set the emission coefficient of the base-emitter recombination current, with the knee
    and the recombination share, so that the gain figures and the I_CEO figure all hold
    (``fit_datasheet``'s state is changed in place; the joint solve there failed or the
    datasheet gives no fall-off).

    Returns None where the figure is met, else the range of I_CEO the gain figures allow
    (lowest, highest) [A], with the state at the end of it nearest the figure: the caller
    refuses the figure once the range has settled."""
    from scipy import optimize  # here: a worker evaluating chunks never fits

    knee = ds.hfe_high_current is not None

    def gains_at(n_el, u_start):
        """Knee (log) and share (logit) meeting the gain figures at emission n_el; None
        where none do (below some n the roll-off figure cannot be met at all)."""
        if not knee:
            try:
                return [solve(lambda u: f_phi(u, be_leakage_emission=n_el), -40.0, 20.0,
                              "hfe_low_min", "no recombination current gives this roll-off",
                              log=False)]
            except DatasheetError:
                return None

        def g(u):
            try:
                return [f_knee(math.exp(u[0]), phi=_logistic(u[1]), be_leakage_emission=n_el)
                        / ds.hfe_high_min,
                        f_phi(u[1], knee_current=math.exp(u[0]), be_leakage_emission=n_el)
                        / ds.hfe_low_min]
            except (DatasheetError, OverflowError):
                return [math.nan, math.nan]
        with np.errstate(all="ignore"):
            sol = optimize.root(g, u_start, method="hybr", options={"xtol": 1e-13})
        ok = sol.success and np.all(np.abs(g(sol.x)) < 1e-9)
        return list(sol.x) if ok else None

    def open_base(n_el, u):
        """log of the worst unit's (highest gain, icbo_max) I_CEO over the figure."""
        changes = {"be_leakage_emission": n_el, "phi": _logistic(u[-1])}
        if knee:
            changes["knee_current"] = math.exp(u[0])
        q = unit(replace(build(**changes), cbo_leakage=ds.icbo_max), ds.hfe_max)
        return math.log(_scalar(iceo_at(q, ds.iceo_vce)) / ds.iceo_max)

    def keep(n_el, u):
        state["be_leakage_emission"] = n_el
        state["phi"] = _logistic(u[-1])
        if knee:
            state["knee_current"] = math.exp(u[0])

    phi0 = min(max(state["phi"], 1e-3), 1.0 - 1e-3)
    u0 = [math.log(phi0 / (1.0 - phi0))]
    if knee:
        knee0 = state["knee_current"]
        u0.insert(0, math.log(knee0 if knee0 < 1e3 * ds.hfe_high_current
                              else ds.hfe_high_current))
    # the open-base leakage falls as n rises (the gain at microamperes rolls off more
    # steeply); below some n the roll-off figure cannot be met, and the leakage is largest
    # at that edge
    n_hi = EMISSION_RANGE[1]
    u_hi = gains_at(n_hi, u0) or gains_at(n_hi, gains_at(2.0, u0) or u0)
    if u_hi is None:
        raise DatasheetError("hfe_low_min", "cannot be met by the model (no recombination "
                                            "current gives this roll-off)")
    f_hi = open_base(n_hi, u_hi)
    least = ds.iceo_max * math.exp(f_hi)
    if f_hi > 0.0:
        # the figure lies below the least leakage any roll-off leaves
        keep(n_hi, u_hi)
        return least, None
    # bisection towards lower n: an n where the leakage reaches the figure brackets the
    # root with n_hi; an n where the roll-off cannot be met moves the lower end up
    lo, hi, u_good, f_good = EMISSION_RANGE[0], n_hi, u_hi, f_hi
    u = gains_at(lo, u_hi)
    if u is not None:
        f_lo = open_base(lo, u)
        if f_lo < 0.0:  # the roll-off allows any n, and even n = 1 leaks too little
            keep(lo, u)
            return least, ds.iceo_max * math.exp(f_lo)
        bracket = (lo, u)
    else:
        bracket = None
        while hi - lo > 1e-5 * hi:
            mid = 0.5 * (lo + hi)
            u = gains_at(mid, u_good)
            if u is None:
                lo = mid
                continue
            f_mid = open_base(mid, u)
            if f_mid >= 0.0:
                bracket = (mid, u)
                break
            hi, u_good, f_good = mid, u, f_mid
        if bracket is None:  # the figure lies above the most leakage the roll-off allows
            keep(hi, u_good)
            return least, ds.iceo_max * math.exp(f_good)
    warm = {"u": bracket[1]}

    def f(n_el):
        u = gains_at(n_el, warm["u"]) or gains_at(n_el, u_hi)
        if u is None:
            return math.nan
        warm["u"] = u
        return open_base(n_el, u)
    n = optimize.brentq(f, bracket[0], hi, xtol=1e-13, rtol=1e-12)
    keep(n, gains_at(n, warm["u"]) or gains_at(n, u_hi))
    return None


def _fit_doubling(ds, params, unit) -> float:
    """``leakage_doubling`` [K] at which the unit of leakage ``icbo_max`` draws
    ``icbo_hot_max`` at ``icbo_vcb`` and ``icbo_hot_temperature`` (emitter open).

    The model's I_CBO there is the generation term and the ideal collector junction's
    reverse current, which rises with the band-gap law, so the doubling is solved for rather
    than read as (T - 25 degC) / log2(ratio)."""
    from scipy import optimize  # here: a worker evaluating chunks never fits

    q = unit(replace(params, cbo_leakage=ds.icbo_max), ds.hfe_median)

    def f(doubling):
        hot = icbo_at(replace(q, leakage_doubling=doubling), ds.icbo_vcb,
                      temperature=ds.icbo_hot_temperature)
        return math.log(_scalar(hot) / ds.icbo_hot_max)

    lo, hi = DOUBLING_RANGE
    f_lo, f_hi = f(lo), f(hi)
    if not (math.isfinite(f_lo) and math.isfinite(f_hi)) or f_lo * f_hi > 0:
        from tolerance.units import format_quantity as q

        reach = (ds.icbo_hot_max * math.exp(f_hi), ds.icbo_hot_max * math.exp(f_lo))
        raise DatasheetError("icbo_hot_max", f"{q(ds.icbo_hot_max, 'A')} at "
                                             f"{ds.icbo_hot_temperature - 273.15:g} degC "
                                             f"lies outside {q(reach[0], 'A')} .. "
                                             f"{q(reach[1], 'A')}, "
                                             f"what a doubling every {lo:g} to {hi:g} K from "
                                             f"icbo_max gives (silicon: about 6 to 12 K); "
                                             f"check the figure's unit and temperature",
                             related=("icbo_hot_temperature", "icbo_max"))
    return optimize.brentq(f, lo, hi, xtol=1e-12, rtol=1e-12)


def _iceo_refusal(ds, reach) -> DatasheetError:
    """The refusal of an I_CEO figure outside the range (lowest, highest) the gain figures
    allow (highest None: the figure lies below the lowest), each shown to as many digits as
    it takes to differ from the figure."""
    least, most = reach
    digits = 3
    def same(a, b):
        return a is not None and b is not None and f"{a:.{digits}g}" == f"{b:.{digits}g}"
    while digits < 12 and (same(least, ds.iceo_max) or same(most, ds.iceo_max)
                           or same(least, most)):
        digits += 1
    show = lambda x: f"{x:.{digits}g}"  # noqa: E731
    where = (f"the roll-off from hfe_low_min = {ds.hfe_low_min:g} at {ds.hfe_low_current:g} A "
             f"leaves the highest-gain unit at icbo_max")
    if most is not None and most < least * 1.01:
        return DatasheetError(
            "iceo_max", f"{ds.iceo_max:g} A cannot be met by the model: {where} almost no gain "
                        f"at microamperes, so its open-base leakage is I_CBO ({show(least)} A) "
                        f"whatever the roll-off's shape; a higher hfe_low_min will fit",
            related=("hfe_low_min", "icbo_max"))
    if most is None:
        return DatasheetError(
            "iceo_max", f"{ds.iceo_max:g} A cannot be met by the model: {where} at least "
                        f"{show(least)} A of open-base leakage at {ds.iceo_vce:g} V (the "
                        f"steepest roll-off it takes); a lower hfe_low_min (more roll-off) "
                        f"or a higher iceo_max will fit",
            related=("hfe_low_min", "icbo_max"))
    return DatasheetError(
        "iceo_max", f"{ds.iceo_max:g} A cannot be met by the model: {where} between "
                    f"{show(least)} and {show(most)} A of open-base leakage at "
                    f"{ds.iceo_vce:g} V (a datasheet's I_CEO is a test limit, often loose: a "
                    f"lower iceo_max the part still meets will fit, as will a higher "
                    f"hfe_low_min)",
        related=("hfe_low_min", "icbo_max"))


#: the emission coefficients of the base-emitter recombination current an I_CEO figure may
#: set: 1 (the gain level down to the lowest currents) to 4 (from memory: measured non-ideal
#: base currents of silicon transistors lie between 1.5 and 4, with 2 the textbook value)
EMISSION_RANGE = (1.0, 4.0)


def fit_datasheet(ds: Datasheet, max_sweeps: int = 40) -> FittedDevice:
    """Derive Gummel-Poon parameters reproducing the datasheet figures.

    Parameters
    ----------
    ds : Datasheet
        The figures.
    max_sweeps : int
        Cap on the sweeps over the conditions.

    Returns
    -------
    FittedDevice

    Raises
    ------
    DatasheetError
        When a figure cannot be met by the model (naming it).

    Notes
    -----
    The non-ideal base current is fitted as its share ``phi`` of the minimum unit's base
    current at the test point (not as I_SE itself): the junction voltage there moves with the
    saturation current and the knee, and a fixed share keeps every intermediate model
    reachable while the sweep converges.
    """
    base = TransistorParameters(
        polarity=ds.sign,
        saturation_current=1e-14,
        forward_beta=100.0,
        reverse_beta=ds.reverse_beta,
        early_voltage=ds.early_voltage,
        beta_exponent=ds.beta_exponent,
        emitter_resistance=ds.emitter_resistance,
        leakage_doubling=ds.leakage_doubling,
        cbo_leakage=ds.icbo_max / math.sqrt(ds.icbo_spread),  # the median unit's leakage
    )
    vt0 = 0.025693  # kT/q at 25 degC [V]
    state = {
        "saturation_current": ds.vbe_on_current / math.exp(ds.vbe_on / vt0),  # ideal diode
        "knee_current": math.inf,
        "phi": 0.0,
        # recombination current in the depletion layer, n = 2 (from memory: Sze, Physics of
        # Semiconductor Devices); fitted to an I_CEO figure where the datasheet gives one
        "be_leakage_emission": 2.0,
        "collector_resistance": 0.0,
        "base_resistance": 0.0,
    }

    def build(**changes):
        """Minimum-gain unit (h_FE = hfe_min at the test point) of the state with changes."""
        st = dict(state, **changes)
        phi = st.pop("phi")
        q = replace(base, **st)
        if phi > 0:
            sc, vbe_t, _, _, ok = _solve_point(replace(q, forward_beta=np.inf), "beta_map",
                                               ds.hfe_current, ds.hfe_vce, h=ds.hfe_min, n=1)
            if not ok[0]:
                raise DatasheetError("hfe_current", "no operating point at the test point")
            nvt = q.be_leakage_emission * _scalar(sc.thermal_voltage)
            ise = phi * ds.hfe_current / ds.hfe_min / math.expm1(abs(_scalar(vbe_t)) / nvt)
            q = replace(q, be_leakage_current=ise)
        return unit(q, ds.hfe_min)

    def unit(params, h):
        """The unit of gain h (params describe the minimum-gain unit's leakage)."""
        q = replace(params, be_leakage_current=params.be_leakage_current * ds.hfe_min / h)
        b = _scalar(forward_beta_for_hfe(q, h, ds.hfe_current, ds.hfe_vce))
        if not math.isfinite(b):
            raise DatasheetError("hfe_min", f"h_FE {h:g} cannot be reached with this leakage")
        return replace(q, forward_beta=b)

    def solve(fun, lo, hi, key, what, log=True):
        """Root of fun in [lo, hi]; an end where the model cannot be evaluated (no gain
        mapping, no converged operating point) is moved towards the other end first."""
        def safe(x):
            try:
                v = fun(x)
            except DatasheetError:
                return math.nan
            return v
        if log and lo > 0:
            step = lambda a, b: a ** 0.9 * b ** 0.1  # noqa: E731 - a tenth of the way, in log
        else:
            step = lambda a, b: 0.9 * a + 0.1 * b  # noqa: E731
        flo, fhi = safe(lo), safe(hi)
        for _ in range(200):
            if math.isfinite(flo) and math.isfinite(fhi):
                break
            if not math.isfinite(flo):
                lo = step(lo, hi)
                flo = safe(lo)
            if not math.isfinite(fhi):
                hi = step(hi, lo)
                fhi = safe(hi)
        if not (math.isfinite(flo) and math.isfinite(fhi)) or flo * fhi > 0:
            raise DatasheetError(key, f"cannot be met by the model ({what})")
        if log and lo > 0:
            return _root_log(fun, lo, hi)
        from scipy import optimize  # here: a worker evaluating chunks never fits

        return optimize.brentq(fun, lo, hi, xtol=1e-14, rtol=1e-12)

    sweeps = 0
    unmet = None  # the I_CEO range the gain figures allowed in the last sweep, if not met
    for sweeps in range(1, max_sweeps + 1):
        old = dict(state)
        # saturation current from V_BE(on) of the typical unit
        def f_is(i_s):
            q = unit(build(saturation_current=i_s), ds.hfe_median)
            return _scalar(hfe_at(q, ds.vbe_on_current, ds.vbe_on_vce)[1]) - ds.vbe_on
        i_s0 = state["saturation_current"]
        state["saturation_current"] = solve(f_is, i_s0 / 1e3, i_s0 * 1e3, "vbe_on",
                                            "no saturation current gives it")

        def f_knee(ik, **extra):
            q = build(knee_current=ik, **extra)
            return _scalar(hfe_at(q, ds.hfe_high_current, ds.hfe_vce)[0]) - ds.hfe_high_min

        def f_phi(logit, **extra):
            q = build(phi=_logistic(logit), **extra)
            return _scalar(hfe_at(q, ds.hfe_low_current, ds.hfe_vce)[0]) - ds.hfe_low_min

        both = ds.hfe_high_current is not None and ds.hfe_low_current is not None
        joint = None
        if both:
            # fall-off and roll-off together: the knee and the recombination share interact
            # strongly (a large share makes the gain rise with current), so solve them jointly
            # with an I_CEO figure the emission coefficient joins them: solved in turn, the
            # open-base figure and the knee drifted apart sweep by sweep
            triple = ds.iceo_max is not None

            def pair(u):
                extra = {"be_leakage_emission": u[2]} if triple else {}
                try:
                    out = [f_knee(math.exp(u[0]), phi=_logistic(u[1]), **extra)
                           / ds.hfe_high_min,
                           f_phi(u[1], knee_current=math.exp(u[0]), **extra) / ds.hfe_low_min]
                    if triple:
                        if not EMISSION_RANGE[0] <= u[2] <= EMISSION_RANGE[1]:
                            return [math.nan] * 3
                        q = build(knee_current=math.exp(u[0]), phi=_logistic(u[1]), **extra)
                        q = unit(replace(q, cbo_leakage=ds.icbo_max), ds.hfe_max)
                        out.append(math.log(_scalar(iceo_at(q, ds.iceo_vce)) / ds.iceo_max))
                    return out
                except (DatasheetError, OverflowError):
                    # a trial point far outside (a gain of 1e5 sent the solver's logit to
                    # -1e3, whose exp overflowed): not a solution
                    return [math.nan] * (3 if triple else 2)
            phi0 = min(max(state["phi"], 1e-3), 1.0 - 1e-3)
            knee0 = state["knee_current"]
            if not knee0 < 1e3 * ds.hfe_high_current:
                knee0 = ds.hfe_high_current
            u0 = [math.log(knee0), math.log(phi0 / (1.0 - phi0))]
            if triple:
                u0.append(state["be_leakage_emission"])
            from scipy import optimize  # here: a worker evaluating chunks never fits

            with np.errstate(all="ignore"):
                sol = optimize.root(pair, u0, method="hybr", options={"xtol": 1e-13})
            if sol.success and np.all(np.abs(pair(sol.x)) < 1e-9):
                joint = sol.x
        if joint is not None:
            state["knee_current"] = math.exp(joint[0])
            state["phi"] = _logistic(joint[1])
            if len(joint) == 3:
                state["be_leakage_emission"] = float(joint[2])
            unmet = None
        elif ds.iceo_max is not None:
            reach = _fit_open_base(ds, state, f_knee, f_phi, build, unit, solve)
            # refused once the range has settled (it moves with the other figures' fit in
            # the first sweeps, and a range read there named values that then fitted)
            if reach is not None and unmet is not None and all(
                    b is None or a is not None and abs(a / b - 1.0) < 1e-3
                    for a, b in zip(reach, unmet)):
                raise _iceo_refusal(ds, reach)
            unmet = reach
        else:
            # with both figures the joint solve failed: the message names the pair (the
            # model's minimum unit meets both floors exactly; 200 / 40 at 100 mA / 60 at
            # 0.1 mA has no solution where 200 / 40 / 120 has)
            jointly = (f" together with hfe_low_min = {ds.hfe_low_min:g} at "
                       f"{ds.hfe_low_current:g} A (the model's minimum-gain unit meets both "
                       f"floors exactly; a datasheet's minimums are floors, so a lower "
                       f"hfe_low_min or hfe_high_min that the part still meets will fit)"
                       if both else "")
            if ds.hfe_high_current is not None:
                lo, hi = ds.hfe_high_current * 1e-2, ds.hfe_high_current * 1e4
                state["knee_current"] = solve(f_knee, lo, hi, "hfe_high_min",
                                              "no knee current gives this fall-off" + jointly)
            if ds.hfe_low_current is not None:
                logit = solve(f_phi, -40.0, 20.0, "hfe_low_min",
                              "no recombination current gives this roll-off at the "
                              "textbook emission coefficient 2; the part's I_CEO "
                              "(iceo_max, iceo_vce) lets the fit set the coefficient",
                              log=False)
                state["phi"] = _logistic(logit)

        def f_rc(rc):
            q = build(collector_resistance=rc)
            return _scalar(saturation_at(q, ds.vce_sat_ic, ds.vce_sat_ib)[0]) - ds.vce_sat_max
        if f_rc(0.0) > 0:
            raise DatasheetError("vce_sat_max", "is below the intrinsic saturation voltage of "
                                                "the model at this forced gain")
        rc_hi = 10.0 * ds.vce_sat_max / ds.vce_sat_ic
        state["collector_resistance"] = solve(f_rc, 0.0, rc_hi, "vce_sat_max",
                                              "no collector resistance gives it", log=False)

        if ds.vbe_sat_max is not None:
            # with a V_BE(on) spread the unit at vbe_on_max meets vbe_sat_max (its junction
            # lies that much above the typical one at any current, FittedDevice.parameters),
            # so the fitted, typical junction's unit stays that much below it
            target = ds.vbe_sat_max - ds.junction_headroom

            def f_rb(rb):
                q = build(base_resistance=rb)
                return _scalar(saturation_at(q, ds.vce_sat_ic, ds.vce_sat_ib)[1]) - target
            if f_rb(0.0) > 0:
                if ds.junction_headroom > 0:
                    raise DatasheetError(
                        "vbe_on_max", f"{ds.vbe_on_max:g} V puts the highest unit's junction "
                                      f"{ds.junction_headroom * 1e3:.0f} mV above the typical "
                                      f"one, which leaves it above vbe_sat_max "
                                      f"({ds.vbe_sat_max:g} V) at the V_CE(sat) point even "
                                      f"with no base resistance", related=("vbe_sat_max",))
                raise DatasheetError("vbe_sat_max", "is below the model's intrinsic V_BE at the "
                                                    "V_CE(sat) point; lower vbe_on or raise it")
            rb_hi = 10.0 * ds.vbe_sat_max / ds.vce_sat_ib
            state["base_resistance"] = solve(f_rb, 0.0, rb_hi, "vbe_sat_max",
                                             "no base resistance gives it", log=False)

        moved = 0.0
        for k, v in state.items():
            w = old[k]
            if w == v:
                continue
            moved = max(moved, abs(v / w - 1.0) if w not in (0.0, math.inf) else 1.0)
        if moved < 1e-10 and unmet is None:
            break
    if unmet is not None:
        raise _iceo_refusal(ds, unmet)
    if ds.vbe_sat_typ is not None:
        # the units spread by their base resistance (FittedDevice.parameters), which the
        # typical unit must still have
        # (with a V_BE(on) spread, the highest junction's: FittedDevice.intrinsic_vbe_sat)
        intrinsic = ds.vbe_sat_max - state["base_resistance"] * ds.vce_sat_ib
        if ds.vbe_sat_typ <= intrinsic:
            whose = (" for the unit at vbe_on_max" if ds.junction_headroom > 0 else "")
            raise DatasheetError("vbe_sat_typ", f"{ds.vbe_sat_typ:g} V is not above the "
                                                f"model's V_BE with no base resistance"
                                                f"{whose} ({intrinsic:.3g} V at the V_CE(sat) "
                                                f"point); check vbe_on and the figure's test "
                                                f"point", related=("vbe_sat_max",))
    if ds.icbo_hot_max is not None:
        # the doubling moves no figure at 25 degC, so it is fitted once, after the sweeps
        base = replace(base, leakage_doubling=_fit_doubling(ds, build(), unit))
    p = build()
    for h in (ds.hfe_median, ds.hfe_max):
        unit(p, h)
    return FittedDevice(ds, p, sweeps)


def model_figures(device: FittedDevice) -> dict[str, float]:
    """The figures the fit targets, as the fitted model gives them (for checks and reports)."""
    ds = device.datasheet
    out = {}
    q_min = device.parameters(ds.hfe_min)
    q_typ = device.parameters(ds.hfe_median)
    q_max = device.parameters(ds.hfe_max)
    out["hfe_min"] = _scalar(hfe_at(q_min, ds.hfe_current, ds.hfe_vce)[0])
    out["hfe_max"] = _scalar(hfe_at(q_max, ds.hfe_current, ds.hfe_vce)[0])
    if ds.hfe_typ is not None:
        out["hfe_typ"] = _scalar(hfe_at(q_typ, ds.hfe_current, ds.hfe_vce)[0])
    if ds.hfe_high_current is not None:
        out["hfe_high_min"] = _scalar(hfe_at(q_min, ds.hfe_high_current, ds.hfe_vce)[0])
    if ds.hfe_low_current is not None:
        out["hfe_low_min"] = _scalar(hfe_at(q_min, ds.hfe_low_current, ds.hfe_vce)[0])
    vce, vbe = saturation_at(q_min, ds.vce_sat_ic, ds.vce_sat_ib)
    out["vce_sat_max"] = _scalar(vce)
    if ds.vbe_sat_max is not None:
        if ds.vbe_on_max is not None:  # met by the highest junction
            high = device.parameters(ds.hfe_min, vbe_on=ds.vbe_on_max)
            vbe = saturation_at(high, ds.vce_sat_ic, ds.vce_sat_ib)[1]
        out["vbe_sat_max"] = _scalar(vbe)
    if ds.vbe_sat_typ is not None:
        typical = device.parameters(ds.hfe_min, vbe_sat=ds.vbe_sat_typ)
        out["vbe_sat_typ"] = _scalar(saturation_at(typical, ds.vce_sat_ic, ds.vce_sat_ib)[1])
    out["vbe_on"] = _scalar(hfe_at(q_typ, ds.vbe_on_current, ds.vbe_on_vce)[1])
    for key in ("vbe_on_min", "vbe_on_max"):
        if getattr(ds, key) is not None:
            q = device.parameters(ds.hfe_median, vbe_on=getattr(ds, key))
            out[key] = _scalar(hfe_at(q, ds.vbe_on_current, ds.vbe_on_vce)[1])
    out["icbo_max"] = _scalar(icbo_at(device.parameters(ds.hfe_median, ds.icbo_max), ds.icbo_vcb))
    if ds.iceo_max is not None:
        out["iceo_max"] = _scalar(iceo_at(device.parameters(ds.hfe_max, ds.icbo_max),
                                          ds.iceo_vce))
    if ds.icbo_hot_max is not None:
        out["icbo_hot_max"] = _scalar(icbo_at(device.parameters(ds.hfe_median, ds.icbo_max),
                                              ds.icbo_vcb, temperature=ds.icbo_hot_temperature))
    return out
