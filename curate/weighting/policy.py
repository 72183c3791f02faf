"""Weighting policies: what a grade costs, what is never fitted, floors, unknown noise, balancing.

A policy is a TOML file (the default ships as ``curate/data/policy.toml``, commented line by
line). Its hash covers what it does, not its comments or layout, and is named in every export
and run record. Load a policy once per action (:func:`resolve_policy`) and pass the value on.
"""

from __future__ import annotations

import functools
import hashlib
import tomllib
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import numpy as np

from curate.errors import InputError
from curate.records import EXCLUSION_GRADE, GRADES, canonical_json

__all__ = ["Policy", "PolicyLike", "load_policy", "resolve_policy"]

_FITTED = ("A", "B", "C", "D")


@dataclass(frozen=True)
class Policy:
    """A weighting policy: grade inflation, exclusions, floors, unknown noise, balancing."""

    name: str
    inflation: dict[str, float]
    exclude: tuple[str, ...]
    ungraded: str
    absolute_floor: float
    relative_floor: float
    unknown_noise: Literal["estimate", "refuse", "default"]
    default_relative_sd: float
    balance: Literal["none", "equal", "sqrt"]
    lab_cap: float
    origin: str
    text: str
    sha256: str
    # censored points in a fit: the censored-normal term ("likelihood") or left out ("omit")
    censored: Literal["likelihood", "omit"] = "likelihood"

    @property
    def is_likelihood(self) -> bool:
        """Tell whether the weighted sum of squares stays a likelihood (no balancing, no cap)."""
        return self.balance == "none" and self.lab_cap == 0.0

    def to_dict(self) -> dict[str, Any]:
        """Give the policy's settings as plain data (with its hash)."""
        return {
            "name": self.name,
            "inflation": self.inflation,
            "exclude": list(self.exclude),
            "ungraded": self.ungraded,
            "floors": {"absolute": self.absolute_floor, "relative": self.relative_floor},
            "unknown_noise": {
                "action": self.unknown_noise,
                "default_relative_sd": self.default_relative_sd,
            },
            "balance": {"mode": self.balance, "lab_cap": self.lab_cap},
            "censored": self.censored,
            "origin": self.origin,
            "sha256": self.sha256,
        }


def _number(
    origin: str, where: str, value: Any, *, minimum: float = 0.0, strict: bool = False
) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not np.isfinite(value):
        raise InputError(f"{origin}, field '{where}': expected a number, got {value!r}")
    if value < minimum or (strict and value <= minimum):
        relation = ">" if strict else ">="
        raise InputError(
            f"{origin}, field '{where}': {value} is not allowed; expected a number {relation} {minimum}"
        )
    return float(value)


@functools.cache
def _shipped_settings() -> dict[str, Any]:
    """Give the floors, unknown-noise and balance tables of the policy that ships with curate.

    A policy file that leaves one of these keys out takes the shipped value, so a copy that
    changes one line keeps the shipped floors (inflation factors are never filled in: every
    fitted grade needs its own, or a place in ``exclude``).
    """
    text = resources.files("curate").joinpath("data/policy.toml").read_text(encoding="utf-8")
    content = tomllib.loads(text)
    return {key: dict(content[key]) for key in ("floors", "unknown_noise", "balance")}


