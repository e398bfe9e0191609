"""The shape of a problem file, checked by pydantic.

This layer checks keys and value types only (unknown keys are errors). Units, names
and expressions are checked in :mod:`optfeed.problem.load`, which turns these raw
models into the plain :class:`optfeed.problem.spec.Problem`.
"""

from __future__ import annotations

from typing import Annotated, Literal, Optional, Union

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, StrictBool

from .spec import Settings, Uncertainty


def _no_yes_no(value):
    """YAML reads yes/no/true/false/on/off as booleans, which pydantic would take as
    1 and 0: a pump of 'yes' L/h. A boolean is never a quantity, expression or count."""
    if isinstance(value, bool):
        raise ValueError(f"a yes/no value (read as {str(value).lower()}) is not a number, quantity or expression")
    return value


Scalar = Annotated[Union[float, int, str], BeforeValidator(_no_yes_no)]  # a number, or a number with a unit as text
Number = Annotated[float, BeforeValidator(_no_yes_no)]
Count = Annotated[int, BeforeValidator(_no_yes_no)]
Text = str


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class SpeciesIn(_Strict):
    initial: Scalar
    description: Text = ""
    dilute: StrictBool = True


class FeedIn(_Strict):
    composition: dict[str, Scalar] = Field(default_factory=dict)
    max_rate: Scalar
    min_rate: Scalar = 0.0
    min_on: Optional[Scalar] = None  # the pump is off, or runs at least this fast
    step: Optional[Scalar] = None  # the smallest change the pump can make
    description: Text = ""


class OxygenIn(_Strict):
    uptake: Scalar
    transfer_max: Scalar


class HeatIn(_Strict):
    removal_max: Scalar
    yield_per_oxygen: Scalar = "460 kJ/mol"


class VesselIn(_Strict):
    initial_volume: Scalar
    working_volume: Scalar
    oxygen: Optional[OxygenIn] = None
    heat: Optional[HeatIn] = None
    margin: Optional[Scalar] = None  # engineering margin kept from every limit by optimize, e.g. '10 %'


class BoundIn(_Strict):
    expression: Scalar
    name: Text = ""
    min: Optional[Scalar] = None
    max: Optional[Scalar] = None


class FreeTimeIn(_Strict):
    min: Scalar
    max: Scalar
    guess: Optional[Scalar] = None


class HorizonIn(_Strict):
    end_time: Union[Scalar, FreeTimeIn]


Quantity = Literal["titer", "product_mass", "productivity", "yield", "expression"]


class ObjectiveIn(_Strict):
    maximize: Optional[Quantity] = None
    minimize: Optional[Quantity] = None
    product: Optional[Text] = None
    substrate: Optional[Text] = None
    expression: Optional[Scalar] = None
    integral: Optional[Scalar] = None
    turnaround: Scalar = 0.0


_DEFAULT = Settings()  # the defaults live in one place: spec.Settings
_UNCERTAIN = Uncertainty()  # and spec.Uncertainty


class SolverIn(_Strict):
    pump_interval: Optional[Scalar] = None
    pump_steps: Optional[Count] = None  # default: Settings.pump_steps, applied in load
    elements_per_step: Count = _DEFAULT.elements_per_step
    degree: Count = _DEFAULT.degree
    starts: Count = _DEFAULT.starts
    smoothing: Number = _DEFAULT.smoothing
    max_iter: Count = _DEFAULT.max_iter
    tolerance: Number = _DEFAULT.tolerance
    verify_tolerance: Number = _DEFAULT.verify_tolerance
    refine_grid: Optional[StrictBool] = None  # default: on unless the file sets the pump grid
    grid_tolerance: Number = _DEFAULT.grid_tolerance
    max_pump_steps: Count = _DEFAULT.max_pump_steps
    time_limit: Optional[Scalar] = None


class SpreadIn(_Strict):
    """One uncertain value: its distribution around the value the file gives."""

    distribution: Literal["normal", "lognormal", "uniform"]
    sd: Optional[Scalar] = None
    relative_sd: Optional[Scalar] = None
    min: Optional[Scalar] = None
    max: Optional[Scalar] = None


class ScenariosIn(_Strict):
    count: Count = _UNCERTAIN.scenarios
    seed: Count = _UNCERTAIN.scenario_seed
    method: Literal["latin_hypercube", "sobol"] = _UNCERTAIN.method
    objective: Literal["mean", "worst", "mean_std"] = _UNCERTAIN.combine
    k: Optional[Number] = None


class MonteCarloIn(_Strict):
    samples: Count = _UNCERTAIN.samples
    seed: Count = _UNCERTAIN.sample_seed


class UncertaintyIn(_Strict):
    parameters: dict[str, SpreadIn] = Field(default_factory=dict)
    initial: dict[str, SpreadIn] = Field(default_factory=dict)
    feeds: dict[str, dict[str, SpreadIn]] = Field(default_factory=dict)
    covariance: Optional[Text] = None
    scenarios: ScenariosIn = Field(default_factory=ScenariosIn)
    monte_carlo: MonteCarloIn = Field(default_factory=MonteCarloIn)


class BetweenIn(_Strict):
    between: list[Scalar]
    guess: Optional[Scalar] = None


class PhaseIn(_Strict):
    name: Text
    until: Optional[Union[Scalar, BetweenIn]] = None  # a time, {between: [a, b]}, or a condition 'S < 0.5 g/L'
    # 'off' (YAML reads a bare off as false): every pump off; or feed -> off / {min, max}
    feeds: Optional[Union[StrictBool, Literal["off"], dict[str, Union[StrictBool, Literal["off"], "PumpRangeIn"]]]] = None
    parameters: dict[str, Scalar] = Field(default_factory=dict)
    rates: dict[str, Scalar] = Field(default_factory=dict)
    limits: list[BoundIn] = Field(default_factory=list)
    description: Text = ""


class PumpRangeIn(_Strict):
    min: Optional[Scalar] = None
    max: Optional[Scalar] = None


class AdditionIn(_Strict):
    sample: Optional[Scalar] = None  # volume taken out
    bolus: Optional[Scalar] = None  # volume added
    # bolus: species -> amount it holds, or {min, max}: an amount optimize chooses
    amounts: dict[str, Union[Scalar, "AmountRangeIn"]] = Field(default_factory=dict)
    at: Optional[Union[Scalar, list[Scalar]]] = None
    every: Optional[Scalar] = None
    start: Optional[Scalar] = None  # with every: first time (default: one interval in)
    stop: Optional[Scalar] = None  # with every: last time at most (default: before the end)
    description: Text = ""


class AmountRangeIn(_Strict):
    min: Optional[Scalar] = None
    max: Scalar


PhaseIn.model_rebuild()
AdditionIn.model_rebuild()


class ProblemIn(_Strict):
    name: Text = ""
    description: Text = ""
    species: dict[str, SpeciesIn]
    parameters: dict[str, Scalar] = Field(default_factory=dict)
    rates: dict[str, Scalar] = Field(default_factory=dict)
    reactions: dict[str, Scalar] = Field(default_factory=dict)
    derivatives: dict[str, Scalar] = Field(default_factory=dict)
    feeds: dict[str, FeedIn]
    vessel: VesselIn
    limits: list[BoundIn] = Field(default_factory=list)
    end: list[BoundIn] = Field(default_factory=list)
    horizon: HorizonIn
    objective: Optional[ObjectiveIn] = None
    solver: SolverIn = Field(default_factory=SolverIn)
    uncertainty: Optional[UncertaintyIn] = None
    phases: list[PhaseIn] = Field(default_factory=list)
    additions: list[AdditionIn] = Field(default_factory=list)
