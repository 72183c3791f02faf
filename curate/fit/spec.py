"""The parameters of a model: start, bounds, log scale, fixed; read from a TOML spec.

```toml
[parameters.k_deg]
start = 0.1
lower = 1e-4
upper = 10      # "inf" allowed
log = true      # fitted as ln(k_deg)
# fixed = true  # held at start
[options]
scale_factors = true   # relative-unit data get closed-form scale factors
```
"""

from __future__ import annotations

import hashlib
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from curate.errors import InputError

__all__ = ["Parameter", "ParameterSpec", "load_spec", "overlay", "spec_from_dict"]


@dataclass(frozen=True)
class Parameter:
    """One model parameter's start, bounds and treatment."""

    name: str
    start: float
    lower: float = -math.inf
    upper: float = math.inf
    log: bool = False
    fixed: bool = False


@dataclass(frozen=True)
class ParameterSpec:
    """The parameters of a model and whether relative data get closed-form scale factors."""

    parameters: tuple[Parameter, ...]
    scale_factors: bool = True
    origin: str = "spec"
    sha256: str = ""

    @property
    def free(self) -> tuple[Parameter, ...]:
        """Give the parameters that are fitted."""
        return tuple(p for p in self.parameters if not p.fixed)

    def to_dict(self) -> dict[str, Any]:
        """Give the spec as plain data."""
        return {
            "parameters": {p.name: {"start": p.start, "lower": p.lower, "upper": p.upper, "log": p.log, "fixed": p.fixed}
                           for p in self.parameters},
            "scale_factors": self.scale_factors, "origin": self.origin, "sha256": self.sha256,
        }  # fmt: skip


def _float(origin: str, name: str, key: str, value: Any, default: float) -> float:
    if value is None:
        return default
    if isinstance(value, str) and value.strip().lower() in ("inf", "+inf", "-inf"):
        return float(value)
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(
            f"{origin}, field 'parameters.{name}.{key}': expected a number (or \"inf\"), got {value!r}"
        )
    return float(value)


def spec_from_dict(
    content: dict[str, Any], *, origin: str = "spec", sha256: str = "", overrides: bool = False
) -> ParameterSpec:
    """Give a validated spec from its TOML content."""
    raw = content.get("parameters")
    if not isinstance(raw, dict) or not raw:
        raise InputError(f"{origin}: expected [parameters.NAME] tables with start, lower, upper")
    unknown_top = set(content) - {"parameters", "options"}
    if unknown_top:
        raise InputError(
            f"{origin}, field '{sorted(unknown_top)[0]}': unknown; expected [parameters.NAME] and [options]"
        )
    parameters = []
    for name, entry in raw.items():
        if not isinstance(entry, dict):
            raise InputError(
                f"{origin}, field 'parameters.{name}': expected a table with start, lower, upper"
            )
        extra = set(entry) - {"start", "lower", "upper", "log", "fixed"}
        if extra:
            raise InputError(
                f"{origin}, field 'parameters.{name}.{sorted(extra)[0]}': unknown; expected start, lower, upper, log, fixed"
            )
        if "start" not in entry:
            raise InputError(f"{origin}, field 'parameters.{name}.start': required")
        start = _float(origin, name, "start", entry["start"], 0.0)
        lower = _float(origin, name, "lower", entry.get("lower"), -math.inf)
        upper = _float(origin, name, "upper", entry.get("upper"), math.inf)
        log = bool(entry.get("log", False))
        if lower >= upper:
            raise InputError(
                f"{origin}, parameter '{name}': lower {lower:g} is not below upper {upper:g}"
            )
        if not lower <= start <= upper:
            raise InputError(
                f"{origin}, parameter '{name}': start {start:g} is outside its bounds [{lower:g}, {upper:g}]"
            )
        if log and (start <= 0 or lower < 0):
            raise InputError(
                f"{origin}, parameter '{name}': a log-scale parameter needs start > 0 and lower >= 0"
            )
        parameters.append(
            Parameter(name, start, lower, upper, log, bool(entry.get("fixed", False)))
        )
    options = content.get("options", {})
    if not isinstance(options, dict) or set(options) - {"scale_factors"}:
        raise InputError(f"{origin}, field 'options': only scale_factors = true/false is known")
    spec = ParameterSpec(
        tuple(parameters), bool(options.get("scale_factors", True)), origin, sha256
    )
    if not spec.free and not overrides:
        raise InputError(f"{origin}: every parameter is fixed; nothing to fit")
    return spec


def load_spec(path: str | Path, *, overrides: bool = False) -> ParameterSpec:
    """Give the parameter spec in a TOML file (``overrides``: parameters laid over another
    spec, which may all be fixed)."""
    file = Path(path)
    if not file.is_file():
        raise InputError(f"{file}: no such parameter spec file")
    text = file.read_bytes()
    try:
        content = tomllib.loads(text.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{file}: not valid TOML ({err})") from None
    return spec_from_dict(content, origin=str(file), sha256=hashlib.sha256(text).hexdigest(),
                          overrides=overrides)  # fmt: skip


def overlay(base: ParameterSpec, overrides: ParameterSpec) -> ParameterSpec:
    """Give ``base`` with each parameter ``overrides`` names replaced by its entry there (the
    others as they are); a name ``base`` lacks is refused."""
    known = {p.name for p in base.parameters}
    for p in overrides.parameters:
        if p.name not in known:
            raise InputError(
                f"{overrides.origin}: parameter '{p.name}' is not in {base.origin}; it names "
                + ", ".join(sorted(known))
            )
    given = {p.name: p for p in overrides.parameters}
    merged = ParameterSpec(tuple(given.get(p.name, p) for p in base.parameters),
                           base.scale_factors, f"{base.origin} with {overrides.origin}",
                           hashlib.sha256((base.sha256 + overrides.sha256).encode()).hexdigest())  # fmt: skip
    return merged
