"""The calibration spec: parameters with priors, observation channels, and loop settings.

`CalibrationSpec.from_dict` validates a plain mapping (parsed JSON or TOML) and fills the
documented defaults; `to_dict` gives the normalised form back. Every error names its field.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from honing.engine.errors import SpecError
from honing.engine.priors import Prior, prior_from_dict

__all__ = ["LIMITS", "NOISE_SCALE_NAME", "CalibrationSpec", "Observation", "Parameter"]

NoiseScale = Literal["fixed", "estimate"]

#: Caps that keep one calibration's state and refit cost bounded (documented in the README).
LIMITS = {
    "parameters": 50,
    "observation_values": 200_000,
    "observations": 1_000,
    "initial_runs": 10_000,
    "batch_size": 1_000,
    "max_runs": 100_000,
    "max_degree": 20,
}

#: Name of the noise scale's column in posterior summaries and samples when it is estimated;
#: no parameter may take it.
NOISE_SCALE_NAME = "noise_scale"
#: Longest parameter unit: a label, shown in every table and report row.
MAX_UNIT_CHARS = 64
#: Farthest a reported output may lie from the data, in noise sd: squared and summed over
#: every value of every run it stays far inside the float range, so a fit cannot overflow.
MAX_RESIDUAL_SD = 1e100
#: Most unknown observation names one report's error lists.
MAX_UNKNOWN_LISTED = 20

_NAME_CHARS = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_-.")


@dataclass(frozen=True)
class Parameter:
    """One calibrated parameter: its name, prior and optional unit."""

    name: str
    prior: Prior
    unit: str | None = None


@dataclass(frozen=True, eq=False)
class Observation:
    """One observation channel: measured values with their sd, optional coordinates, and
    optional labels for plots (the values' unit, what the coordinates are)."""

    name: str
    values: np.ndarray
    sd: np.ndarray
    coords: np.ndarray | None = None
    unit: str | None = None
    coords_label: str | None = None

    @property
    def size(self) -> int:
        return int(self.values.shape[0])


@dataclass(frozen=True, eq=False)
class CalibrationSpec:
    """A validated calibration spec with every default filled in."""

    name: str
    parameters: tuple[Parameter, ...]
    observations: tuple[Observation, ...]
    noise_scale: NoiseScale
    initial_runs: int
    batch_size: int
    max_degree: int
    retain_fraction: float
    max_runs: int
    seed: int

    @property
    def dim(self) -> int:
        return len(self.parameters)

    @property
    def names(self) -> list[str]:
        return [p.name for p in self.parameters]

    @property
    def output_size(self) -> int:
        return sum(o.size for o in self.observations)

    @property
    def data(self) -> np.ndarray:
        """All observed values concatenated in channel order, shape ``(output_size,)``."""
        return np.concatenate([o.values for o in self.observations])

    @property
    def sd(self) -> np.ndarray:
        """All stated sd concatenated in channel order, shape ``(output_size,)``."""
        return np.concatenate([o.sd for o in self.observations])

    def flatten_outputs(self, outputs: Mapping[str, Any]) -> np.ndarray:
        """Validate one run's outputs ``{channel: [numbers]}`` and concatenate them.

        Raises `SpecError` naming ``("outputs", channel)`` for a missing or unknown channel
        (the first `MAX_UNKNOWN_LISTED` unknown ones), a wrong length, a non-number or a
        non-finite value, and ``("outputs", channel, i)`` for a value farther than
        `MAX_RESIDUAL_SD` noise sd from the data, which no fit could hold.
        """
        if not isinstance(outputs, Mapping):
            raise SpecError.at(("outputs",), "must be an object {observation name: [numbers]}")
        errors: list[tuple[tuple[str | int, ...], str]] = []
        known = {o.name for o in self.observations}
        unknown = [k for k in outputs if k not in known]
        if unknown:
            expected = _name_list(o.name for o in self.observations)
            errors.extend(
                (("outputs", str(k)), f"unknown observation; expected one of {expected}")
                for k in unknown[:MAX_UNKNOWN_LISTED]
            )
            if len(unknown) > MAX_UNKNOWN_LISTED:
                more = len(unknown) - MAX_UNKNOWN_LISTED
                errors.append((("outputs",), f"{more} more unknown observations"))
        parts = []
        for obs in self.observations:
            loc: tuple[str | int, ...] = ("outputs", obs.name)
            if obs.name not in outputs:
                errors.append((loc, "missing"))
                continue
            try:
                values = _number_list(outputs[obs.name], loc)
            except SpecError as exc:
                errors.extend((tuple(e["loc"]), str(e["msg"])) for e in exc.errors)
                continue
            if values.shape[0] != obs.size:
                errors.append((loc, f"expected {obs.size} values, got {values.shape[0]}"))
                continue
            with np.errstate(over="ignore"):
                residual = np.abs((values - obs.values) / obs.sd)
            far = np.flatnonzero(~(residual <= MAX_RESIDUAL_SD))
            if far.size:
                errors.append(
                    (
                        (*loc, int(far[0])),
                        f"{values[far[0]]:.3g} lies more than {MAX_RESIDUAL_SD:.0e} noise sd "
                        "from the data, beyond what a fit can hold; report a diverged run "
                        "as failed",
                    )
                )
                continue
            parts.append(values)
        if errors:
            raise SpecError(errors)
        return np.concatenate(parts)

    def split_outputs(self, flat: np.ndarray) -> dict[str, list[float]]:
        """Inverse of `flatten_outputs`: ``{channel: [numbers]}`` from a flat vector."""
        out, start = {}, 0
        for obs in self.observations:
            out[obs.name] = np.asarray(flat[start : start + obs.size], dtype=float).tolist()
            start += obs.size
        return out

    def parameters_dict(self, theta: np.ndarray) -> dict[str, float]:
        """``{name: value}`` for one point, shape ``(dim,)``."""
        return {p.name: float(v) for p, v in zip(self.parameters, theta, strict=True)}

    def theta_from_dict(self, values: Mapping[str, Any], loc: tuple[str | int, ...]) -> np.ndarray:
        """Validate ``{name: value}`` for every parameter, inside its prior's support."""
        if not isinstance(values, Mapping):
            raise SpecError.at(loc, "must be an object {parameter name: number}")
        errors: list[tuple[tuple[str | int, ...], str]] = []
        errors.extend(
            ((*loc, str(k)), "unknown parameter") for k in values if k not in set(self.names)
        )
        theta = np.zeros(self.dim)
        for i, p in enumerate(self.parameters):
            if p.name not in values:
                errors.append(((*loc, p.name), "missing"))
                continue
            v = values[p.name]
            if not _is_finite_number(v):
                errors.append(((*loc, p.name), "must be a finite number"))
                continue
            if not bool(p.prior.in_support(np.array([float(v)]))[0]):
                errors.append(((*loc, p.name), f"{v} is outside the prior's support"))
                continue
            theta[i] = float(v)
        if errors:
            raise SpecError(errors)
        return theta

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, stored: bool = False) -> CalibrationSpec:
        """Validate a spec mapping and fill defaults; raises `SpecError` listing every bad field.

        ``stored`` reads back a spec accepted earlier: the checks on parameters added since
        (a prior's floating-point range, the unit's length, the reserved name) are left out,
        so that a calibration created before them still opens.
        """
        if not isinstance(data, Mapping):
            raise SpecError.at((), "the spec must be an object")
        errors: list[tuple[tuple[str | int, ...], str]] = []
        allowed = {
            "name",
            "parameters",
            "observations",
            "noise",
            "design",
            "surrogate",
            "budget",
            "seed",
        }
        errors.extend(((str(k),), "unknown field") for k in data if k not in allowed)
        name = data.get("name")
        if not isinstance(name, str) or not name.strip() or len(name) > 200:
            errors.append((("name",), "must be a non-empty string of at most 200 characters"))
        parameters = _collect(
            errors, functools.partial(_parameters, stored=stored), data.get("parameters")
        )
        observations = _collect(errors, _observations, data.get("observations"))
        noise = _section(errors, data, "noise", {"scale"})
        scale = noise.get("scale", "fixed")
        if scale not in ("fixed", "estimate"):
            errors.append((("noise", "scale"), "must be 'fixed' or 'estimate'"))
        dim = len(parameters) if parameters else 1
        design = _section(errors, data, "design", {"initial_runs", "batch_size"})
        initial_runs = _int_field(
            errors, design, ("design", "initial_runs"), max(10, 4 * (dim + 1)), 2
        )
        batch_size = _int_field(errors, design, ("design", "batch_size"), max(4, 2 * (dim + 1)), 1)
        surrogate = _section(errors, data, "surrogate", {"max_degree", "retain_fraction"})
        max_degree = _int_field(errors, surrogate, ("surrogate", "max_degree"), 8, 1)
        retain = surrogate.get("retain_fraction", 0.5)
        if not _is_finite_number(retain) or not 0.0 < float(retain) <= 1.0:
            errors.append((("surrogate", "retain_fraction"), "must be a number in (0, 1]"))
        budget = _section(errors, data, "budget", {"max_runs"})
        max_runs = _int_field(errors, budget, ("budget", "max_runs"), 400, 1)
        seed = data.get("seed", 0)
        if not isinstance(seed, int) or isinstance(seed, bool) or not 0 <= seed < 2**63:
            errors.append((("seed",), "must be a whole number from 0 to 2**63 - 1"))
        for key, value in (
            ("initial_runs", initial_runs),
            ("batch_size", batch_size),
            ("max_runs", max_runs),
            ("max_degree", max_degree),
        ):
            section = {"max_degree": "surrogate", "max_runs": "budget"}.get(key, "design")
            if value is not None and value > LIMITS[key]:
                errors.append(((section, key), f"must be at most {LIMITS[key]}, got {value}"))
        if errors:
            raise SpecError(errors)
        assert parameters is not None and observations is not None
        assert initial_runs is not None and batch_size is not None
        assert max_degree is not None and max_runs is not None
        return cls(
            name=str(name),
            parameters=parameters,
            observations=observations,
            noise_scale=scale,
            initial_runs=initial_runs,
            batch_size=batch_size,
            max_degree=max_degree,
            retain_fraction=float(retain),
            max_runs=max_runs,
            seed=int(seed),
        )

    def to_dict(self) -> dict[str, Any]:
        """The normalised spec as plain JSON-able data (defaults filled in)."""
        return {
            "name": self.name,
            "parameters": [
                {"name": p.name, "prior": p.prior.to_dict(), "unit": p.unit}
                for p in self.parameters
            ],
            "observations": [
                {
                    "name": o.name,
                    "values": o.values.tolist(),
                    "sd": o.sd.tolist(),
                    "coords": None if o.coords is None else o.coords.tolist(),
                    "unit": o.unit,
                    "coords_label": o.coords_label,
                }
                for o in self.observations
            ],
            "noise": {"scale": self.noise_scale},
            "design": {"initial_runs": self.initial_runs, "batch_size": self.batch_size},
            "surrogate": {"max_degree": self.max_degree, "retain_fraction": self.retain_fraction},
            "budget": {"max_runs": self.max_runs},
            "seed": self.seed,
        }