def load_policy(path: str | Path | None = None) -> Policy:
    """Give the policy in ``path`` (TOML), or the default that ships with curate."""
    if path is None:
        text = resources.files("curate").joinpath("data/policy.toml").read_text(encoding="utf-8")
        origin = "curate default policy"
    else:
        file = Path(path)
        if not file.is_file():
            raise InputError(f"{file}: no such policy file")
        text = file.read_text(encoding="utf-8")
        origin = str(file)
    try:
        content = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"{origin}: not valid TOML ({err})") from None
    known = {"name", "inflation", "exclude", "ungraded", "floors", "unknown_noise", "balance",
             "censored"}  # fmt: skip
    for key in content:
        if key not in known:
            raise InputError(
                f"{origin}, field '{key}': unknown; expected one of {', '.join(sorted(known))}"
            )
    raw_inflation = content.get("inflation", {})
    if not isinstance(raw_inflation, dict):
        raise InputError(f"{origin}, field 'inflation': expected a table of grade = factor")
    inflation = {}
    for grade, factor in raw_inflation.items():
        if grade not in _FITTED:
            hint = " (X is never fitted: list it in exclude)" if grade == EXCLUSION_GRADE else ""
            raise InputError(
                f"{origin}, field 'inflation.{grade}': unknown grade; expected A, B, C or D{hint}"
            )
        inflation[grade] = _number(origin, f"inflation.{grade}", factor, strict=True)
    exclude = content.get("exclude", [EXCLUSION_GRADE])
    if not isinstance(exclude, list) or any(g not in GRADES for g in exclude):
        raise InputError(
            f"{origin}, field 'exclude': expected a list of grades from {', '.join(GRADES)}"
        )
    if EXCLUSION_GRADE not in exclude:
        exclude = [*exclude, EXCLUSION_GRADE]  # X means "never fitted" whatever the policy says
    missing = [g for g in _FITTED if g not in inflation and g not in exclude]
    if missing:
        raise InputError(
            f"{origin}, field 'inflation': no factor for grade {missing[0]} (or list it in exclude)"
        )
    ungraded = content.get("ungraded", "C")
    if ungraded not in GRADES:
        raise InputError(f"{origin}, field 'ungraded': '{ungraded}' is not a grade")
    floors = content.get("floors", {})
    unknown = content.get("unknown_noise", {})
    balance = content.get("balance", {})
    shipped = _shipped_settings()
    allowed = {"floors": {"absolute", "relative"}, "unknown_noise": {"action", "default_relative_sd"},
               "balance": {"mode", "lab_cap"}}  # fmt: skip
    for table, name in ((floors, "floors"), (unknown, "unknown_noise"), (balance, "balance")):
        if not isinstance(table, dict):
            raise InputError(f"{origin}, field '{name}': expected a table")
        for key in table:
            if key not in allowed[name]:
                raise InputError(
                    f"{origin}, field '{name}.{key}': unknown; expected one of {', '.join(sorted(allowed[name]))}"
                )
    action = unknown.get("action", shipped["unknown_noise"]["action"])
    if action not in ("estimate", "refuse", "default"):
        raise InputError(
            f"{origin}, field 'unknown_noise.action': '{action}'; expected estimate, refuse or default"
        )
    mode = balance.get("mode", shipped["balance"]["mode"])
    if mode not in ("none", "equal", "sqrt"):
        raise InputError(f"{origin}, field 'balance.mode': '{mode}'; expected none, equal or sqrt")
    lab_cap = _number(
        origin, "balance.lab_cap", balance.get("lab_cap", shipped["balance"]["lab_cap"])
    )
    if lab_cap >= 1.0:
        raise InputError(
            f"{origin}, field 'balance.lab_cap': {lab_cap}; expected 0 (no cap) or a share below 1"
        )
    censored = content.get("censored", "likelihood")
    if censored not in ("likelihood", "omit"):
        raise InputError(
            f"{origin}, field 'censored': {censored!r}; expected 'likelihood' (a censored point "
            "adds the probability beyond its limit) or 'omit' (left out of fits)"
        )
    normalised: dict[str, Any] = {
        "inflation": inflation,
        "exclude": sorted(exclude),
        "ungraded": ungraded,
        "floors": {"absolute": _number(origin, "floors.absolute", floors.get("absolute", shipped["floors"]["absolute"])),
                   "relative": _number(origin, "floors.relative", floors.get("relative", shipped["floors"]["relative"]))},
        "unknown_noise": {"action": action,
                          "default_relative_sd": _number(origin, "unknown_noise.default_relative_sd",
                                                         unknown.get("default_relative_sd", shipped["unknown_noise"]["default_relative_sd"]), strict=True)},
        "balance": {"mode": mode, "lab_cap": lab_cap},
    }  # fmt: skip
    if censored != "likelihood":
        # written only when not the default, so every policy hashed before stays the same key
        normalised["censored"] = censored
    # the hash covers what the policy does, not its comments or layout
    sha256 = hashlib.sha256(canonical_json(normalised).encode()).hexdigest()
    return Policy(
        name=str(content.get("name", Path(origin).stem)),
        inflation=inflation,
        exclude=tuple(sorted(exclude)),
        ungraded=ungraded,
        absolute_floor=normalised["floors"]["absolute"],
        relative_floor=normalised["floors"]["relative"],
        unknown_noise=action,
        default_relative_sd=normalised["unknown_noise"]["default_relative_sd"],
        balance=mode,
        lab_cap=lab_cap,
        origin=origin,
        text=text,
        sha256=sha256,
        censored=censored,
    )


PolicyLike = Policy | str | Path | None


def resolve_policy(policy: PolicyLike) -> Policy:
    """Give a loaded policy: the value itself, the file it names, or the default for None."""
    return policy if isinstance(policy, Policy) else load_policy(policy)
