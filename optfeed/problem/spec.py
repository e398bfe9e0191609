"""The resolved problem: plain, frozen, picklable data in internal units.

Every number here is in optfeed's coherent internal units (g, L, h, mmol; see
:mod:`optfeed.units`); every ``unit`` field is the unit the user wrote, used only for
reports. Expressions are checked :class:`optfeed.expr.Expr` objects. Nothing here
holds a CasADi object, so a Problem can be sent to a worker process.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from ..expr import Expr

RESERVED = ("t", "V", "D", "F_total", "OUR", "heat_load", "J_int")


@dataclass(frozen=True)
class Species:
    """A state of the culture.

    Attributes
    ----------
    name : str
    initial : float
        Initial value, internal units (g/L for a concentration in g/L).
    unit : str
        The unit the user wrote for it (for reports).
    description : str
    dilute : bool
        False for quantities the feed does not dilute (per-cell or extensive);
        the tool then adds neither feed nor dilution terms.
    raw : bool
        True if its whole derivative is written under ``derivatives``.
    rate : Expr
        Net reaction rate (standard form) or the full derivative (raw form),
        in species unit per hour.
    """

    name: str
    initial: float
    unit: str
    description: str
    dilute: bool
    raw: bool
    rate: Expr


@dataclass(frozen=True)
class Feed:
    """A feed stream (one pump).

    Attributes
    ----------
    name : str
    composition : dict
        Species name -> concentration in the feed, internal units.
    min_rate, max_rate : float
        Pump limits, L/h.
    min_on : float
        L/h; when above zero the pump is either off or runs at least this fast
        (optimize fixes the relaxed answer's on/off pattern and solves again).
    step : float
        L/h; the smallest change of setting the pump can make (0: any), to which
        the written schedule is rounded and then verified.
    unit : str
        The unit the user wrote for ``max_rate`` (for reports).
    """

    name: str
    composition: dict
    min_rate: float
    max_rate: float
    unit: str
    description: str = ""
    min_on: float = 0.0
    step: float = 0.0


@dataclass(frozen=True)
class Bound:
    """A bound on an expression over the run (path) or at the end.

    Attributes
    ----------
    name : str
    expression : Expr
    lower, upper : float or None
        Internal units.
    unit : str
        The unit the bound was written in (for reports; '' if none).
    at_end : bool
    key : str
        Where it came from in the problem file (``limits[0]``).
    """

    name: str
    expression: Expr
    lower: float | None
    upper: float | None
    unit: str
    at_end: bool
    key: str


@dataclass(frozen=True)
class Oxygen:
    """Oxygen demand and the vessel's transfer ceiling.

    uptake : Expr, oxygen uptake rate OUR (mmol/L/h internal);
    transfer_max : float, OTR ceiling, mmol/L/h; unit : str as written.
    """

    uptake: Expr
    transfer_max: float
    unit: str


@dataclass(frozen=True)
class Heat:
    """Heat-removal ceiling; heat load = yield_per_oxygen * OUR * V.

    removal_max and yield_per_oxygen are internal units (g dm^2 h^-3 and
    g dm^2 h^-2 mmol^-1); unit is the unit written for removal_max.
    """

    removal_max: float
    yield_per_oxygen: float
    unit: str


@dataclass(frozen=True)
class Vessel:
    """initial_volume, working_volume in L; unit as written for working_volume.

    margin : float
        Engineering margin (a fraction, 0.1 for 10 %) that ``optimize`` keeps from
        every limit but the pumps: a maximum U is designed to U - margin*|U|, a
        minimum L to L + margin*|L|. ``check`` judges the limits themselves.
    """

    initial_volume: float
    working_volume: float
    unit: str
    oxygen: Oxygen | None = None
    heat: Heat | None = None
    margin: float = 0.0


@dataclass(frozen=True)
class Horizon:
    """Run length in h: fixed ``end_time``, or free between ``min_end`` and ``max_end``."""

    end_time: float | None
    min_end: float | None = None
    max_end: float | None = None
    guess: float | None = None

    @property
    def free(self) -> bool:
        return self.end_time is None


@dataclass(frozen=True)
class Objective:
    """What to maximise or minimise.

    Attributes
    ----------
    sense : 'maximize' or 'minimize'
    quantity : 'titer', 'product_mass', 'productivity', 'yield' or 'expression'
        titer = product concentration at the end; product_mass = product * V at the
        end; productivity = titer / (end time + turnaround) (per hour); yield =
        (product formed, mass) / (substrate fed, mass); expression = ``expression``
        evaluated at the end.
    product, substrate : str or None
    expression, integral : Expr or None
        ``integral`` is integrated over the run and added to the end value.
    turnaround : float
        h, added to the run time for productivity.
    """

    sense: str
    quantity: str
    product: str | None
    substrate: str | None
    expression: Expr | None
    integral: Expr | None
    turnaround: float


@dataclass(frozen=True)
class Settings:
    """How ``optimize`` transcribes and solves the problem.

    Attributes
    ----------
    pump_steps : int
        Number of piecewise-constant pump intervals over the run.
    elements_per_step : int
        Collocation finite elements per pump interval.
    degree : int
        Radau collocation degree (points per element).
    starts : int
        Initial guesses tried (multistart).
    smoothing : float
        Weight of the penalty on feed-rate changes, relative to the objective
        (sum over steps of (change / max rate)^2); 0 turns it off.
    max_iter : int
        IPOPT iteration limit per start.
    tolerance : float
        IPOPT convergence tolerance.
    verify_tolerance : float
        Largest relative difference between the NLP and the re-simulated
        objective for an answer to count as verified. (Limits are judged as
        ``optfeed check`` judges them, to 1e-6 of their bound; a limit exceeded
        between collocation points is backed off and the problem re-solved.)
    refine_grid : bool
        Double the pump grid (warm-started from the coarser answer) until the
        objective changes by less than ``grid_tolerance``, or until two shrinking
        changes predict that the next doubling would. On by default when the
        file gives neither ``pump_steps`` nor ``pump_interval``: a pump grid the user
        chose is taken as the pump's own.
    grid_tolerance : float
        Relative change of the objective below which the pump grid counts as fine
        enough.
    max_pump_steps : int
        The finest pump grid refinement may reach.
    time_limit : float or None
        Seconds for the whole optimize job (None: no limit); when it is reached the
        best verified answer so far is reported, with a status that says so.
    """

    pump_steps: int = 40
    elements_per_step: int = 4
    degree: int = 3
    starts: int = 4
    smoothing: float = 0.0
    max_iter: int = 3000
    tolerance: float = 1e-8
    verify_tolerance: float = 2e-3
    refine_grid: bool = True
    grid_tolerance: float = 5e-4
    max_pump_steps: int = 320
    time_limit: float | None = None

    @property
    def elements(self) -> int:
        return self.pump_steps * self.elements_per_step


@dataclass(frozen=True)
class Uncertain:
    """One uncertain value of the problem and its distribution.

    Attributes
    ----------
    name : str
        Its name in the ``uncertainty`` section and in a covariance file:
        ``mu_max`` (a parameter), ``initial.X`` (an initial value; ``initial.V``
        the initial volume) or ``feeds.concentrate.S`` (a feed composition).
    target : str
        'constant' (an entry of ``Model.p``) or 'initial' (an entry of ``Model.x0``).
    ref : str
        The constant's name in ``Model.constant_names`` (``mu_max``,
        ``concentrate.S``) or the state's name (``X``, ``V``).
    distribution : str
        'normal', 'lognormal', 'uniform' or 'multivariate normal' (from the
        covariance file).
    nominal : float
        The value the problem file gives, internal units: the mean of a normal or
        lognormal distribution, a value within a uniform one.
    sd : float
        Standard deviation, internal units (for 'uniform': (max - min) / sqrt(12)).
    lower, upper : float or None
        Bounds of a uniform distribution, internal units.
    unit : str
        The unit the value is written in (for reports; '' for internal units).
    key : str
        Where it is written (``uncertainty.parameters.mu_max``).
    """

    name: str
    target: str
    ref: str
    distribution: str
    nominal: float
    sd: float
    lower: float | None
    upper: float | None
    unit: str
    key: str


@dataclass(frozen=True)
class Uncertainty:
    """The ``uncertainty`` section of a problem file, checked.

    Attributes
    ----------
    values : tuple of Uncertain
        Each uncertain value; those of the covariance file last, in its order.
    covariance : tuple of tuple of float or None
        The covariance matrix of the values with distribution 'multivariate
        normal' (in their order), internal units; symmetric positive definite.
    covariance_file : str
        The file it was read from ('' if none).
    scenarios : int
        Scenarios the optimizer carries, the nominal one among them.
    scenario_seed : int
    method : str
        'latin_hypercube' or 'sobol': how the scenarios' points are spread.
    combine : str
        The objective over the scenarios: 'mean', 'worst' or 'mean_std' (the mean
        less ``k`` standard deviations for a maximised objective, plus for a
        minimised one).
    k : float
        For 'mean_std'.
    samples : int
        Monte Carlo samples that verify a schedule (independent random draws).
    sample_seed : int
    """

    values: tuple = ()
    covariance: tuple | None = None
    covariance_file: str = ""
    scenarios: int = 8
    scenario_seed: int = 1
    method: str = "latin_hypercube"
    combine: str = "mean"
    k: float = 1.0
    samples: int = 200
    sample_seed: int = 1

    @property
    def names(self) -> list[str]:
        return [v.name for v in self.values]


@dataclass(frozen=True)
class PhaseEnd:
    """What ends a phase.

    kind : str
        'at' (a fixed time ``time``), 'between' (a time ``optimize`` chooses within
        ``lower``..``upper``, ``guess`` to start from; ``check`` reads it from the
        schedule), 'when' (the first moment ``condition`` crosses ``level``, found by
        event detection in simulation and as a switching constraint in the NLP) or
        'run' (the last phase: it ends with the run).
    time, lower, upper, guess : float or None
        h.
    condition : Expr or None
        For 'when': the expression watched.
    level : float or None
        For 'when', internal units.
    falling : bool
        For 'when': True if the phase ends when ``condition`` falls to ``level``
        (written ``<`` or ``<=``), False when it rises to it.
    text : str
        As written (for reports).
    """

    kind: str
    time: float | None = None
    lower: float | None = None
    upper: float | None = None
    guess: float | None = None
    condition: Expr | None = None
    level: float | None = None
    falling: bool = True
    text: str = ""
    level_text: str = ""  # for 'when': the level as written ('0.5 g/L')


@dataclass(frozen=True)
class Phase:
    """One stretch of a run over which the model and the pumps' ranges are fixed.

    Attributes
    ----------
    name : str
    end : PhaseEnd
    pumps : dict
        Feed name -> (min, max) L/h in this phase, for the feeds whose range differs
        from the feed's own; (0, 0) is a pump that is off.
    parameters : dict
        Parameter name -> value (internal units) in this phase.
    rates : dict
        Named rate or species -> Expr that replaces its expression in this phase.
    bounds : tuple of Bound
        Extra path limits that hold only in this phase.
    key : str
        Where it is written (``phases[1]``).
    """

    name: str
    end: PhaseEnd
    pumps: dict = field(default_factory=dict)
    parameters: dict = field(default_factory=dict)
    rates: dict = field(default_factory=dict)
    bounds: tuple = ()
    key: str = ""


@dataclass(frozen=True)
class Addition:
    """A discrete change of the broth at a fixed time: a state jump.

    kind : 'sample' (``volume`` L taken out, concentrations unchanged) or 'bolus'
        (``volume`` L added holding ``amounts``: species -> amount in internal units
        of concentration x volume, e.g. g; every other diluted species is diluted).
    time : float, h.
    key : str, where it is written (``additions[0]``).
    chosen : dict, species -> (min, max) internal units: amounts that ``optimize``
        chooses within a range (``amounts: {S: {max: 20 g}}``), one per addition
        time; ``amounts`` then leaves them out. ``check`` needs them as numbers (the
        problem ``optimize`` writes back, planned.yaml, holds them).
    """

    kind: str
    time: float
    volume: float
    amounts: dict = field(default_factory=dict)
    key: str = ""
    chosen: dict = field(default_factory=dict)  # species -> (min, max): amounts optimize chooses
    line: int | None = None  # of its entry in the problem file

    @property
    def decided(self) -> bool:
        """True when every amount is a number (none left for optimize to choose)."""
        return not self.chosen


@dataclass(frozen=True)
class Problem:
    """A checked fed-batch problem. Build it with :func:`optfeed.load_problem`."""

    name: str
    description: str
    source: str
    species: tuple
    parameters: dict
    parameter_units: dict
    rates: tuple  # of (name, Expr), in evaluation order
    feeds: tuple
    vessel: Vessel
    bounds: tuple
    horizon: Horizon
    objective: Objective | None
    settings: Settings = field(default_factory=Settings)
    uncertainty: Uncertainty | None = None  # None: no uncertainty section
    phases: tuple = ()  # of Phase, in order; () is one phase over the whole run
    additions: tuple = ()  # of Addition, by time
    data: dict = field(repr=False, default_factory=dict)
    warnings: tuple = field(repr=False, default=())  # of optfeed.errors.Issue: units that look wrong

    @property
    def species_names(self) -> list[str]:
        return [s.name for s in self.species]

    @property
    def feed_names(self) -> list[str]:
        return [f.name for f in self.feeds]

    def species_by_name(self, name) -> Species:
        return next(s for s in self.species if s.name == name)

    def __repr__(self) -> str:
        h = self.horizon
        run = f"{h.end_time:g} h" if not h.free else f"{h.min_end:g}..{h.max_end:g} h (free)"
        o = self.objective
        goal = "no objective" if o is None else f"{o.sense} {o.quantity}" + (f" of {o.product}" if o.product else "")
        parts = [f"species {', '.join(self.species_names)}", f"feeds {', '.join(self.feed_names)}",
                 f"{len(self.bounds)} extra limit(s)", run, goal]
        if self.uncertainty is not None:
            u = self.uncertainty
            parts.append(f"{len(u.values)} uncertain value(s), {u.scenarios} scenario(s)")
        if self.phases:
            parts.append(f"phases {', '.join(ph.name for ph in self.phases)}")
        if self.additions:
            parts.append(f"{len(self.additions)} addition(s)")
        if self.warnings:
            parts.append(f"{len(self.warnings)} unit warning(s)")
        return f"Problem({self.name!r} from {self.source!r}: {'; '.join(parts)})"