def _label(item: Mapping[str, Any], key: str, loc: tuple[str | int, ...]) -> str | None:
    """An optional text field of at most `MAX_UNIT_CHARS` characters (a label on plots)."""
    text = item.get(key)
    if text is not None and not (isinstance(text, str) and len(text) <= MAX_UNIT_CHARS):
        raise SpecError.at((*loc, key), f"must be a string of at most {MAX_UNIT_CHARS} characters")
    return text


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _is_finite_number(value: Any) -> bool:
    if not _is_number(value):
        return False
    try:
        return math.isfinite(float(value))
    except OverflowError:
        return False


def _name_list(names: Iterable[str], shown: int = 10) -> str:
    """Names for an error message: the first ``shown`` and how many in all."""
    names = list(names)
    listed = ", ".join(repr(n) for n in names[:shown])
    return listed if len(names) <= shown else f"{listed}, ... ({len(names)} in all)"


def _number_list(value: Any, loc: tuple[str | int, ...]) -> np.ndarray:
    if not isinstance(value, Sequence) or isinstance(value, str):
        raise SpecError.at(loc, "must be a list of numbers")
    if set(map(type, value)) <= {float, int}:  # the common case, checked at C speed
        try:
            array = np.asarray(value, dtype=float)
        except OverflowError:  # an integer beyond the float range: located below
            array = np.array([math.inf])
        if np.isfinite(array).all():
            return array
    bad = [i for i, v in enumerate(value) if not _is_finite_number(v)]
    if bad:
        raise SpecError.at((*loc, bad[0]), "must be a finite number")
    return np.asarray(value, dtype=float)


