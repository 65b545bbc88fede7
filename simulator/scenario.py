"""Scenario files: the single source of truth for what a simulation contains.

A scenario is a TOML file describing invented patients (weight, baseline
output), the meters on their beds and how those meters misbehave, a clinical
timeline of urine output, and optional clinical streams (bed context, fluid
intake, vital signs, serum sodium). All numbers in scenario files are invented
for simulation; no patient data.

`load_scenario` reads a file and checks it against the device profiles; a bad
file is one `UserError` line naming the file and the key.
"""

from __future__ import annotations

import tomllib
from datetime import UTC, datetime
from itertools import pairwise
from pathlib import Path
from typing import Annotated, Literal

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, ValidationError, model_validator

from daemon.engine.advice import FLUIDS, ReplacementOrder
from daemon.engine.profiles import DeviceProfile, Semantics
from daemon.errors import UserError, describe_validation

BUNDLED = Path(__file__).resolve().parent / "scenarios"
DEFAULT_START = "2026-03-14T06:00:00Z"  # an invented date, so logs are reproducible

_ID = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$"  # safe as one MQTT topic level
Hours = Annotated[float, Field(ge=0, le=24 * 14)]
Span = Annotated[float, Field(gt=0, le=24 * 14)]
Prob = Annotated[float, Field(ge=0, le=0.5)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


# --- the clinical timeline: each event changes the output from `at_h` on ------------


class Normal(_Strict):
    """Output returns to the patient's baseline over `ramp_h`."""

    kind: Literal["normal"]
    at_h: Hours
    ramp_h: Annotated[float, Field(ge=0, le=48)] = 0.5


class Level(_Strict):
    """Output moves to a given rate over `ramp_h` (mL/kg/h or mL/h, one of them)."""

    kind: Literal["level"]
    at_h: Hours
    ml_kg_h: Annotated[float, Field(ge=0, le=30)] | None = None
    ml_h: Annotated[float, Field(ge=0, le=2500)] | None = None
    ramp_h: Annotated[float, Field(ge=0, le=48)] = 0.5

    @model_validator(mode="after")
    def _one_rate(self) -> Level:
        if (self.ml_kg_h is None) == (self.ml_h is None):
            raise ValueError("give exactly one of ml_kg_h and ml_h")
        return self


class Oliguria(_Strict):
    """Output falls below 0.5 mL/kg/h (KDIGO's line) over `ramp_h`, and stays there."""

    kind: Literal["oliguria"]
    at_h: Hours
    ml_kg_h: Annotated[float, Field(ge=0, lt=0.5)]
    ramp_h: Annotated[float, Field(ge=0, le=48)] = 1.0


class Pod(_Strict):
    """Post-obstructive diuresis after the bladder is decompressed at `at_h`.

    Output rises to `peak_ml_h` within `rise_min`, then halves every `half_life_h`:
    back towards the baseline (physiological, self-limiting) or towards a
    persisting `plateau_ml_h` (pathological).
    """

    kind: Literal["pod"]
    at_h: Hours
    variant: Literal["physiological", "pathological"]
    peak_ml_h: Annotated[float, Field(gt=200, le=2400)]
    rise_min: Annotated[float, Field(gt=0, le=60)] = 40.0
    half_life_h: Annotated[float, Field(gt=0, le=72)] = 4.0
    plateau_ml_h: Annotated[float, Field(gt=0, le=2400)] | None = None
    episode: bool = True  # publish an "obstruction_relieved" marker in the bed context
    # the retained bladder content, drained into the bag over `residual_min` at `at_h`
    # (it is not diuresis: the engine leaves it out of the criteria)
    residual_ml: Annotated[float, Field(ge=0, le=3000)] = 0.0
    residual_min: Annotated[float, Field(gt=0, le=60)] = 30.0

    @model_validator(mode="after")
    def _variant(self) -> Pod:
        if self.variant == "pathological":
            if self.plateau_ml_h is None:
                raise ValueError("a pathological diuresis needs plateau_ml_h (the persisting rate)")
            if self.plateau_ml_h >= self.peak_ml_h:
                raise ValueError("plateau_ml_h must be below peak_ml_h")
        elif self.plateau_ml_h is not None:
            raise ValueError("plateau_ml_h is for the pathological variant only")
        return self


class Blocked(_Strict):
    """The catheter blocks: nothing reaches the bag for `for_h`; when it is cleared,
    the urine held in the bladder arrives as a bolus over `bolus_min`."""

    kind: Literal["blocked"]
    at_h: Hours
    for_h: Span
    bolus_min: Annotated[float, Field(ge=1, le=60)] = 10.0
    episode: bool = False  # publish a "catheter_changed" marker when it is cleared


Event = Annotated[Normal | Level | Oliguria | Pod | Blocked, Field(discriminator="kind")]


# --- meters ----------------------------------------------------------------------------


class Window(_Strict):
    at_h: Hours
    for_h: Span | None = None  # None: until the end of the run

    def contains(self, h: float) -> bool:
        return self.at_h <= h and (self.for_h is None or h < self.at_h + self.for_h)


class Outage(Window):
    """The network is down: readings are kept and sent in a burst when it returns
    (store-and-forward), or lost."""

    for_h: Span  # an outage ends
    store_forward: bool = True


class Fault(Window):
    """A sensor fault: readings carry a device status code outside the profile's ok list."""

    status: Annotated[str, Field(min_length=1, max_length=32)]


class Meter(_Strict):
    device_id: Annotated[str, Field(pattern=_ID)]
    profile: Annotated[str, Field(min_length=1, max_length=64)]
    from_h: Hours = 0.0  # the meter is on the bed from here ...
    until_h: Hours | None = None  # ... until here (None: the end of the run)
    period_s: Annotated[int, Field(gt=0, le=3600)] | None = None  # None: the profile's
    jitter_s: Annotated[float, Field(ge=0, le=600)] = 1.0
    latency_s: tuple[Annotated[float, Field(ge=0, le=60)], Annotated[float, Field(ge=0, le=60)]] = (
        0.2,
        1.5,
    )
    noise_ml: Annotated[float, Field(ge=0, le=20)] = 0.5
    unit: Literal["mL", "cL", "dL", "L"] = "mL"  # for profiles with a unit field
    utc_offset_min: Annotated[int, Field(ge=-720, le=840)] = 60  # for local-time profiles
    duplicate_p: Prob = 0.0
    reorder_p: Prob = 0.0
    clock_drift_s_per_h: Annotated[float, Field(ge=-600, le=600)] = 0.0
    initial_bag_ml: Annotated[float, Field(ge=0, le=2000)] = 0.0
    # the nurse empties the bag at irregular intervals in this range (hours), and
    # always when it holds `bag_full_ml` (None: 80% of the profile's maximum, at most 2 L)
    bag_change_h: tuple[Span, Span] | None = None
    bag_full_ml: Annotated[float, Field(gt=50, le=5000)] | None = None
    outages: list[Outage] = Field(default_factory=list)
    offline: list[Window] = Field(default_factory=list)  # the meter is silent (off, unplugged)
    faults: list[Fault] = Field(default_factory=list)

    @model_validator(mode="after")
    def _ranges(self) -> Meter:
        if self.latency_s[0] > self.latency_s[1]:
            raise ValueError("latency_s: the first value is the lower bound")
        if self.bag_change_h is not None and self.bag_change_h[0] > self.bag_change_h[1]:
            raise ValueError("bag_change_h: the first value is the lower bound")
        if self.until_h is not None and self.until_h <= self.from_h:
            raise ValueError("until_h must be after from_h")
        return self


# --- clinical streams besides the meters ------------------------------------------------


class Order(_Strict):
    """A clinician's replacement order (DESIGN §6), written into the bed context from
    `at_h` on. Without one, no fluid or rate is ever suggested for the bed."""

    at_h: Hours = 0.0
    fraction_low: float = 0.5  # checked by the engine's order model (never above 1)
    fraction_high: float = 0.75
    fluid: str = "0.45% NaCl"
    max_rate_ml_h: Annotated[float, Field(gt=0, le=2000)] | None = None
    ordered_by: Annotated[str, Field(min_length=1, max_length=64)] = "icu-physician (simulated)"

    @model_validator(mode="after")
    def _valid(self) -> Order:
        self.as_order(0.0)  # the engine's own checks, so a bad order fails at load
        return self

    def as_order(self, t: float) -> ReplacementOrder:
        at = datetime.fromtimestamp(t, UTC)
        return ReplacementOrder(
            fraction_low=self.fraction_low, fraction_high=self.fraction_high, fluid=self.fluid,
            max_rate_ml_h=self.max_rate_ml_h, ordered_by=self.ordered_by, ordered_at=at,
        )  # fmt: skip


class Context(_Strict):
    """The retained bed context (DESIGN §7): published at the start and again at
    every episode marker and order."""

    publish: bool = True
    weight: bool = True  # include the weight (without it, weight-based rules do not run)
    disabled_rules: list[Annotated[str, Field(max_length=64)]] = Field(default_factory=list)
    order: Order | None = None


class Intake(_Strict):
    """Replacement fluid by infusion: at each clock hour the rate is set to `fraction`
    of the output of the hour just completed (or of the hour `lag_h` hours before it),
    at most `max_ml_h`, plus any maintenance; what ran is documented every
    `every_min` minutes, at the end of each period."""

    fluid: str = "0.45% NaCl"
    every_min: Literal[10, 15, 20, 30, 60] = 60
    route: Literal["iv", "oral", "enteral", "other"] = "iv"
    fraction: Annotated[float, Field(ge=0, le=1.5)] = 0.6
    lag_h: Annotated[int, Field(ge=0, le=12)] = 0
    max_ml_h: Annotated[float, Field(gt=0, le=2000)] | None = None
    maintenance_ml_h: Annotated[float, Field(ge=0, le=500)] = 0.0
    from_h: Hours = 1.0
    until_h: Hours | None = None

    @model_validator(mode="after")
    def _known(self) -> Intake:
        if self.fluid not in FLUIDS:
            raise ValueError(f"unknown fluid {self.fluid!r}; known: {', '.join(sorted(FLUIDS))}")
        return self


class Vitals(_Strict):
    """Heart rate and blood pressure every `every_min`; both drift with the
    unreplaced loss (mL/kg), so the shock index rises as a patient falls behind.
    The sensitivities are invented for the simulation; with the defaults a large
    loss takes heart rate up ~36/min and systolic pressure down ~28 mmHg."""

    every_min: Annotated[int, Field(ge=1, le=240)] = 15
    heart_rate: Annotated[float, Field(ge=40, le=160)] = 82.0
    systolic: Annotated[float, Field(ge=70, le=200)] = 124.0
    diastolic: Annotated[float, Field(ge=30, le=120)] = 70.0
    hr_per_ml_kg: Annotated[float, Field(ge=0, le=5)] = 0.9
    sbp_per_ml_kg: Annotated[float, Field(ge=0, le=5)] = 0.7
    # the response flattens: the loss counts as d0 * (1 - exp(-loss / d0))
    saturation_ml_kg: Annotated[float, Field(gt=0, le=200)] = 40.0

    @model_validator(mode="after")
    def _order(self) -> Vitals:
        if self.diastolic >= self.systolic:
            raise ValueError("diastolic must be below systolic")
        return self


class Labs(_Strict):
    """Serum sodium sampled every `every_h` from `first_h`, resulting after
    `turnaround_min`. Sodium follows the Adrogué-Madias single-litre formulas hour
    by hour: output above the baseline is lost with urine Na+K, documented intake
    adds its fluid's sodium. Potassium, magnesium, phosphate and creatinine, where
    given, are reported with small noise around their value."""

    every_h: Annotated[float, Field(gt=0, le=48)] = 6.0
    first_h: Hours = 1.0
    turnaround_min: Annotated[float, Field(ge=0, le=240)] = 45.0
    serum_na: Annotated[float, Field(ge=120, le=160)] = 140.0
    serum_k: Annotated[float, Field(ge=2, le=7)] | None = 4.1
    serum_mg: Annotated[float, Field(ge=0.2, le=3)] | None = None
    serum_phosphate: Annotated[float, Field(ge=0.2, le=3)] | None = None
    serum_creatinine: Annotated[float, Field(ge=20, le=1500)] | None = None
    urine_na: Annotated[float, Field(ge=0, le=250)] = 60.0
    urine_k: Annotated[float, Field(ge=0, le=150)] = 20.0
    report_urine: bool = True  # send urine Na and K with each result


class Bed(_Strict):
    bed: Annotated[str, Field(pattern=_ID)]
    ward: Annotated[str, Field(min_length=1, max_length=64)] | None = None  # None: scenario's
    weight_kg: Annotated[float, Field(ge=30, le=250)]
    weight_basis: Literal["actual", "ideal", "adjusted"] = "actual"
    baseline_ml_kg_h: Annotated[float, Field(ge=0.5, le=3)] = 0.8
    wobble: Annotated[float, Field(ge=0, le=0.3)] = 0.1  # slow relative variation of output
    tbw_fraction: Annotated[float, Field(ge=0.3, le=0.7)] = 0.6
    meters: Annotated[list[Meter], Field(min_length=1, max_length=8)]
    timeline: list[Event] = Field(default_factory=list)
    context: Context = Context()
    intake: Intake | None = None
    vitals: Vitals | None = None
    labs: Labs | None = None

    @model_validator(mode="after")
    def _consistent(self) -> Bed:
        times = [e.at_h for e in self.timeline]
        if times != sorted(times):
            raise ValueError("timeline: events must be in time order (at_h)")
        spans = sorted(((m.from_h, m.until_h, m.device_id) for m in self.meters),
                       key=lambda x: x[0])  # fmt: skip
        for (_, end, a), (start, _, b) in pairwise(spans):
            if end is None or end > start:
                raise ValueError(f"meters {a!r} and {b!r} are on the bed at the same time")
        return self


class Scenario(_Strict):
    schema_version: Literal[1] = Field(1, alias="schema")
    name: Annotated[str, Field(pattern=r"^[a-z0-9][a-z0-9-]{0,63}$")]
    description: str = ""
    ward: Annotated[str, Field(min_length=1, max_length=64)] = "sim-icu"
    hours: Span = 24.0
    start: AwareDatetime = Field(default_factory=lambda: _parse_start(DEFAULT_START))
    beds: Annotated[list[Bed], Field(min_length=1, max_length=500)]

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


def _parse_start(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def check_scenario(sc: Scenario, profiles: dict[str, DeviceProfile]) -> str | None:
    """What one table alone cannot see; the first problem as 'key: message'."""
    beds: set[str] = set()
    devices: set[str] = set()
    for i, bed in enumerate(sc.beds):
        if bed.bed in beds:
            return f"beds.{i}.bed: {bed.bed!r} appears twice"
        beds.add(bed.bed)
        for j, m in enumerate(bed.meters):
            key = f"beds.{i}.meters.{j}"
            if m.device_id in devices:
                return f"{key}.device_id: {m.device_id!r} appears twice"
            devices.add(m.device_id)
            p = profiles.get(m.profile)
            if p is None:
                known = ", ".join(sorted(profiles))
                return f"{key}.profile: unknown device profile {m.profile!r} (known: {known})"
            if m.faults and p.fields.status is None:
                return f"{key}.faults: profile {p.name!r} has no status field to report a fault"
            for k, f in enumerate(m.faults):
                normal = {s.lower() for s in p.status.ok + p.status.bag_change}
                if f.status.lower() in normal:
                    return (
                        f"{key}.faults.{k}.status: {f.status!r} is a normal status of "
                        f"{p.name!r}, not a fault"
                    )
            if m.unit != "mL" and (
                p.fields.unit is None or p.volume.semantics is Semantics.BAG_WEIGHT
            ):
                return f"{key}.unit: profile {p.name!r} has no unit field to say {m.unit}"
            interval = p.volume.semantics is Semantics.INTERVAL
            if interval and m.period_s is not None and m.period_s != p.volume.interval_s:
                return (
                    f"{key}.period_s: an interval meter reports every interval "
                    f"({p.volume.interval_s} s)"
                )
            if interval and (m.bag_change_h or m.initial_bag_ml):
                return f"{key}: interval meters have no bag (drop bag_change_h, initial_bag_ml)"
    return None


def parse_scenario(data: object, where: Path, profiles: dict[str, DeviceProfile]) -> Scenario:
    try:
        sc = Scenario.model_validate(data)
    except ValidationError as exc:
        raise UserError(describe_validation(where, exc).replace("\n", " ")) from None
    problem = check_scenario(sc, profiles)
    if problem is not None:
        raise UserError(f"{where}: {problem}")
    return sc


def load_scenario(path: Path, profiles: dict[str, DeviceProfile]) -> Scenario:
    """Read and validate one scenario file; one-line UserError if it is unusable."""
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserError(f"{path}: no such scenario file") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read: {exc.strerror}") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None
    return parse_scenario(data, path, profiles)