def _collect(errors: list, build: Any, value: Any) -> Any:
    try:
        return build(value)
    except SpecError as exc:
        errors.extend((tuple(e["loc"]), e["msg"]) for e in exc.errors)
        return None


def _section(errors: list, data: Mapping[str, Any], key: str, allowed: set[str]) -> Mapping:
    section = data.get(key, {})
    if not isinstance(section, Mapping):
        errors.append(((key,), "must be an object"))
        return {}
    errors.extend(((key, str(k)), "unknown field") for k in section if k not in allowed)
    return section


def _int_field(
    errors: list, section: Mapping, loc: tuple[str, str], default: int, minimum: int
) -> int | None:
    value = section.get(loc[1], default)
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        errors.append((loc, f"must be a whole number of at least {minimum}"))
        return None
    return value


def _check_name(name: Any, loc: tuple[str | int, ...]) -> str:
    if not isinstance(name, str) or not 0 < len(name) <= 64 or not set(name) <= _NAME_CHARS:
        raise SpecError.at(loc, "must be 1 to 64 characters of letters, digits, '_', '-', '.'")
    return name


def _parameters(value: Any, stored: bool = False) -> tuple[Parameter, ...]:
    if not isinstance(value, Sequence) or isinstance(value, str) or not value:
        raise SpecError.at(("parameters",), "must be a non-empty list")
    if len(value) > LIMITS["parameters"]:
        raise SpecError.at(("parameters",), f"at most {LIMITS['parameters']} parameters")
    errors: list[tuple[tuple[str | int, ...], str]] = []
    out: list[Parameter] = []
    for i, item in enumerate(value):
        loc: tuple[str | int, ...] = ("parameters", i)
        if not isinstance(item, Mapping):
            errors.append((loc, "must be an object"))
            continue
        errors.extend(
            ((*loc, str(k)), "unknown field") for k in item if k not in {"name", "prior", "unit"}
        )
        try:
            name = _check_name(item.get("name"), (*loc, "name"))
            if "prior" not in item:
                raise SpecError.at((*loc, "prior"), "missing")
            prior = prior_from_dict(item["prior"], (*loc, "prior"), check_scale=not stored)
            unit = item.get("unit")
            longest = math.inf if stored else MAX_UNIT_CHARS
            if unit is not None and not (isinstance(unit, str) and len(unit) <= longest):
                raise SpecError.at(
                    (*loc, "unit"), f"must be a string of at most {MAX_UNIT_CHARS} characters"
                )
            out.append(Parameter(name, prior, unit))
        except SpecError as exc:
            errors.extend((tuple(e["loc"]), str(e["msg"])) for e in exc.errors)
    names = [p.name for p in out]
    errors.extend(
        (("parameters", i, "name"), f"duplicate name {n!r}")
        for i, n in enumerate(names)
        if n in names[:i]
    )
    errors.extend(
        (("parameters", i, "name"), f"{n!r} is reserved for the estimated noise scale")
        for i, n in enumerate(names)
        if n == NOISE_SCALE_NAME and not stored
    )
    if errors:
        raise SpecError(errors)
    return tuple(out)


def _observations(value: Any) -> tuple[Observation, ...]:
    if not isinstance(value, Sequence) or isinstance(value, str) or not value:
        raise SpecError.at(("observations",), "must be a non-empty list")
    if len(value) > LIMITS["observations"]:
        raise SpecError.at(("observations",), f"at most {LIMITS['observations']} channels")
    errors: list[tuple[tuple[str | int, ...], str]] = []
    out: list[Observation] = []
    for i, item in enumerate(value):
        loc: tuple[str | int, ...] = ("observations", i)
        if not isinstance(item, Mapping):
            errors.append((loc, "must be an object"))
            continue
        errors.extend(
            ((*loc, str(k)), "unknown field")
            for k in item
            if k not in {"name", "values", "sd", "coords", "unit", "coords_label"}
        )
        try:
            name = _check_name(item.get("name"), (*loc, "name"))
            values = _number_list(item.get("values"), (*loc, "values"))
            if values.size == 0:
                raise SpecError.at((*loc, "values"), "must not be empty")
            sd_raw = item.get("sd")
            if _is_number(sd_raw):
                finite = _is_finite_number(sd_raw)
                sd = np.full(values.shape, float(sd_raw) if finite else math.inf)  # type: ignore[arg-type]
            else:
                sd = _number_list(sd_raw, (*loc, "sd"))
                if sd.shape != values.shape:
                    raise SpecError.at(
                        (*loc, "sd"), f"expected a number or {values.size} values, got {sd.size}"
                    )
            if not np.all(np.isfinite(sd)) or np.any(sd <= 0):
                raise SpecError.at((*loc, "sd"), "every sd must be a finite number above 0")
            coords = None
            if item.get("coords") is not None:
                coords = _number_list(item["coords"], (*loc, "coords"))
                if coords.shape != values.shape:
                    raise SpecError.at(
                        (*loc, "coords"), f"expected {values.size} values, got {coords.size}"
                    )
            unit = _label(item, "unit", loc)
            coords_label = _label(item, "coords_label", loc)
            out.append(Observation(name, values, sd, coords, unit, coords_label))
        except SpecError as exc:
            errors.extend((tuple(e["loc"]), str(e["msg"])) for e in exc.errors)
    names = [o.name for o in out]
    errors.extend(
        (("observations", i, "name"), f"duplicate name {n!r}")
        for i, n in enumerate(names)
        if n in names[:i]
    )
    if sum(o.size for o in out) > LIMITS["observation_values"]:
        errors.append(
            (("observations",), f"at most {LIMITS['observation_values']} values in all channels")
        )
    if errors:
        raise SpecError(errors)
    return tuple(out)
